"""Loop-gain plots: a Bode plot with crossover, phase margin and gain margin marked, and a
margin map over the line × load envelope.

Pure functions (arrays/frames in, :class:`matplotlib.figure.Figure` out, no pyplot state),
plus their registration with the report (:mod:`benchctl.report.registry`): one Bode plot per
stored ``bode`` array and one margin map when the run's points hold phase margins.
Margins as defined in Erickson & Maksimović, 2nd ed., ch. 9 (see
:mod:`benchctl.analysis.margins`): PM is drawn as the distance from −180° to the phase
at crossover, GM as the distance from the gain at the phase crossover up to 0 dB.
"""

from __future__ import annotations

import math
from collections.abc import Sequence

import matplotlib
import numpy as np
import pandas as pd
from matplotlib.figure import Figure
from numpy.typing import ArrayLike

from benchctl.analysis.frequency_response import unwrapped_phase_deg
from benchctl.analysis.margins import LoopMargins, NotFound, checked_phase_convention, loop_margins

from . import style
from .registry import ReportFigure, register_plot
from .run_data import RunData

__all__ = ["bode_figure", "margin_map_figure"]

PM_COLOUR = style.LINE_COLOURS[1]
GM_COLOUR = style.LINE_COLOURS[2]


def bode_figure(freq_hz: ArrayLike, response: ArrayLike, *, phase_convention: str = "loop",
                margins: LoopMargins | None = None, title: str = "Loop gain", subtitle: str = "") -> Figure:
    """Gain (dB) and phase (deg) of T against frequency (Hz, log), with fc, PM and GM marked.

    ``response`` is complex as measured; with ``phase_convention="inverted"`` it is −T and is
    negated before plotting. ``margins`` default to :func:`loop_margins` of the data.
    """
    with matplotlib.rc_context(style.matplotlib_rc()):
        f = np.asarray(freq_hz, dtype=float)
        h = np.asarray(response, dtype=complex)
        convention = checked_phase_convention(phase_convention, where="bode_figure")
        t = -h if convention == "inverted" else h
        m = margins if margins is not None else loop_margins(f, h, phase_convention=convention)
        gain = 20.0 * np.log10(np.abs(t))
        phase = unwrapped_phase_deg(t)
        fig, (ax_g, ax_p) = style.new_figure(2, height_in=6.0, sharex=True)
        ax_g.semilogx(f, gain, color=style.line_colour(0), linewidth=style.LINE_WIDTH_PT, label="|T|")
        ax_p.semilogx(f, phase, color=style.line_colour(0), linewidth=style.LINE_WIDTH_PT, label="phase of T")
        ax_g.axhline(0.0, color=style.REFERENCE_INK, linewidth=0.9, linestyle="--")
        level = -180.0
        if m.phase_crossovers:
            level = m.phase_crossovers[0].phase_level_deg
        elif phase.size and phase.max() > 0:
            level = 180.0 if phase.min() > -180.0 and phase.max() > 180.0 else -180.0
        ax_p.axhline(level, color=style.REFERENCE_INK, linewidth=0.9, linestyle="--")
        ax_g.set_ylabel("gain (dB)")
        ax_p.set_ylabel("phase (deg)")
        ax_p.set_xlabel("frequency (Hz)")
        g = m.worst_phase_margin
        if m.crossover_hz is not None and m.worst_phase_margin_deg is not None:
            fc = m.crossover_hz
            ph_fc = float(np.interp(math.log10(fc), np.log10(f), phase))
            ref = ph_fc - m.worst_phase_margin_deg
            for ax in (ax_g, ax_p):
                ax.axvline(fc, color=PM_COLOUR, linewidth=1.0, linestyle=":")
            ax_p.annotate("", xy=(fc, ph_fc), xytext=(fc, ref),
                          arrowprops={"arrowstyle": "<->", "color": PM_COLOUR, "linewidth": 1.4})
            ax_p.plot([fc], [ph_fc], "o", color=PM_COLOUR, markersize=style.MARKER_SIZE_PT, label="crossover")
            ax_p.text(fc * 1.15, (ph_fc + ref) / 2.0, f"PM {m.worst_phase_margin_deg:.1f}°\nfc {fc:.4g} Hz",
                      color=PM_COLOUR, fontsize=style.LEGEND_SIZE_PT, va="center")
            ax_g.plot([fc], [0.0], "o", color=PM_COLOUR, markersize=style.MARKER_SIZE_PT)
        else:
            ax_g.text(0.01, 0.02, f"no crossover: {getattr(g, 'reason', '')}"[:110], transform=ax_g.transAxes,
                      fontsize=style.CAPTION_SIZE_PT, color=style.MUTED_INK)
        pc = m.worst_gain_margin
        if not isinstance(pc, NotFound):
            f180 = pc.freq_hz
            g180 = -pc.gain_margin_db
            for ax in (ax_g, ax_p):
                ax.axvline(f180, color=GM_COLOUR, linewidth=1.0, linestyle=":")
            ax_g.annotate("", xy=(f180, g180), xytext=(f180, 0.0),
                          arrowprops={"arrowstyle": "<->", "color": GM_COLOUR, "linewidth": 1.4})
            ax_g.plot([f180], [g180], "s", color=GM_COLOUR, markersize=style.MARKER_SIZE_PT, label="phase crossover")
            ax_g.text(f180 * 1.15, g180 / 2.0, f"GM {pc.gain_margin_db:.1f} dB\nf180 {f180:.4g} Hz",
                      color=GM_COLOUR, fontsize=style.LEGEND_SIZE_PT, va="center")
        else:
            ax_p.text(0.01, 0.02, "gain margin: no -180° crossing in the band", transform=ax_p.transAxes,
                      fontsize=style.CAPTION_SIZE_PT, color=style.MUTED_INK)
        style.set_title(ax_g, title, subtitle)
        return fig


def margin_map_figure(vin_v: ArrayLike, iout_a: ArrayLike, phase_margin_deg: Sequence[float | None],
                      *, crossover_hz: Sequence[float | None] | None = None,
                      gain_margin_db: Sequence[float | None] | None = None, pm_limit_deg: float = 45.0,
                      title: str = "Phase margin over line and load", subtitle: str = "") -> Figure:
    """Each operating point (input V, output A) coloured by its phase margin and labelled
    with PM, fc and GM; points with PM below ``pm_limit_deg`` (45° rule of thumb, common
    practice) are ringed, points without a crossover drawn hollow."""
    with matplotlib.rc_context(style.matplotlib_rc()):
        x = np.asarray(vin_v, dtype=float)
        y = np.asarray(iout_a, dtype=float)
        pm = np.array([np.nan if v is None else float(v) for v in phase_margin_deg])
        fc = [None] * x.size if crossover_hz is None else list(crossover_hz)
        gm = [None] * x.size if gain_margin_db is None else list(gain_margin_db)
        fig, (ax,) = style.new_figure(1)
        found = np.isfinite(pm)
        sc = ax.scatter(x[found], y[found], c=pm[found], cmap="viridis", s=140, edgecolors=style.INK,
                        linewidths=0.8, vmin=0.0, vmax=max(90.0, float(np.nanmax(pm)) if found.any() else 90.0))
        if (~found).any():
            ax.scatter(x[~found], y[~found], facecolors="none", edgecolors=style.MUTED_INK, s=140, linewidths=1.2,
                       label="no crossover in band")
        low = found & (pm < pm_limit_deg)
        if low.any():
            ax.scatter(x[low], y[low], facecolors="none", edgecolors=style.LIMIT_INK, s=380, linewidths=1.6,
                       label=f"PM < {pm_limit_deg:g}°")
        for k in range(x.size):
            parts = [f"PM {pm[k]:.1f}°" if found[k] else "PM n/a"]
            fc_hz, gm_db = fc[k], gm[k]
            if fc_hz is not None and np.isfinite(fc_hz):
                parts.append(f"fc {fc_hz:.3g} Hz")
            if gm_db is not None and np.isfinite(gm_db):
                parts.append(f"GM {gm_db:.1f} dB")
            ax.annotate("\n".join(parts), (x[k], y[k]), textcoords="offset points", xytext=(12, -4),
                        fontsize=style.CAPTION_SIZE_PT, color=style.INK)
        cbar = fig.colorbar(sc, ax=ax)
        cbar.set_label("phase margin (deg)")
        ax.set_xlabel("input voltage (V)")
        ax.set_ylabel("output current (A)")
        span_x = max(float(np.ptp(x)), 1.0) if x.size else 1.0
        span_y = max(float(np.ptp(y)), 0.1) if y.size else 1.0
        if x.size:
            ax.set_xlim(x.min() - 0.15 * span_x, x.max() + 0.45 * span_x)
            ax.set_ylim(min(0.0, y.min() - 0.1 * span_y), y.max() + 0.2 * span_y)
        if (~found).any() or low.any():
            ax.legend(loc="upper left", frameon=False, fontsize=style.LEGEND_SIZE_PT)
        style.set_title(ax, title, subtitle)
        return fig


# ------------------------------------------------------------------ report entries

def _has_bode(run: RunData) -> bool:
    return not run.array_rows("bode").empty


@register_plot("bode", title="Loop gain (Bode)", order=70, applies=_has_bode)
def _bode_plots(run: RunData) -> list[ReportFigure]:
    out = []
    for _, row in run.array_rows("bode").iterrows():
        raw = row.get("point_seq")
        seq = None if raw is None or pd.isna(raw) else int(raw)
        data = run.load_array("bode", seq)
        meta = dict(data.meta or {})
        h = np.asarray(data["re"]) + 1j * np.asarray(data["im"])
        convention = str(meta.get("phase_convention", "loop"))
        where = f"{meta.get('vin_set_v', '?')} V, {meta.get('iout_set_a', '?')} A"
        tag = meta.get("tag", "")
        fig = bode_figure(data["freq_hz"], h, phase_convention=convention, title=f"Loop gain at {where}",
                          subtitle=f"run {run.run_id}, point {seq} {tag}")
        out.append(ReportFigure(f"bode-{seq}", f"Loop gain at {where} ({tag})",
                                f"Bode plot of T at {where}, injection {meta.get('injection_v', '?')} V peak; "
                                f"stored data are {'-T' if convention == 'inverted' else 'T'}. Crossover and phase "
                                "margin in the first accent colour, phase crossover and gain margin in the second.",
                                fig))
    return out


def _has_margins(run: RunData) -> bool:
    return run.has_columns("phase_margin_deg", "vin_set_v", "iout_set_a")


@register_plot("margin-map", title="Margins over line and load", order=75, applies=_has_margins)
def _margin_map(run: RunData) -> list[ReportFigure]:
    pts = run.points
    if "tag" in pts.columns:
        pts = pts[pts["tag"].isin(("corner", "nominal", "point"))]

    def col(name: str) -> list[float | None]:
        if name not in pts.columns:
            return [None] * len(pts)
        return [None if v != v else float(v) for v in pts[name]]

    fig = margin_map_figure(pts["vin_set_v"], pts["iout_set_a"], col("phase_margin_deg"),
                            crossover_hz=col("crossover_hz"), gain_margin_db=col("gain_margin_db"),
                            subtitle=f"run {run.run_id}")
    return [ReportFigure("margin-map", "Margins over line and load",
                         "Phase margin at each operating point (colour), with crossover and gain margin; "
                         "ringed points are below 45°, hollow ones have no crossover in the measured band.", fig)]
