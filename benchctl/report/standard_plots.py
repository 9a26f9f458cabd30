"""The plots every report offers, registered with :mod:`benchctl.report.registry`.

Importing this module registers them; later plots (Bode with margins, margin map,
transient and ripple waveforms) register themselves the same way in modules of their own.
"""

from __future__ import annotations

from . import plots
from .registry import ReportFigure, register_plot
from .run_data import RunData

_POWER = ("pin_w", "pout_w")


def _quality_caption(run: RunData, result_name: str) -> str:
    """Caption text on error bars and doubtful points, empty when there are neither."""
    text = ""
    if plots.point_uncertainty(run.results, result_name, run.points).notna().any():
        text += " Error bars: expanded uncertainty U (k = 2, JCGM 100:2008) from the station's instrument accuracy."
    n_bad = int(plots.doubtful_points(run.points).sum())
    if n_bad:
        text += (f" {n_bad} point(s) did not settle or had a setpoint off (hollow, ringed): "
                 "their values are not to be trusted.")
    return text


def _has_load_sweep(run: RunData) -> bool:
    return run.has_columns(*_POWER) and (run.has_columns("iout_a") or run.has_columns("iout_set_a"))


@register_plot("efficiency-vs-load", title="Efficiency against load", order=10, applies=_has_load_sweep)
def _efficiency(run: RunData) -> list[ReportFigure]:
    fig = plots.efficiency_vs_load(run.points, limits=run.limits, run_id=run.run_id, results=run.results)
    return [ReportFigure("efficiency-vs-load", "Efficiency against load",
                         "Efficiency Pout/Pin against measured output current, one curve per line voltage; "
                         "no-load points are left out (efficiency is undefined at zero output)."
                         + _quality_caption(run, "efficiency"), fig)]


@register_plot("loss-vs-load", title="Loss against load", order=20, applies=_has_load_sweep)
def _loss(run: RunData) -> list[ReportFigure]:
    fig = plots.loss_vs_load(run.points, limits=run.limits, run_id=run.run_id, results=run.results)
    return [ReportFigure("loss-vs-load", "Loss against load",
                         "Power dissipated in the converter, Pin − Pout, against output current."
                         + _quality_caption(run, "loss_w"), fig)]


def _has_vout_load(run: RunData) -> bool:
    return run.has_columns("vout_v") and (run.has_columns("iout_a") or run.has_columns("iout_set_a"))


@register_plot("vout-vs-load", title="Output voltage against load", order=30, applies=_has_vout_load)
def _vout_load(run: RunData) -> list[ReportFigure]:
    fig = plots.vout_vs_load(run.points, limits=run.limits, vout_nom_v=run.float_parameter("vout_nom_v"),
                             run_id=run.run_id, results=run.results)
    return [ReportFigure("vout-vs-load", "Output voltage against load (load regulation)",
                         "Measured output voltage against output current, one curve per line voltage."
                         + _quality_caption(run, "vout_deviation_pct"), fig)]


def _has_vout_line(run: RunData) -> bool:
    return (run.has_columns("vout_v", "iout_set_a") and (run.has_columns("vin_v") or run.has_columns("vin_set_v"))
            and len(plots.line_voltages_v(run.points)) >= 2)


@register_plot("vout-vs-line", title="Output voltage against line", order=40, applies=_has_vout_line)
def _vout_line(run: RunData) -> list[ReportFigure]:
    fig = plots.vout_vs_line(run.points, limits=run.limits, vout_nom_v=run.float_parameter("vout_nom_v"),
                             run_id=run.run_id, results=run.results)
    loads = plots.representative_loads_a(run.points)
    return [ReportFigure("vout-vs-line", "Output voltage against line (line regulation)",
                         "Measured output voltage against measured input voltage at "
                         + ", ".join(f"{a:.3g} A" for a in loads) + "."
                         + _quality_caption(run, "vout_deviation_pct"), fig)]
