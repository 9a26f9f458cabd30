"""The side-by-side report of two runs: run B's report led by plots drawn against run A."""

from __future__ import annotations

import os
from datetime import datetime, timezone
from pathlib import Path
from typing import Any


from .files import write_page
from . import plots, style
from .build import REPORT_FILE_NAME, ReportFiles, figure_png, render_figures
from .html import EmbeddedImage, render_html
from .run_data import load_run_data


def build_comparison_report(store: Any, run_a: int, run_b: int, out_dir: str | os.PathLike[str], *,
                            comparison: Any = None) -> ReportFiles:
    """Write run B's report into ``out_dir`` with run A drawn dashed on the efficiency plot,
    led by the difference plots of ``comparison`` (a :class:`benchctl.compare.Comparison`
    of the two runs; made with the default tolerances when not given)."""
    from benchctl.compare import compare_points

    from .compare_revisions import comparison_images

    a = load_run_data(store, run_a)
    b = load_run_data(store, run_b)
    if comparison is None:
        comparison = compare_points(a.points, b.points, run_a=run_a, run_b=run_b, results_a=a.results,
                                    results_b=b.results)
    images: list[EmbeddedImage] = list(comparison_images(comparison, f"run {run_b} − run {run_a}", "00-change"))
    if {"iout_set_a", "pin_w", "pout_w", "vin_set_v"} <= set(a.points.columns) & set(b.points.columns):
        fig = plots.efficiency_vs_load(b.points, run_id=run_b, other_points=a.points, other_run_id=run_a)
        w, h = fig.get_size_inches()
        images.append(EmbeddedImage(
            file_name="00-compare-efficiency.png", title=f"efficiency: run {run_b} against run {run_a}",
            caption=f"solid: run {run_b}; dashed: run {run_a} (same colour per line voltage)",
            png=figure_png(fig), width_px=int(round(w * style.FIG_DPI)), height_px=int(round(h * style.FIG_DPI)),
        ))
    own, notes = render_figures(b)
    images += own
    target = Path(out_dir)
    page = render_html(b, images, notes=[f"Side-by-side with run {run_a} ({a.info.dut_part} rev "
                                         f"{a.info.dut_revision or '—'})."] + notes,
                       store_url=str(getattr(store, "url", "")), generated_utc=datetime.now(timezone.utc))
    html_path, paths = write_page(target, REPORT_FILE_NAME, page, images, what="the comparison report",
                                  hint="choose another directory")
    return ReportFiles(run_b, target, html_path, tuple(paths), tuple(notes))
