"""Build the report of one run: PNG files plus one self-contained HTML page.

``build_report(store, run_id, out_dir)`` reads the run once, draws every registered plot
that applies (:mod:`benchctl.report.registry`), writes ``<nn>-<key>.png`` files and
``report.html`` (the same PNGs embedded) into ``out_dir`` (default
``benchctl-data/report-run<id>/``). A plot that fails is left out and named in the
page and in :attr:`ReportFiles.notes`; the rest of the report is still written.
"""

from __future__ import annotations

import io
import logging
import os
from dataclasses import dataclass
from datetime import datetime, timezone
from pathlib import Path
from typing import Any

from matplotlib.figure import Figure

import benchctl

from .files import write_page
from . import standard_plots  # noqa: F401  (registers the standard plots)
from . import waveform_plots  # noqa: F401  (registers the waveform plots)
from . import loop_plots  # noqa: F401  (registers the Bode plot and the margin map)
from . import start_up_plots  # noqa: F401  (registers the turn-on, input-threshold and loss-split plots)
from . import output_plots  # noqa: F401  (registers the output-impedance and cross-regulation plots)
from . import thermal_plots  # noqa: F401  (registers the temperature plots)
from . import line_plots  # noqa: F401  (registers the line-step, line-rejection and hold-up plots)
from . import protection_plots  # noqa: F401  (registers the over-current, short-circuit and over-voltage plots)
from . import style
from .html import EmbeddedImage, render_html
from .registry import registered_plots
from .run_data import RunData, load_run_data

log = logging.getLogger(__name__)

REPORT_FILE_NAME = "report.html"


@dataclass(frozen=True)
class ReportFiles:
    """What :func:`build_report` wrote. ``notes`` name plots that were left out and why."""

    run_id: int
    out_dir: Path
    html_path: Path
    png_paths: tuple[Path, ...]
    notes: tuple[str, ...]


def default_out_dir(run_id: int) -> Path:
    """``report-run<id>`` in the data folder (the nearest ``benchctl-data``, see :mod:`benchctl.locations`)."""
    from benchctl.locations import data_dir

    return data_dir() / f"report-run{run_id}"


def figure_png(fig: Figure) -> bytes:
    """Render a figure to PNG bytes at the report resolution (the Agg canvas; size kept exact)."""
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=style.FIG_DPI, facecolor=fig.get_facecolor(),
                metadata={"Software": f"benchctl {benchctl.__version__}"})
    return buf.getvalue()


def render_figures(run: RunData) -> tuple[list[EmbeddedImage], list[str]]:
    """Draw every registered plot that applies to ``run``; returns the images and notes."""
    images: list[EmbeddedImage] = []
    notes: list[str] = []
    for entry in registered_plots():
        try:
            if not entry.applies(run):
                continue
            figures = list(entry.make(run))
        except Exception as exc:  # one broken plot must not cost the whole report
            log.warning("run %s: plot %r failed", run.run_id, entry.key, exc_info=True)
            notes.append(f"The plot '{entry.title}' could not be drawn ({type(exc).__name__}: {exc}); "
                         "the rest of the report is complete.")
            continue
        for rf in figures:
            width_in, height_in = rf.figure.get_size_inches()
            png = figure_png(rf.figure)
            images.append(EmbeddedImage(
                file_name=f"{len(images) + 1:02d}-{rf.key}.png", title=rf.title, caption=rf.caption, png=png,
                width_px=int(round(width_in * style.FIG_DPI)), height_px=int(round(height_in * style.FIG_DPI)),
            ))
    return images, notes


def build_report(store: Any, run_id: int | str, out_dir: str | os.PathLike[str] | None = None) -> ReportFiles:
    """Write the report of run ``run_id`` (an id or ``"latest"``) of ``store`` into ``out_dir``.

    Raises :class:`~benchctl.errors.StoreError` when the run does not exist or the
    directory cannot be written.
    """
    rid = store.resolve_run(run_id)
    run = load_run_data(store, rid)
    images, notes = render_figures(run)
    target = Path(out_dir) if out_dir is not None else default_out_dir(rid)
    page = render_html(run, images, notes=notes, store_url=str(getattr(store, "url", "")),
                       generated_utc=datetime.now(timezone.utc))
    html_path, png_paths = write_page(target, REPORT_FILE_NAME, page, images, what=f"the report of run {rid}")
    log.info("report of run %s written to %s (%d plots)", rid, html_path, len(png_paths))
    return ReportFiles(run_id=rid, out_dir=target, html_path=html_path, png_paths=tuple(png_paths), notes=tuple(notes))
