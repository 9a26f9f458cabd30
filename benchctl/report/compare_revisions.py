"""The change between two revisions (or two runs) as page sections and PNGs: per procedure,
a table of the changes by quantity with the tolerance applied, and the difference plots
(:mod:`benchctl.report.compare_plots`) of the quantities drawn against load."""

from __future__ import annotations

import os
from collections.abc import Sequence
from datetime import datetime, timezone
from pathlib import Path

from benchctl.compare import Comparison, RevisionComparison

from .files import write_page
from . import style
from .build import figure_png
from .compare_plots import can_draw, difference_figure, scale_of
from .html import _CSS, EmbeddedImage, _table, data_uri, esc

#: Quantities drawn as difference plots, in this order, when the comparison has them against load.
DRAWN = ("efficiency", "loss_w", "vout_v", "ripple_pk_pk_v", "phase_margin_deg")

COMPARISON_FILE_NAME = "comparison.html"


def _scope_text(where: dict) -> str:
    return ", ".join(f"{k}={v:g}" if isinstance(v, float) else f"{k}={v}" for k, v in sorted(where.items())) or "—"


def change_rows(comparison: Comparison) -> list[list[str]]:
    """One row per quantity: matched, largest change and where, the tolerance applied, beyond (escaped HTML)."""
    per_q: dict[str, list] = {}
    for d in comparison.deltas:
        per_q.setdefault(d.quantity, []).append(d)
    rows = []
    for q, ds in per_q.items():
        worst = max(ds, key=lambda d: abs(d.delta))
        n_flag = sum(d.flagged for d in ds)
        tol = comparison.tolerances.get(q)
        rows.append([esc(q), esc(len(ds)), esc(f"{worst.delta:+.4g}"), esc(_scope_text(dict(worst.where))),
                     esc(tol.rule if tol else f"{worst.tolerance:.3g}"),
                     f'<b class="beyond">{n_flag}</b>' if n_flag else "0"])
    return rows


def comparison_images(comparison: Comparison, label: str, prefix: str) -> list[EmbeddedImage]:
    """Difference plots of ``comparison`` (file names start with ``prefix``)."""
    images = []
    for q in DRAWN:
        ds = [d for d in comparison.deltas if d.quantity == q]
        if not ds or q not in comparison.tolerances or not can_draw(ds):
            continue
        tol = comparison.tolerances[q]
        fig = difference_figure(q, ds, tol, title=f"change of {q}", subtitle=label)
        w, h = fig.get_size_inches()
        factor, unit = scale_of(q)
        n_flag = sum(d.flagged for d in ds)
        images.append(EmbeddedImage(
            file_name=f"{prefix}-{q}.png", title=f"{q}: change {label}",
            caption=f"Change B − A of {q} against the load setpoint, one curve per line voltage; the shaded band is "
                    f"the tolerance applied to every point, {tol.rule}"
                    + (f" (drawn ×{factor:g}, in {unit})" if factor != 1 else "")
                    + f"; {n_flag} change(s) beyond it, ringed.",
            png=figure_png(fig), width_px=int(round(w * style.FIG_DPI)), height_px=int(round(h * style.FIG_DPI))))
    return images


def revision_comparison_section(rc: RevisionComparison, prefix: str = "change") -> tuple[str, list[EmbeddedImage]]:
    """The HTML section (escaped) and images of a revision comparison."""
    label = f"rev {rc.revision_b} − rev {rc.revision_a}"
    parts = [f"<h2>Change from revision {esc(rc.revision_a)}</h2>",
             f'<p class="note">Mean over the units of each revision (rev {esc(rc.revision_a)}: '
             f"{esc(', '.join(rc.units_a) or 'none')}; rev {esc(rc.revision_b)}: "
             f"{esc(', '.join(rc.units_b) or 'none')}), the latest completed run of each procedure on each unit. "
             "One tolerance per quantity, applied to every operating point.</p>"]
    images: list[EmbeddedImage] = []
    for proc, cmp in rc.by_procedure.items():
        parts.append(f"<h3>{esc(proc)}</h3>")
        parts.append(f'<p class="note">{esc(cmp.matched_points)} operating points matched, {esc(cmp.only_in_a)} only '
                     f"in rev {esc(rc.revision_a)}, {esc(cmp.only_in_b)} only in rev {esc(rc.revision_b)}.</p>")
        rows = change_rows(cmp)
        parts.append(_table(["quantity", "matched", "largest change", "where", "tolerance applied", "beyond"], rows,
                            numeric=(1, 2, 5)) if rows else '<p class="empty">Nothing to compare.</p>')
        imgs = comparison_images(cmp, label, f"{prefix}-{proc}")
        images += imgs
        for img in imgs:
            parts.append(f'<figure><img alt="{esc(img.title)}" src="{data_uri(img.png)}" width="{img.width_px}" '
                         f'height="{img.height_px}"><figcaption>{esc(img.caption)}</figcaption></figure>')
    for what, procs in (("only revision " + rc.revision_a, rc.only_in_a), ("only revision " + rc.revision_b,
                                                                          rc.only_in_b)):
        if procs:
            parts.append(f'<p class="note">Procedures run on {esc(what)}: {esc(", ".join(procs))} (not compared).</p>')
    return "".join(parts), images


def write_revision_comparison(rc: RevisionComparison, out_dir: str | os.PathLike[str], *,
                              store_url: str = "") -> Path:
    """A page of its own with the comparison and its PNGs in ``out_dir``; returns the page's path."""
    section, images = revision_comparison_section(rc)
    now = datetime.now(timezone.utc).strftime("%Y-%m-%d %H:%M:%S UTC")
    page = ("<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">"
            f"<title>{esc(rc.part)} rev {esc(rc.revision_b)} against rev {esc(rc.revision_a)} · benchctl</title>"
            f"<style>{_CSS} .beyond {{ color: var(--fail); }}</style></head><body><main>"
            f"<header><h1>{esc(rc.part)}: revision {esc(rc.revision_b)} against {esc(rc.revision_a)}</h1>"
            f"<p>store {esc(store_url)}</p></header>{section}<footer>generated {esc(now)} by benchctl</footer>"
            "</main></body></html>\n")
    target = Path(out_dir)
    path, _ = write_page(target, COMPARISON_FILE_NAME, page, images, what="the comparison",
                         hint="choose another directory")
    return path


__all__ = ["DRAWN", "change_rows", "comparison_images", "revision_comparison_section", "write_revision_comparison"]
