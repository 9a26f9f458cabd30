"""Plots of starts, input thresholds and the loss split.

``turn_on_figure``: output and input voltage (and input current) of a start with the 10/90 %
levels, the input edge and the regulation band marked; ``loss_split_figure``: the measured
loss against load with the fixed, linear and quadratic parts of the fit stacked under it;
``threshold_figure``: output voltage against input voltage along the UVLO ramps and trials.
The ``*_figure`` functions are pure; importing the module registers report entries.
"""

from __future__ import annotations

from typing import Any

import numpy as np
from matplotlib.artist import Artist
from matplotlib.figure import Figure
from numpy.typing import ArrayLike

from . import style
from .registry import ReportFigure, register_plot
from .run_data import RunData

MAX_FIGURES = 6


def turn_on_figure(t_s: ArrayLike, vout_v: ArrayLike, vin_v: ArrayLike, metrics: Any, *,
                   iin_a: ArrayLike | None = None, title: str = "Turn-on") -> Figure:
    """A start: output (top), input voltage and current (bottom); ``metrics``: TurnOnMetrics."""
    t = np.asarray(t_s, float) * 1e3
    fig, axes = style.new_figure(2, sharex=True)
    ax, ax2 = axes[0], axes[1]
    ax.plot(t, np.asarray(vout_v, float), color=style.line_colour(0), linewidth=1.0, label="output")
    base, amp = metrics.base_v, metrics.amplitude_v
    for frac in (0.1, 0.9):
        ax.axhline(base + frac * amp, color=style.REFERENCE_INK, linewidth=0.8, linestyle=":")
    ax.axhspan(metrics.top_v - metrics.band_v, metrics.top_v + metrics.band_v, color=style.REFERENCE_INK, alpha=0.12)
    for x in (metrics.t_input_s, metrics.t_low_s, metrics.t_high_s):
        if x is not None:
            ax.axvline(x * 1e3, color=style.LIMIT_INK, linewidth=0.8, linestyle="--")
    ax.set_ylabel("output (V)")
    sub = []
    if metrics.delay_s is not None:
        sub.append(f"delay {metrics.delay_s * 1e3:.3g} ms")
    if metrics.rise_time_s is not None:
        sub.append(f"rise {metrics.rise_time_s * 1e3:.3g} ms")
    sub.append(f"overshoot {metrics.overshoot_pct:.2g} %")
    sub.append("monotonic" if metrics.monotonic else "NOT monotonic")
    style.set_title(ax, title, ", ".join(sub))
    (vin_line,) = ax2.plot(t, np.asarray(vin_v, float), color=style.line_colour(1), linewidth=1.0,
                           label="input voltage (left)")
    ax2.set_ylabel("input voltage (V)", color=style.line_colour(1))
    ax2.set_xlabel("time from the trigger (ms)")
    lines: list[Artist] = [vin_line]
    if iin_a is not None:
        # two y axes: each coloured as its curve, and one key naming which axis each curve reads on
        ax3 = ax2.twinx()
        (iin_line,) = ax3.plot(t, np.asarray(iin_a, float), color=style.line_colour(2), linewidth=0.9,
                               label="input current (right)")
        ax3.set_ylabel("input current (A)", color=style.line_colour(2))
        lines.append(iin_line)
    style.legend_outside(ax2, handles=lines, labels=[str(x.get_label()) for x in lines],
                         anchor_x=1.02 if iin_a is None else 1.16)  # past the right axis' ticks and label
    return fig


def loss_split_figure(iout_a: ArrayLike, ploss_w: ArrayLike, split: Any, *, title: str = "Loss split") -> Figure:
    """Measured loss (markers) over the fit's parts stacked against the load (``split``: LossSplit)."""
    i = np.asarray(iout_a, float)
    grid = np.linspace(0.0, float(np.max(i)) * 1.05, 200)
    parts = split.parts_w(grid)
    fig, (ax,) = style.new_figure(1)
    ax.stackplot(grid, parts["fixed_w"], parts["linear_w"], parts["quadratic_w"],
                 labels=["fixed a", "linear b·I", "quadratic c·I²"],
                 colors=[style.line_colour(0), style.line_colour(1), style.line_colour(2)], alpha=0.35)
    ax.plot(i, np.asarray(ploss_w, float), "o", color=style.INK, markersize=4, label="measured")
    ax.set_xlabel("output current (A)")
    ax.set_ylabel("loss (W)")
    style.set_title(ax, title, f"a = {split.fixed_w:.3g} W, b = {split.linear_w_per_a:.3g} W/A, "
                    f"c = {split.quadratic_w_per_a2:.3g} W/A²")
    style.legend_outside(ax)
    return fig


def threshold_figure(vin_v: ArrayLike, vout_v: ArrayLike, phases: ArrayLike, on_v: float | None,
                     off_v: float | None, *, title: str = "Input thresholds") -> Figure:
    """Output against input along the ramps and the bisection trials, thresholds marked."""
    v, o, ph = np.asarray(vin_v, float), np.asarray(vout_v, float), np.asarray(phases, str)
    fig, (ax,) = style.new_figure(1)
    for k, name in enumerate(("ramp_up", "ramp_down", "bisect_on", "bisect_off")):
        sel = ph == name
        if sel.any():
            ax.plot(v[sel], o[sel], "o-" if name.startswith("ramp") else "x", color=style.line_colour(k),
                    markersize=4, linewidth=0.8, label=name.replace("_", " "))
    for level in (on_v, off_v):
        if level is not None:
            ax.axvline(level, color=style.LIMIT_INK, linewidth=0.8, linestyle="--")
    ax.set_xlabel("input voltage setpoint (V)")
    ax.set_ylabel("output (V)")
    sub = ", ".join(f"{n} {x:.4g} V" for n, x in (("on", on_v), ("off", off_v)) if x is not None)
    style.set_title(ax, title, sub)
    style.legend_outside(ax)
    return fig


# ---------------------------------------------------------------- registration

def _turn_on_records(run: RunData) -> list[tuple[int | None, dict]]:
    return run.array_records("waveform", "turn_on", MAX_FIGURES)


@register_plot("turn-on", title="Turn-on", order=64, applies=lambda run: bool(_turn_on_records(run)))
def _turn_ons(run: RunData) -> list[ReportFigure]:
    from benchctl.analysis.turn_on import turn_on_metrics

    figs = []
    for seq, meta in _turn_on_records(run):
        a = run.load_array("waveform", seq)
        t_in = meta.get("t_input_s")
        m = turn_on_metrics(a["t_s"], a["vout_v"], t_input_s=t_in, band_v=float(meta.get("band_v") or 0.05),
                            base_before_s=0.0 if t_in is None else min(0.0, t_in))
        what = f"{meta.get('vin_set_v', 0):g} V, {meta.get('load_case', '')} load"
        figs.append(ReportFigure(f"turn-on-{seq}", f"Turn-on at {what}",
                                 "Output from the input's level: 10/90 % reference levels (IEEE 181-2011), "
                                 "regulation band shaded; input voltage and current below (the inrush).",
                                 turn_on_figure(a["t_s"], a["vout_v"], a["vin_v"], m, iin_a=a.columns.get("iin_a"),
                                                title=f"Turn-on, {what}")))
    return figs


def _has_loss_points(run: RunData) -> bool:
    return run.info.procedure == "loss_split" and run.has_columns("pin_w", "pout_w")


@register_plot("loss-split", title="Where the losses go", order=65, applies=_has_loss_points)
def _loss_split(run: RunData) -> list[ReportFigure]:
    from benchctl.analysis.loss_split import fit_loss_split
    from benchctl.errors import AnalysisInputError

    pts = run.points
    fit_rows = pts[pts["tag"] != "check"]
    figs = []
    for vin in sorted(fit_rows["vin_set_v"].unique())[:MAX_FIGURES]:
        sel = fit_rows[fit_rows["vin_set_v"] == vin]
        i = sel["iout_a"].to_numpy(float) if "iout_a" in sel.columns else sel["iout_set_a"].to_numpy(float)
        loss = (sel["pin_w"] - sel["pout_w"]).to_numpy(float)
        try:
            split = fit_loss_split(i, loss, vin_v=float(vin))
        except AnalysisInputError:
            continue
        figs.append(ReportFigure(f"loss-split-{vin:g}V", f"Loss split at {vin:g} V",
                                 "P_in − P_out against load with the fit a + b·I + c·I² stacked by part "
                                 "(unweighted here; the stored results carry the weighted fit).",
                                 loss_split_figure(i, loss, split, title=f"Loss split, {vin:g} V")))
    return figs


@register_plot("input-thresholds", title="Input thresholds", order=66,
               applies=lambda run: run.info.procedure == "input_thresholds" and run.has_columns("vout_v"))
def _thresholds(run: RunData) -> list[ReportFigure]:
    pts = run.points
    steps = pts[pts["tag"].isin(["ramp_up", "ramp_down", "bisect_on", "bisect_off"])]
    found = pts[pts["tag"] == "thresholds"]
    on = float(found["uvlo_on_v"].iloc[-1]) if not found.empty else None
    off = float(found["uvlo_off_v"].iloc[-1]) if not found.empty else None
    return [ReportFigure("input-thresholds", "UVLO on and off",
                         "Output against the input setpoint along the ramps and the bisection trials; dashed: the "
                         "thresholds found.",
                         threshold_figure(steps["vin_set_v"], steps["vout_v"], steps["tag"], on, off))]
