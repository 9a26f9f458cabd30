"""Plots of the line response and of hold-up: a line step's output, the line rejection against
frequency, and the input and output after an input dropout.

``line_step_figure``, ``line_rejection_figure`` and ``hold_up_figure`` are pure (arrays in, a
matplotlib Figure out); importing the module registers report entries for runs that stored
``waveform`` arrays of kind ``line_transient`` or ``hold_up``, or line-rejection points.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np
from matplotlib.figure import Figure
from numpy.typing import ArrayLike

from . import style
from .registry import ReportFigure, register_plot
from .run_data import RunData

MAX_FIGURES = 6


def _ms(t_s: ArrayLike) -> np.ndarray:
    return np.asarray(t_s, float) * 1e3


def line_step_figure(t_s: ArrayLike, vout_v: ArrayLike, vin_v: ArrayLike, *, band_v: float,
                     title: str = "Line transient") -> Figure:
    """Output (AC, or switching-period averaged) and input against time from the step, with the
    pre-step level and the ±band drawn and the peak marked (:func:`benchctl.analysis.line_response.
    line_step_metrics`)."""
    from benchctl.analysis.line_response import line_step_metrics

    t, v, vi = np.asarray(t_s, float), np.asarray(vout_v, float), np.asarray(vin_v, float)
    m = line_step_metrics(t, v, step_time_s=0.0, band_v=band_v)
    fig, axes = style.new_figure(2, sharex=True, height_in=6.0)
    ax, ax2 = axes[0], axes[1]
    ax.plot(_ms(t), v * 1e3, color=style.line_colour(0), linewidth=1.0, label="output")
    ax.axhline(m.pre_step_v * 1e3, color=style.REFERENCE_INK, linewidth=0.8, linestyle="--", label="before the step")
    ax.axhspan((m.pre_step_v - band_v) * 1e3, (m.pre_step_v + band_v) * 1e3, color=style.LIMIT_INK,
               alpha=style.LIMIT_BAND_ALPHA, label=f"±{band_v * 1e3:.3g} mV band")
    ax.plot([m.peak_after_step_s * 1e3], [(m.pre_step_v + m.peak_deviation_v) * 1e3], "o", color=style.LIMIT_INK,
            markersize=5, label=f"peak {m.peak_deviation_v * 1e3:+.3g} mV")
    if m.recovered and m.recovery_s is not None:
        ax.axvline(m.recovery_s * 1e3, color=style.MUTED_INK, linewidth=0.8, linestyle=":",
                   label=f"back in the band {m.recovery_s * 1e3:.3g} ms")
    ax.set_ylabel("output (mV)")
    style.legend_outside(ax)
    ax2.plot(_ms(t), vi, color=style.line_colour(1), linewidth=1.0, label="DUT input")
    ax2.set_ylabel("input (V)")
    ax2.set_xlabel("time from the step (ms)")
    style.legend_outside(ax2)
    sub = "recovered" if m.recovered else "not back in the band by the end of the record"
    style.set_title(ax, title, sub)
    return fig


def line_rejection_figure(frequency_hz: ArrayLike, rejection_db: ArrayLike, below_noise: ArrayLike,
                          *, title: str = "Line rejection") -> Figure:
    """Line-to-output gain in dB against frequency; a point at the scope's noise is drawn hollow
    (a bound: the true gain is at most that)."""
    f = np.asarray(frequency_hz, float)
    db = np.asarray(rejection_db, float)
    noise = np.asarray(below_noise, bool)
    order = np.argsort(f)
    f, db, noise = f[order], db[order], noise[order]
    fig, axes = style.new_figure(1)
    ax = axes[0]
    colour = style.line_colour(0)
    ax.semilogx(f, db, "-", color=colour, linewidth=1.0)
    ax.semilogx(f[~noise], db[~noise], "o", color=colour, markersize=5, label="measured")
    if noise.any():
        ax.semilogx(f[noise], db[noise], "o", color=style.DOUBTFUL_INK, markerfacecolor="none", markersize=6,
                    label="at the scope's noise (a bound)")
    ax.set_xlabel("frequency (Hz)")
    ax.set_ylabel("output / input ripple (dB)")
    worst = float(np.max(db)) if db.size else math.nan
    style.set_title(ax, title, f"least rejection {-worst:.3g} dB" if math.isfinite(worst) else "")
    style.legend_outside(ax)
    return fig


def hold_up_figure(t_s: ArrayLike, vin_v: ArrayLike, vout_v: ArrayLike, *, dropout_s: float | None,
                   exit_s: float | None, band_v: float, vout_nominal_v: float | None = None,
                   title: str = "Hold-up") -> Figure:
    """Input and output after the dropout, with the dropout and the output leaving the band marked."""
    t = np.asarray(t_s, float)
    fig, axes = style.new_figure(2, sharex=True, height_in=6.0)
    ax, ax2 = axes[0], axes[1]
    vo = np.asarray(vout_v, float)
    ax.plot(_ms(t), vo, color=style.line_colour(0), linewidth=1.0, label="output")
    level = vout_nominal_v if vout_nominal_v is not None else float(np.median(vo[: max(2, vo.size // 20)]))
    ax.axhspan(level - band_v, level + band_v, color=style.LIMIT_INK, alpha=style.LIMIT_BAND_ALPHA,
               label=f"±{band_v:g} V band")
    ax2.plot(_ms(t), np.asarray(vin_v, float), color=style.line_colour(1), linewidth=1.0, label="DUT input")
    for a in (ax, ax2):
        if dropout_s is not None:
            a.axvline(dropout_s * 1e3, color=style.MUTED_INK, linewidth=0.8, linestyle="--", label="dropout")
        if exit_s is not None:
            a.axvline(exit_s * 1e3, color=style.LIMIT_INK, linewidth=0.8, linestyle=":", label="output leaves the band")
    ax.set_ylabel("output (V)")
    ax2.set_ylabel("input (V)")
    ax2.set_xlabel("time (ms)")
    style.legend_outside(ax)
    style.legend_outside(ax2)
    held = (exit_s - dropout_s) if exit_s is not None and dropout_s is not None else None
    style.set_title(ax, title, f"hold-up {held * 1e3:.3g} ms" if held is not None else "the output stayed in band")
    return fig


# ---------------------------------------------------------------- registration

def _records(run: RunData, kind: str) -> list[tuple[int | None, dict[str, Any]]]:
    return run.array_records("waveform", kind, MAX_FIGURES)


@register_plot("line-transient", title="Line transients", order=69,
               applies=lambda run: bool(_records(run, "line_transient")))
def _line_steps(run: RunData) -> list[ReportFigure]:
    figs = []
    for seq, meta in _records(run, "line_transient"):
        a = run.load_array("waveform", seq)
        v = a.columns.get("vout_avg_v")
        what = f"{meta.get('vin_from_v', 0):g} → {meta.get('vin_to_v', 0):g} V at {meta.get('iout_a', 0):g} A"
        figs.append(ReportFigure(
            f"line-transient-{seq}", f"Line step {what}",
            "Output voltage (AC coupled" + (", averaged over one switching period" if v is not None else "")
            + ") and DUT input after a step of the source; peak from the pre-step value, recovery into the band.",
            line_step_figure(a["t_s"], a["vout_ac_v"] if v is None else v, a["vin_v"],
                             band_v=float(meta.get("band_v") or 0.01), title=f"Line step, {what}")))
    return figs


def _has_rejection(run: RunData) -> bool:
    return run.info.procedure == "line_rejection" and run.has_columns("frequency_hz", "rejection_db")


@register_plot("line-rejection", title="Line rejection", order=69, applies=_has_rejection)
def _rejection(run: RunData) -> list[ReportFigure]:
    pts = run.points
    noise = pts["below_noise"].to_numpy(float) > 0 if "below_noise" in pts else np.zeros(len(pts), bool)
    return [ReportFigure("line-rejection", "Line-to-output transfer (input ripple rejection)",
                         "Output ripple over input ripple at each injected frequency, from sine fits of the two "
                         "scope records; hollow: the output was at the scope's noise.",
                         line_rejection_figure(pts["frequency_hz"], pts["rejection_db"], noise))]


@register_plot("hold-up", title="Hold-up", order=66, applies=lambda run: bool(_records(run, "hold_up")))
def _hold_ups(run: RunData) -> list[ReportFigure]:
    figs = []
    for seq, meta in _records(run, "hold_up"):
        a = run.load_array("waveform", seq)
        load = run.points.loc[run.points["seq"] == seq, "iout_set_a"] if seq is not None else None
        what = f"{float(load.iloc[0]):g} A" if load is not None and len(load) else "one load"
        figs.append(ReportFigure(
            f"hold-up-{seq}", f"Hold-up at {what}",
            "DUT input and output after the input dropped out (the fixture's switch opened); dashed: the dropout "
            "from the v² line, dotted: the output leaving the band.",
            hold_up_figure(a["t_s"], a["vin_v"], a["vout_v"], dropout_s=meta.get("dropout_s"),
                           exit_s=meta.get("exit_s"), band_v=float(meta.get("band_v") or 0.25),
                           vout_nominal_v=run.float_parameter("vout_nominal_v"), title=f"Hold-up, {what}")))
    return figs
