"""Plots of a revision summary: the units side by side.

* efficiency against load of every unit, a colour per line voltage and a marker per unit;
* the spread of each limited figure at its tightest operating point (smallest Ppk):
  every unit's value against the limit's bounds, the mean ± 3 s shaded;
* the loop margins of every unit at each measured operating point against their minimums.

Pure: frames in, :class:`matplotlib.figure.Figure` out (the store is read by
:mod:`benchctl.report.revision_data`).
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from typing import TYPE_CHECKING, Any

import matplotlib
import numpy as np
import pandas as pd
from matplotlib.figure import Figure

from . import style

if TYPE_CHECKING:
    from benchctl.limits import LimitsFile

UNIT_MARKERS = ("o", "s", "^", "D", "v", "P", "X", "*", "<", ">")
MAX_SPREAD_ROWS = 8


def _marker(k: int) -> str:
    return UNIT_MARKERS[k % len(UNIT_MARKERS)]


def efficiency_by_unit(points_by_serial: Mapping[str, pd.DataFrame], *, title: str) -> Figure:
    """Efficiency Pout/Pin (%) against output current, every unit; no-load points left out."""
    with matplotlib.rc_context(style.matplotlib_rc()):
        fig, (ax,) = style.new_figure()
        vins = sorted({float(v) for p in points_by_serial.values() if "vin_set_v" in p for v in p["vin_set_v"].dropna()})
        for k, (serial, pts) in enumerate(points_by_serial.items()):
            if not {"pin_w", "pout_w", "vin_set_v"} <= set(pts.columns):
                continue
            x_col = "iout_a" if "iout_a" in pts.columns else "iout_set_a"
            for i, vin in enumerate(vins):
                sel = pts[(pts["vin_set_v"] == vin) & (pts["pin_w"] > 0) & (pts.get("iout_set_a", pts[x_col]) > 0)]
                sel = sel.sort_values(x_col)
                if sel.empty:
                    continue
                eff = 100.0 * sel["pout_w"] / sel["pin_w"]
                ax.plot(sel[x_col], eff, color=style.line_colour(i), marker=_marker(k), markersize=5, linewidth=1.2,
                        alpha=0.9, label=f"{vin:g} V, {serial}")
        ax.set_xlabel("output current (A)")
        ax.set_ylabel("efficiency (%)")
        style.set_title(ax, "Efficiency of every unit", title)
        style.legend_outside(ax, "line, unit")
    return fig


def spread_chart(statistics: pd.DataFrame, per_serial: pd.DataFrame, *, title: str) -> Figure | None:
    """Each limit's tightest point: units' values (markers), bounds (lines), mean ± 3 s (band).
    None when there is nothing to draw."""
    if statistics.empty:
        return None
    rows = []
    for limit, grp in statistics[statistics["limit"] != ""].groupby("limit", sort=False):
        key = grp["ppk"].fillna(np.inf)
        rows.append(grp.iloc[int(key.to_numpy().argmin())])  # the first smallest Ppk
    rows = rows[:MAX_SPREAD_ROWS]
    if not rows:
        return None
    serials = list(dict.fromkeys(per_serial["serial"]))
    with matplotlib.rc_context(style.matplotlib_rc()):
        fig, axes = style.new_figure(len(rows), height_in=1.15 * len(rows) + 0.9)
        for ax, row in zip(axes, rows):
            vals = per_serial[(per_serial["limit"] == row["limit"]) & (per_serial["point"] == row["point"])]
            xs = [v for v in vals["value"] if math.isfinite(v)]
            edges = [b for b in (row["lsl"], row["usl"]) if b is not None and math.isfinite(b)] + xs
            if row["sd"] == row["sd"] and row["sd"] is not None and row["mean"] == row["mean"]:
                lo, hi = row["mean"] - 3 * row["sd"], row["mean"] + 3 * row["sd"]
                ax.axvspan(lo, hi, color=style.LINE_COLOURS[0], alpha=0.12, linewidth=0)
                edges += [lo, hi]
            for b in (row["lsl"], row["usl"]):
                if b is not None and math.isfinite(b):
                    ax.axvline(b, color=style.LIMIT_INK, linewidth=1.6)
            for v in vals.itertuples(index=False):
                k = serials.index(v.serial) if v.serial in serials else 0
                ax.plot([v.value], [0.0], linestyle="none", marker=_marker(k), markersize=8,
                        color=style.LIMIT_INK if v.outlier else style.line_colour(k), label=v.serial)
            if edges:
                span = (max(edges) - min(edges)) or abs(max(edges)) or 1.0
                ax.set_xlim(min(edges) - 0.08 * span, max(edges) + 0.08 * span)
            ax.set_yticks([])
            ax.spines["left"].set_visible(False)
            ppk = "—" if not (row["ppk"] == row["ppk"]) else f"{row['ppk']:.3g}"
            ax.set_title(f"{row['limit']} · {row['point']} · Ppk {ppk}", loc="left", fontsize=style.CAPTION_SIZE_PT,
                         color=style.INK)
        axes[-1].set_xlabel("value (stored unit)")
        handles, labels = axes[0].get_legend_handles_labels()
        seen = dict(zip(labels, handles))
        if seen:
            style.legend_outside(axes[0], "unit", list(seen.values()), list(seen.keys()))
        fig.suptitle(f"Spread across units at each limit's tightest point — {title}", x=0.01, ha="left",
                     fontsize=style.TITLE_SIZE_PT, fontweight="bold", color=style.INK)
    return fig


def margins_by_unit(results_by_serial: Mapping[str, pd.DataFrame], *, phase_min_deg: float | None = None,
                    gain_min_db: float | None = None, title: str) -> Figure | None:
    """Phase and gain margin of every unit at each operating point (x: the points)."""
    names = (("phase_margin_deg", "phase margin (°)", phase_min_deg), ("gain_margin_db", "gain margin (dB)", gain_min_db))
    points: list[str] = []
    data: dict[str, dict[str, dict[str, float]]] = {}
    for serial, res in results_by_serial.items():
        if res.empty:
            continue
        for name, _label, _lim in names:
            sel = res[res["name"] == name]
            for stored_scope, value in zip(sel["scope"], sel["value"]):
                scope: dict[str, Any] = stored_scope if isinstance(stored_scope, dict) else {}
                label = " ".join(f"{scope[k]:g} {u}" for k, u in (("vin_set_v", "V"), ("iout_set_a", "A")) if k in scope)
                if label not in points:
                    points.append(label)
                data.setdefault(name, {}).setdefault(serial, {})[label] = float(value)
    if not points:
        return None
    with matplotlib.rc_context(style.matplotlib_rc()):
        fig, axes = style.new_figure(2, height_in=5.6, sharex=True)
        x = np.arange(len(points))
        serials = list(results_by_serial)
        for ax, (name, label, lim) in zip(axes, names):
            width = 0.7 / max(1, len(serials))
            for k, serial in enumerate(serials):
                vals = data.get(name, {}).get(serial, {})
                y = np.array([vals.get(p, np.nan) for p in points])
                ax.plot(x + (k - (len(serials) - 1) / 2) * width, y, linestyle="none", marker=_marker(k),
                        markersize=7, color=style.line_colour(k), label=serial)
            if lim is not None:
                ax.axhline(lim, color=style.LIMIT_INK, linewidth=1.4, label=f"minimum {lim:g}")
            ax.set_ylabel(label)
        axes[-1].set_xticks(x, points, rotation=20, ha="right")
        style.set_title(axes[0], "Loop margins of every unit", title)
        style.legend_outside(axes[0], "unit")
    return fig


def first_bound(limits: Sequence[LimitsFile], quantity: str) -> float | None:
    """The largest minimum any limit sets on ``quantity`` (for drawing), None when none."""
    mins = [s.minimum for lf in limits for s in lf.limits if s.quantity == quantity and s.minimum is not None]
    return max(mins) if mins else None


__all__ = ["efficiency_by_unit", "first_bound", "margins_by_unit", "spread_chart", "trend_figure"]


def trend_figure(frame: pd.DataFrame, quantity: str, point: str) -> Figure:
    """``quantity`` at operating point ``point`` across revisions (x, in order of first run)
    and serials (a marker each), with each revision's mean joined by a line."""
    sel = frame[frame["point"] == point] if point else frame
    revisions = list(dict.fromkeys(sel["revision"]))
    serials = list(dict.fromkeys(sel["serial"]))
    with matplotlib.rc_context(style.matplotlib_rc()):
        fig, (ax,) = style.new_figure()
        x_of = {r: k for k, r in enumerate(revisions)}
        width = 0.5 / max(1, len(serials))
        for k, serial in enumerate(serials):
            s = sel[sel["serial"] == serial]
            xs = [x_of[r] + (k - (len(serials) - 1) / 2) * width for r in s["revision"]]
            ax.plot(xs, s["value"], linestyle="none", marker=_marker(k), markersize=6, color=style.line_colour(k),
                    label=serial or "(no serial)")
        means = [sel.loc[sel["revision"] == r, "value"].mean() for r in revisions]
        ax.plot(range(len(revisions)), means, color=style.MUTED_INK, linewidth=1.4, marker="_", markersize=18,
                label="mean of the units")
        ax.ticklabel_format(axis="y", useOffset=False)
        ax.set_xticks(range(len(revisions)), [f"rev {r}" if r else "(no revision)" for r in revisions])
        ax.set_ylabel(quantity)
        style.set_title(ax, f"{quantity} across revisions", point or "every point")
        style.legend_outside(ax, "unit")
    return fig
