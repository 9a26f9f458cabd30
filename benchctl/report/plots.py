"""One function per plot: DataFrames or arrays in, a :class:`matplotlib.figure.Figure` out.

Pure: no store, no files, no pyplot global state (figures are built with
:class:`matplotlib.figure.Figure` and rendered by the Agg canvas when saved).

Point frames are the store's wide frames (:meth:`benchctl.store.Store.points`): columns
``vin_set_v``, ``iout_set_a``, ``vin_v``, ``pin_w``, ``vout_v``, ``iout_a``, ``pout_w``
and ``tag`` (``ascending`` / ``descending`` load pass). Curves are grouped by the line
setpoint ``vin_set_v`` (or the measured ``vin_v`` rounded to 0.1 V when no setpoint was
stored). Ascending-pass points are filled markers on a solid line, descending-pass
points hollow markers on a dotted line of the same colour.

Efficiency is Pout/Pin and loss Pin - Pout (common practice; see
:mod:`benchctl.analysis.efficiency`); efficiency is shown in percent.

Given the run's results frame (``results=``), the per-point figures are drawn with error
bars of their expanded uncertainty U (k = 2, JCGM 100:2008 6.2.1), taken from the
results of the same point (``scope["seq"]``): ``efficiency``, ``loss_w`` and, for the
output voltage, ``vout_deviation_pct`` (U in % of the nominal voltage). Points that did
not settle or whose setpoints were not verified (``settled`` false) are drawn hollow and
ringed, with a legend entry that counts them.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping, Sequence
import textwrap
from functools import wraps
from typing import Any, ParamSpec

import matplotlib
import numpy as np
import pandas as pd
from matplotlib.artist import Artist
from matplotlib.axes import Axes
from matplotlib.figure import Figure
from matplotlib.lines import Line2D

from benchctl.analysis.efficiency import efficiency, loss_w
from benchctl.analysis.quality import point_flags

from . import style
from .limit_marks import LimitMark

P = ParamSpec("P")

ASCENDING = "ascending"
DESCENDING = "descending"
LEGEND_WRAP_CHARS = 34
MAX_LINE_PLOT_LOADS = 5
"""At most this many load levels are drawn on the output-against-line plot."""

# Sequential ramp for load levels (light = light load), all >= 3:1 against white.
LOAD_RAMP = ("#4f87b5", "#3b6f9c", "#2a5783", "#1b4069", "#0e2a4d")
LOAD_MARKERS = ("o", "s", "^", "v", "P")  # a shape per load level as well, for grey-scale prints


def _styled(fn: Callable[P, Figure]) -> Callable[P, Figure]:
    @wraps(fn)
    def inner(*args: P.args, **kwargs: P.kwargs) -> Figure:
        with matplotlib.rc_context(style.matplotlib_rc()):
            return fn(*args, **kwargs)

    return inner


# ------------------------------------------------------------------ data helpers
def _line_key(points: pd.DataFrame) -> pd.Series:
    if "vin_set_v" in points.columns and points["vin_set_v"].notna().any():
        return points["vin_set_v"].astype(float)
    return points["vin_v"].astype(float).round(1)


def _load_x(points: pd.DataFrame) -> pd.Series:
    if "iout_a" in points.columns and points["iout_a"].notna().any():
        return points["iout_a"].astype(float)
    return points["iout_set_a"].astype(float)


def _line_x(points: pd.DataFrame) -> pd.Series:
    if "vin_v" in points.columns and points["vin_v"].notna().any():
        return points["vin_v"].astype(float)
    return points["vin_set_v"].astype(float)


def _tags(points: pd.DataFrame) -> pd.Series:
    if "tag" not in points.columns:
        return pd.Series([ASCENDING] * len(points), index=points.index)
    return points["tag"].fillna("").astype(str).where(lambda t: t == DESCENDING, ASCENDING)


def line_voltages_v(points: pd.DataFrame) -> list[float]:
    """The distinct line setpoints of a point frame, ascending (V)."""
    if points.empty:
        return []
    return sorted(float(v) for v in _line_key(points).dropna().unique())


def _volts(v: float) -> str:
    return f"{v:g} V"


def _amps(a: float) -> str:
    return f"{a:.3g} A"


def point_uncertainty(results: pd.DataFrame | None, name: str, points: pd.DataFrame, scale: float = 1.0) -> pd.Series:
    """The expanded uncertainty U (k = 2) of result ``name`` at every point (index of
    ``points``), times ``scale``; NaN where none is stored."""
    out = pd.Series(np.nan, index=points.index, dtype=float)
    if (results is None or results.empty or "expanded_uncertainty" not in results.columns
            or "seq" not in points.columns):
        return out
    sel = results[(results["name"] == name) & results["expanded_uncertainty"].notna()]
    by_seq: dict[int, float] = {}
    for _, r in sel.iterrows():
        scope = r.get("scope")
        if isinstance(scope, Mapping) and "seq" in scope:
            by_seq[int(scope["seq"])] = float(r["expanded_uncertainty"]) * scale
    if by_seq:
        out = pd.Series([by_seq.get(int(q), np.nan) for q in points["seq"]], index=points.index, dtype=float)
    return out


def doubtful_points(points: pd.DataFrame) -> pd.Series:
    """True for every point that did not settle or whose setpoints were not verified."""
    if points.empty or "settled" not in points.columns:
        return pd.Series(False, index=points.index, dtype=bool)
    info = points["settle_info"] if "settle_info" in points.columns else pd.Series(None, index=points.index)
    reason = points["settle_reason"] if "settle_reason" in points.columns else pd.Series("", index=points.index)
    return pd.Series([bool(point_flags(s, i, r)[0]) for s, i, r in zip(points["settled"], info, reason)],
                     index=points.index, dtype=bool)


def _mark_doubtful(ax: Axes, points: pd.DataFrame, x: pd.Series, y: pd.Series, colours: Mapping[float, str]) -> int:
    """Draw unsettled/unverified points hollow, ringed; returns how many were drawn."""
    bad = doubtful_points(points) & x.notna() & y.notna()
    if not bad.any():
        return 0
    key = _line_key(points)
    for idx in points.index[bad]:
        colour = colours.get(float(key[idx]), style.MUTED_INK)
        ax.plot([x[idx]], [y[idx]], linestyle="none", marker="o", markersize=style.MARKER_SIZE_PT,
                markerfacecolor=style.BACKGROUND, markeredgecolor=colour, markeredgewidth=1.2, label="_nolegend_",
                zorder=4)
    ax.plot(x[bad].to_numpy(float), y[bad].to_numpy(float), color=style.DOUBTFUL_INK, label="_nolegend_", zorder=5,
            **style.DOUBTFUL_RING)
    return int(bad.sum())


def _quality_handles(n_doubtful: int, has_error_bars: bool) -> tuple[list[Line2D], list[str]]:
    handles: list[Line2D] = []
    labels: list[str] = []
    if has_error_bars:
        handles.append(Line2D([], [], color=style.MUTED_INK, linewidth=style.ERRORBAR_WIDTH_PT, marker="|",
                              markersize=8, linestyle="-"))
        labels.append("error bar: ±U (k = 2)")
    if n_doubtful:
        handles.append(Line2D([], [], color=style.DOUBTFUL_INK, **style.DOUBTFUL_RING))
        labels.append(f"unsettled or unverified ({n_doubtful})")
    return handles, labels


def _pass_legend(ax: Axes, extra_handles: list[Line2D], extra_labels: list[str], has_descending: bool, title: str) -> None:
    drawn, drawn_labels = ax.get_legend_handles_labels()
    handles: list[Artist] = [*drawn, *extra_handles]
    labels: list[str] = [*drawn_labels, *extra_labels]
    if has_descending:
        handles += [
            Line2D([], [], color=style.MUTED_INK, linewidth=style.LINE_WIDTH_PT, markersize=style.MARKER_SIZE_PT,
                   **style.ASCENDING_STYLE),
            Line2D([], [], color=style.MUTED_INK, linewidth=style.LINE_WIDTH_PT, markersize=style.MARKER_SIZE_PT,
                   **style.DESCENDING_STYLE),
        ]
        labels += ["load ascending", "load descending"]
    if handles:
        style.legend_outside(ax, title=title, handles=handles, labels=labels)


def _draw_by_line(
    ax: Axes,
    points: pd.DataFrame,
    x: pd.Series,
    y: pd.Series,
    colours: Mapping[float, str],
    *,
    label_prefix: str = "",
    linestyle: Any = None,
    yerr: pd.Series | None = None,
) -> bool:
    """Draw one curve per line voltage (ascending and descending passes apart), with error
    bars ``yerr`` (same index; NaN: none). Returns True when descending-pass points were drawn."""
    key = _line_key(points)
    tags = _tags(points)
    drew_descending = False
    for vin in sorted(key.dropna().unique()):
        colour = colours[float(vin)]
        for tag, pass_style in ((ASCENDING, style.ASCENDING_STYLE), (DESCENDING, style.DESCENDING_STYLE)):
            sel = (key == vin) & (tags == tag) & x.notna() & y.notna()
            if not sel.any():
                continue
            order = np.argsort(x[sel].to_numpy(float), kind="stable")
            kwargs = pass_style.copy()
            if linestyle is not None:
                kwargs["linestyle"] = linestyle
            label = f"{label_prefix}{_volts(float(vin))}" if tag == ASCENDING else "_nolegend_"
            ax.plot(
                x[sel].to_numpy(float)[order], y[sel].to_numpy(float)[order],
                color=colour, linewidth=style.LINE_WIDTH_PT if tag == ASCENDING else 1.2,
                markersize=style.MARKER_SIZE_PT, markeredgewidth=1.2, label=label, **kwargs,
            )
            if yerr is not None:
                bars = sel & yerr.notna()
                if bars.any():
                    ax.errorbar(x[bars].to_numpy(float), y[bars].to_numpy(float), yerr=yerr[bars].to_numpy(float),
                                fmt="none", ecolor=colour, elinewidth=style.ERRORBAR_WIDTH_PT,
                                capsize=style.ERRORBAR_CAPSIZE_PT, label="_nolegend_")
            drew_descending |= tag == DESCENDING
    return drew_descending


def _colours_for(vins: Sequence[float]) -> dict[float, str]:
    return {v: style.line_colour(i) for i, v in enumerate(sorted(set(vins)))}


def draw_limits(ax: Axes, limits: Sequence[LimitMark], scale_of: Mapping[str, float], unit_text: str) -> int:
    """Draw the min/max of every limit whose quantity is in ``scale_of`` (quantity -> factor
    from the stored unit to the plotted one) as horizontal lines, the failing side lightly
    shaded when the limit applies to every point; one legend entry per limit. Returns the number of lines drawn (0 when no
    limit applies)."""
    drawn = 0
    for mark in limits:
        scale = scale_of.get(mark.quantity)
        if scale is None:
            continue
        bounds = [(b * scale, kind) for b, kind in ((mark.min_value, "min"), (mark.max_value, "max")) if b is not None]
        if not bounds:
            continue
        if len(bounds) == 2:
            text = f"{bounds[0][0]:g} … {bounds[1][0]:g}{unit_text}"
        else:
            text = f"{'≥' if bounds[0][1] == 'min' else '≤'} {bounds[0][0]:g}{unit_text}"
        label = textwrap.fill(f"limit {mark.name}: {text}", LEGEND_WRAP_CHARS, subsequent_indent="  ")
        if mark.where:
            label += "\n" + textwrap.fill(f"where {mark.where}", LEGEND_WRAP_CHARS, initial_indent="  ",
                                          subsequent_indent="  ")
        for k, (level, kind) in enumerate(bounds):
            y0, y1 = ax.get_ylim()
            span = max(y1 - y0, abs(level) * 1e-3, 1e-12)
            lo, hi = min(y0, level - 0.05 * span), max(y1, level + 0.05 * span)
            ax.axhline(level, color=style.LIMIT_INK, linewidth=1.3, linestyle=(0, (6, 2, 1, 2)),
                       label=label if k == 0 else "_nolegend_")
            if mark.where:
                pass  # applies to part of the data only: shading the whole side would mislead
            elif kind == "min":
                ax.axhspan(lo, level, color=style.LIMIT_INK, alpha=style.LIMIT_BAND_ALPHA, linewidth=0)
            else:
                ax.axhspan(level, hi, color=style.LIMIT_INK, alpha=style.LIMIT_BAND_ALPHA, linewidth=0)
            ax.set_ylim(lo, hi)
            drawn += 1
    return drawn


def _subtitle(run_id: int | None, other_run_id: int | None = None) -> str:
    if run_id is None:
        return ""
    return f"run {run_id}" + (f" vs run {other_run_id}" if other_run_id is not None else "")


def _efficiency_pct(points: pd.DataFrame) -> tuple[pd.DataFrame, pd.Series]:
    """Points with output (no-load points dropped: efficiency is undefined there) and η in %."""
    pout = points["pout_w"].astype(float)
    keep = pout > 0
    if "iout_set_a" in points.columns:
        keep &= ~(points["iout_set_a"].astype(float) <= 0)
    kept = points[keep]
    eta = pd.Series(efficiency(kept["pout_w"], kept["pin_w"]) * 100.0, index=kept.index)
    return kept, eta


# ------------------------------------------------------------------ plots
@_styled
def efficiency_vs_load(
    points: pd.DataFrame,
    *,
    limits: Sequence[LimitMark] = (),
    run_id: int | None = None,
    other_points: pd.DataFrame | None = None,
    other_run_id: int | None = None,
    results: pd.DataFrame | None = None,
) -> Figure:
    """Efficiency (%) against output current (A), one curve per line voltage.

    With ``results`` the efficiency's U (k = 2) is drawn as error bars; unsettled or
    unverified points are hollow and ringed.

    ``other_points`` (a second run's point frame) is drawn dashed in the same colours,
    its curves labelled with ``other_run_id``; the first run's curves are then labelled
    with ``run_id``. No-load points are left out (efficiency is undefined at zero output).
    Limits on ``efficiency`` (a fraction) or ``efficiency_pct`` are drawn.
    """
    fig, (ax,) = style.new_figure()
    comparing = other_points is not None
    vins = line_voltages_v(points) + (line_voltages_v(other_points) if other_points is not None else [])
    colours = _colours_for(vins)
    kept, eta = _efficiency_pct(points)
    prefix = f"run {run_id} · " if comparing and run_id is not None else ("this run · " if comparing else "")
    u = point_uncertainty(results, "efficiency", kept, 100.0)
    has_desc = _draw_by_line(ax, kept, _load_x(kept), eta, colours, label_prefix=prefix, yerr=u)
    n_bad = _mark_doubtful(ax, kept, _load_x(kept), eta, colours)
    if other_points is not None:
        o_kept, o_eta = _efficiency_pct(other_points)
        o_prefix = f"run {other_run_id} · " if other_run_id is not None else "other run · "
        has_desc |= _draw_by_line(ax, o_kept, _load_x(o_kept), o_eta, colours, label_prefix=o_prefix,
                                  linestyle=style.COMPARE_LINESTYLE)
    ax.set_xlabel("output current (A)")
    ax.set_ylabel("efficiency (%)")
    ax.set_xlim(left=0)
    draw_limits(ax, limits, {"efficiency": 100.0, "efficiency_pct": 1.0}, " %")
    style.set_title(ax, "Efficiency against load", _subtitle(run_id, other_run_id if comparing else None))
    _pass_legend(ax, *_quality_handles(n_bad, bool(u.notna().any())), has_desc, "line voltage")
    return fig


@_styled
def loss_vs_load(points: pd.DataFrame, *, limits: Sequence[LimitMark] = (), run_id: int | None = None,
                 results: pd.DataFrame | None = None) -> Figure:
    """Power loss Pin - Pout (W) against output current (A), one curve per line voltage.
    Limits on ``loss_w`` are drawn; with ``results`` its U (k = 2) as error bars."""
    fig, (ax,) = style.new_figure()
    colours = _colours_for(line_voltages_v(points))
    loss = pd.Series(loss_w(points["pout_w"], points["pin_w"]), index=points.index)
    u = point_uncertainty(results, "loss_w", points)
    has_desc = _draw_by_line(ax, points, _load_x(points), loss, colours, yerr=u)
    n_bad = _mark_doubtful(ax, points, _load_x(points), loss, colours)
    ax.set_xlabel("output current (A)")
    ax.set_ylabel("loss, Pin − Pout (W)")
    ax.set_xlim(left=0)
    ax.set_ylim(bottom=min(0.0, float(np.nanmin(loss.to_numpy(float))) if loss.notna().any() else 0.0))
    draw_limits(ax, limits, {"loss_w": 1.0}, " W")
    style.set_title(ax, "Loss against load", _subtitle(run_id))
    _pass_legend(ax, *_quality_handles(n_bad, bool(u.notna().any())), has_desc, "line voltage")
    return fig


@_styled
def vout_vs_load(
    points: pd.DataFrame,
    *,
    limits: Sequence[LimitMark] = (),
    vout_nom_v: float | None = None,
    run_id: int | None = None,
    results: pd.DataFrame | None = None,
) -> Figure:
    """Output voltage (V) against output current (A), one curve per line voltage (load
    regulation). ``vout_nom_v`` is drawn as a thin grey reference; limits on ``vout_v``;
    with ``results`` and ``vout_nom_v`` the U of ``vout_deviation_pct`` as error bars (V)."""
    fig, (ax,) = style.new_figure()
    colours = _colours_for(line_voltages_v(points))
    vout = points["vout_v"].astype(float)
    u = point_uncertainty(results, "vout_deviation_pct", points, (vout_nom_v or 0.0) / 100.0)
    has_desc = _draw_by_line(ax, points, _load_x(points), vout, colours, yerr=u if vout_nom_v else None)
    n_bad = _mark_doubtful(ax, points, _load_x(points), vout, colours)
    extra_h, extra_l = _quality_handles(n_bad, bool(vout_nom_v) and bool(u.notna().any()))
    if vout_nom_v is not None:
        ax.axhline(vout_nom_v, color=style.REFERENCE_INK, linewidth=1.0, linestyle=(0, (2, 2)), label="_nolegend_")
        extra_h.append(Line2D([], [], color=style.REFERENCE_INK, linewidth=1.0, linestyle=(0, (2, 2))))
        extra_l.append(f"nominal {vout_nom_v:g} V")
    ax.set_xlabel("output current (A)")
    ax.set_ylabel("output voltage (V)")
    ax.set_xlim(left=0)
    ax.ticklabel_format(axis="y", useOffset=False)
    draw_limits(ax, limits, {"vout_v": 1.0}, " V")
    style.set_title(ax, "Output voltage against load", _subtitle(run_id))
    _pass_legend(ax, extra_h, extra_l, has_desc, "line voltage")
    return fig


def representative_loads_a(points: pd.DataFrame, at_most: int = MAX_LINE_PLOT_LOADS) -> list[float]:
    """Up to ``at_most`` load setpoints spread evenly over the measured ones (always the
    lightest and the heaviest), ascending (A)."""
    if "iout_set_a" not in points.columns:
        return []
    loads = sorted(float(v) for v in points["iout_set_a"].dropna().unique())
    if len(loads) <= at_most:
        return loads
    picks = np.unique(np.round(np.linspace(0, len(loads) - 1, at_most)).astype(int))
    return [loads[k] for k in picks]


@_styled
def vout_vs_line(
    points: pd.DataFrame,
    *,
    limits: Sequence[LimitMark] = (),
    vout_nom_v: float | None = None,
    run_id: int | None = None,
    results: pd.DataFrame | None = None,
) -> Figure:
    """Output voltage (V) against input voltage (V) at up to five load setpoints (line
    regulation), darker for heavier load. Descending-pass points are hollow; unsettled or
    unverified points hollow and ringed; with ``results`` and ``vout_nom_v`` error bars of U."""
    fig, (ax,) = style.new_figure()
    loads = representative_loads_a(points)
    x = _line_x(points)
    y = points["vout_v"].astype(float)
    tags = _tags(points)
    has_desc = False
    u = point_uncertainty(results, "vout_deviation_pct", points, (vout_nom_v or 0.0) / 100.0)
    ramp = LOAD_RAMP[-len(loads):] if loads else ()
    for k, (colour, iout) in enumerate(zip(ramp, loads)):
        for tag, pass_style in ((ASCENDING, style.ASCENDING_STYLE), (DESCENDING, style.DESCENDING_STYLE)):
            sel = (points["iout_set_a"].astype(float) == iout) & (tags == tag) & x.notna() & y.notna()
            if not sel.any():
                continue
            order = np.argsort(x[sel].to_numpy(float), kind="stable")
            kwargs: style.PassStyle = {**pass_style, "marker": LOAD_MARKERS[k % len(LOAD_MARKERS)]}
            ax.plot(x[sel].to_numpy(float)[order], y[sel].to_numpy(float)[order], color=colour,
                    linewidth=style.LINE_WIDTH_PT if tag == ASCENDING else 1.2, markersize=style.MARKER_SIZE_PT,
                    markeredgewidth=1.2, label=_amps(iout) if tag == ASCENDING else "_nolegend_", **kwargs)
            bars = sel & u.notna()
            if vout_nom_v and bars.any():
                ax.errorbar(x[bars].to_numpy(float), y[bars].to_numpy(float), yerr=u[bars].to_numpy(float), fmt="none",
                            ecolor=colour, elinewidth=style.ERRORBAR_WIDTH_PT, capsize=style.ERRORBAR_CAPSIZE_PT,
                            label="_nolegend_")
            has_desc |= tag == DESCENDING
    shown = points["iout_set_a"].astype(float).isin(loads)
    n_bad = _mark_doubtful(ax, points[shown], x[shown], y[shown], {})
    extra_h, extra_l = _quality_handles(n_bad, bool(vout_nom_v) and bool(u[shown].notna().any()))
    if vout_nom_v is not None:
        ax.axhline(vout_nom_v, color=style.REFERENCE_INK, linewidth=1.0, linestyle=(0, (2, 2)), label="_nolegend_")
        extra_h.append(Line2D([], [], color=style.REFERENCE_INK, linewidth=1.0, linestyle=(0, (2, 2))))
        extra_l.append(f"nominal {vout_nom_v:g} V")
    ax.set_xlabel("input voltage (V)")
    ax.set_ylabel("output voltage (V)")
    ax.ticklabel_format(axis="y", useOffset=False)
    draw_limits(ax, limits, {"vout_v": 1.0}, " V")
    style.set_title(ax, "Output voltage against line", _subtitle(run_id))
    _pass_legend(ax, extra_h, extra_l, has_desc, "load setpoint")
    return fig
