"""Plots of the protection procedures: the OCP search, the short circuit and its recovery, the OVP trip.

``ocp_figure``: the output voltage against the load setpoint of every ramp step and
bisection trial, the threshold and its bracket marked; ``short_figure``: the output current
and voltage of a short and of its release against time; ``ovp_figure``: the output voltage
with the feedback opened, the peak and the trip level marked.  The ``*_figure`` functions
are pure; importing the module registers report entries.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

import numpy as np
from matplotlib.figure import Figure

from . import style
from .registry import ReportFigure, register_plot
from .run_data import RunData


def ocp_figure(points: Any, *, threshold_a: float | None, half_width_a: float | None,
               title: str = "Over-current threshold") -> Figure:
    """Output voltage against load setpoint (ramp and bisection), the threshold ± half-width."""
    fig, axes = style.new_figure(1)
    ax = axes[0]
    for k, (tag, label, marker) in enumerate((("ramp", "ramp", "o-"), ("bisect", "bisection trials", "s"))):
        sel = points[points["tag"] == tag] if "tag" in points else points.iloc[0:0]
        if sel.empty:
            continue
        ax.plot(sel["iout_set_a"].to_numpy(float), sel["vout_v"].to_numpy(float), marker,
                color=style.line_colour(k), markersize=4, linewidth=1.0, label=label)
    sub = ""
    if threshold_a is not None and np.isfinite(threshold_a):
        ax.axvline(threshold_a, color=style.REFERENCE_INK, linewidth=0.8, linestyle=":")
        if half_width_a:
            ax.axvspan(threshold_a - half_width_a, threshold_a + half_width_a, color=style.REFERENCE_INK, alpha=0.2)
        sub = f"threshold {threshold_a:.4g} A ± {half_width_a or 0:.2g} A"
    ax.set_xlabel("load setpoint (A)")
    ax.set_ylabel("output voltage (V)")
    style.set_title(ax, title, sub)
    style.legend_outside(ax)
    return fig


def short_figure(records: Sequence[tuple[str, Any, Any, Any]], *, title: str = "Short circuit") -> Figure:
    """Output current and voltage against time; ``records``: (label, t_s, iout_a, vout_v) each."""
    fig, axes = style.new_figure(2, sharex=False)
    for k, (label, t, i, v) in enumerate(records):
        t_ms = np.asarray(t, float) * 1e3
        colour = style.line_colour(k)
        axes[0].plot(t_ms, np.asarray(i, float), color=colour, linewidth=0.8, label=label)
        axes[1].plot(t_ms, np.asarray(v, float), color=colour, linewidth=0.8, label=label)
    axes[0].set_ylabel("output current (A)")
    axes[1].set_ylabel("output voltage (V)")
    axes[1].set_xlabel("time from the load's step (ms)")
    style.set_title(axes[0], title, "the short (load stepped up) and its release (stepped back)")
    style.legend_outside(axes[0])
    return fig


def ovp_figure(t_s: Any, vout_v: Any, *, peak_v: float | None, trip_v: float | None,
               title: str = "Over-voltage protection") -> Figure:
    """Output voltage against time with the feedback opened; peak and trip level marked."""
    fig, axes = style.new_figure(1)
    ax = axes[0]
    t_ms = np.asarray(t_s, float) * 1e3
    ax.plot(t_ms, np.asarray(vout_v, float), color=style.line_colour(0), linewidth=0.8, label="output")
    parts = []
    if peak_v is not None and np.isfinite(peak_v):
        ax.axhline(peak_v, color=style.line_colour(1), linewidth=0.8, linestyle="--", label="peak")
        parts.append(f"peak {peak_v:.4g} V")
    if trip_v is not None and np.isfinite(trip_v):
        ax.axhline(trip_v, color=style.REFERENCE_INK, linewidth=0.8, linestyle=":", label="trip level")
        parts.append(f"trip {trip_v:.4g} V")
    ax.set_xlabel("time from the trigger (ms)")
    ax.set_ylabel("output voltage (V)")
    style.set_title(ax, title, ", ".join(parts))
    style.legend_outside(ax)
    return fig


# ---------------------------------------------------------------- registration

def _waveforms(run: RunData, kind: str) -> list[tuple[int | None, dict]]:
    return run.array_records("waveform", kind)


def _last(run: RunData, column: str) -> float | None:
    if not run.has_columns(column):
        return None
    return float(run.points[column].dropna().iloc[-1])


@register_plot("over-current", title="Over-current threshold", order=69,
               applies=lambda run: run.info.procedure == "over_current" and run.has_columns("iout_set_a", "vout_v"))
def _ocp(run: RunData) -> list[ReportFigure]:
    return [ReportFigure("over-current", "Over-current threshold search",
                         "Output voltage at each load setpoint of the ramp and of the bisection trials; dotted: the "
                         "threshold, shaded: ± half the final bracket.",
                         ocp_figure(run.points, threshold_a=_last(run, "ocp_threshold_a"),
                                    half_width_a=_last(run, "ocp_half_width_a")))]


@register_plot("short-circuit", title="Short circuit", order=69,
               applies=lambda run: bool(_waveforms(run, "short_circuit") or _waveforms(run, "short_recovery")))
def _short(run: RunData) -> list[ReportFigure]:
    records = []
    for kind, label in (("short_circuit", "short"), ("short_recovery", "release")):
        for seq, _ in _waveforms(run, kind)[:1]:
            a = run.load_array("waveform", seq)
            records.append((label, a["t_s"], a["iout_a"], a["vout_v"]))
    return [ReportFigure("short-circuit", "Short circuit and recovery",
                         "Output current and voltage from the load's step into the short (hiccup: on at the current "
                         "limit, off between) and from its release (the next retry, then the soft start).",
                         short_figure(records))]


@register_plot("over-voltage", title="Over-voltage protection", order=69,
               applies=lambda run: bool(_waveforms(run, "over_voltage")))
def _ovp(run: RunData) -> list[ReportFigure]:
    seq, _ = _waveforms(run, "over_voltage")[-1]
    a = run.load_array("waveform", seq)
    return [ReportFigure("over-voltage", "Output with the feedback opened",
                         "The output rising at the converter's current limit until the over-voltage comparator stops "
                         "it and latches; dashed: the peak, dotted: the trip level (the output a data-sheet delay "
                         "before the peak).",
                         ovp_figure(a["t_s"], a["vout_v"], peak_v=_last(run, "ovp_peak_v"),
                                    trip_v=_last(run, "ovp_trip_v")))]
