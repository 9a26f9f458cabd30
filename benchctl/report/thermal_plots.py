"""Plots of the temperature procedures: efficiency against load per ambient, rise against load, derating.

The ``*_figure`` functions are pure; importing the module registers the report entries.
"""

from __future__ import annotations

from typing import Any

import numpy as np
from matplotlib.figure import Figure

from . import style
from .registry import ReportFigure, register_plot
from .run_data import RunData


def efficiency_by_ambient_figure(points: Any, *, title: str = "Efficiency against ambient") -> Figure:
    """Efficiency against load, one line per (ambient, line voltage)."""
    fig, (ax,) = style.new_figure(1)
    k = 0
    for (amb, vin), sel in points.groupby(["ambient_set_c", "vin_set_v"]):
        sel = sel.sort_values("iout_set_a")
        ax.plot(sel["iout_set_a"], 100.0 * sel["pout_w"] / sel["pin_w"], "o-", color=style.line_colour(k),
                markersize=4, linewidth=1.0, label=f"{amb:g} °C, {vin:g} V")
        k += 1
    ax.set_xlabel("output current (A)")
    ax.set_ylabel("efficiency (%)")
    style.set_title(ax, title, "each ambient after the chamber soak and the stability criterion")
    style.legend_outside(ax)
    return fig


def rise_figure(points: Any, parts: list[str], *, title: str = "Temperature rise") -> Figure:
    """Each part's rise over the ambient against load, one line per (part, ambient)."""
    fig, (ax,) = style.new_figure(1)
    k = 0
    for amb, sel in points.groupby("ambient_set_c"):
        sel = sel.sort_values("iout_set_a")
        for part in parts:
            ax.plot(sel["iout_set_a"], sel[f"rise_{part}_k"], "o-", color=style.line_colour(k), markersize=4,
                    linewidth=1.0, label=f"{part}, {amb:g} °C")
            k += 1
    ax.set_xlabel("output current (A)")
    ax.set_ylabel("rise over ambient (K)")
    style.set_title(ax, title, "T_part − T_ambient at thermal equilibrium")
    style.legend_outside(ax)
    return fig


def derating_figure(ambient_c: Any, load_a: Any, flags: list[str], limit_c: float, *,
                    title: str = "Derating") -> Figure:
    """Highest load keeping every hot spot under the limit, against ambient; open markers: bounds (flagged)."""
    a, i = np.asarray(ambient_c, float), np.asarray(load_a, float)
    fig, (ax,) = style.new_figure(1)
    found = np.array([f == "" for f in flags])
    ax.plot(a, i, "-", color=style.line_colour(0), linewidth=1.0)
    ax.plot(a[found], i[found], "o", color=style.line_colour(0), markersize=5, label="interpolated")
    if (~found).any():
        ax.plot(a[~found], i[~found], "o", mfc="none", color=style.LIMIT_INK, markersize=6,
                label="limit not reached (a lower bound)")
    ax.set_xlabel("ambient (°C)")
    ax.set_ylabel("highest load (A)")
    style.set_title(ax, title, f"every hot spot at or under {limit_c:g} °C")
    style.legend_outside(ax)
    return fig


@register_plot("thermal-efficiency", title="Efficiency at several ambients", order=67,
               applies=lambda run: run.info.procedure == "thermal_efficiency" and run.has_columns("pin_w", "pout_w"))
def _thermal_efficiency(run: RunData) -> list[ReportFigure]:
    return [ReportFigure("thermal-efficiency", "Efficiency against load at each ambient",
                         "P_out/P_in at each chamber ambient and line voltage, at thermal equilibrium.",
                         efficiency_by_ambient_figure(run.points))]


def _parts(run: RunData) -> list[str]:
    return [c[5:-2] for c in run.points.columns if c.startswith("rise_") and c.endswith("_k") and "_sd_" not in c]


@register_plot("temperature-rise", title="Temperature rise and derating", order=68,
               applies=lambda run: run.info.procedure == "temperature_rise" and bool(_parts(run)))
def _temperature_rise(run: RunData) -> list[ReportFigure]:
    figs = [ReportFigure("temperature-rise", "Temperature rise against load",
                         "Each part's rise over the meter's ambient channel, per chamber ambient.",
                         rise_figure(run.points, _parts(run)))]
    res = run.results
    if res is not None and not res.empty:
        der = res[res["name"] == "derated_load_a"]
        if not der.empty:
            amb = [float((s or {}).get("ambient_set_c", np.nan)) for s in der["scope"]]
            flags = [((d or {}).get("parts", {}).get((d or {}).get("limiting_part"), {}) or {}).get("flag", "")
                     for d in der["details"]]
            loads = [np.nan if v is None else float(v) for v in der["value"]]
            limit = float((der["details"].iloc[0] or {}).get("limit_c", np.nan))
            figs.append(ReportFigure("derating", "Derating curve",
                                     "Highest load at each ambient keeping every hot spot at or under the limit "
                                     "(linear interpolation between the bracketing loads).",
                                     derating_figure(amb, loads, flags, limit)))
    return figs
