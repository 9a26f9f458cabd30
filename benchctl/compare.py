"""Comparing two runs of the same procedure, operating point by operating point.

Points are matched on their setpoint columns (names containing ``_set_``, e.g.
``vin_set_v``, ``iout_set_a``) and tag, tolerant to small setpoint differences: two
setpoints match when they differ by no more than ``rel_tol``·|value| + ``abs_tol``.
Repeated points at one operating point are averaged first. For each measured quantity
the delta B − A is reported, and flagged when it exceeds the quantity's tolerance.
Derived results with the same name and scope are compared the same way.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Mapping

import numpy as np
import pandas as pd

#: Default flag thresholds by quantity (absolute, in the quantity's unit); common practice
#: for a bench characterisation: 0.5 %-point of efficiency, 0.2 % of output voltage ...
DEFAULT_TOLERANCES: dict[str, float] = {
    "efficiency": 0.005,
    "vout_v": 0.002,
    "pin_w": 0.05,
    "loss_w": 0.05,
    "phase_margin_deg": 3.0,
    "gain_margin_db": 1.0,
    "crossover_hz": 0.0,  # relative below
    "line_regulation_pct": 0.02,
    "load_regulation_pct": 0.05,
}
DEFAULT_REL_TOLERANCE = 0.02  # 2 % of the value for quantities not listed ...
#: ... but never less than a bench meter's resolution by unit suffix (common practice), so
#: that noise on a near-zero reading (the output current at no load) is not a "change".
ABSOLUTE_FLOORS = {"_v": 1e-3, "_a": 1e-3, "_w": 10e-3, "_pct": 0.01, "_hz": 1.0, "_deg": 0.5, "_db": 0.2, "_s": 1e-6}

_POINT_META = {"seq", "t_utc", "settled", "settle_time_s", "settle_info", "settle_reason", "plan_index"}


@dataclass(frozen=True)
class Delta:
    quantity: str
    where: Mapping[str, float]
    value_a: float
    value_b: float
    delta: float
    delta_rel: float | None
    tolerance: float
    flagged: bool


@dataclass(frozen=True)
class Comparison:
    """Matched points and results of runs A and B, with the deltas."""

    run_a: int
    run_b: int
    matched_points: int
    only_in_a: int
    only_in_b: int
    deltas: tuple[Delta, ...] = field(default=())

    @property
    def flagged(self) -> tuple[Delta, ...]:
        return tuple(d for d in self.deltas if d.flagged)

    def frame(self) -> pd.DataFrame:
        return pd.DataFrame([{**{"quantity": d.quantity}, **{f"at_{k}": v for k, v in d.where.items()},
                              "a": d.value_a, "b": d.value_b, "delta": d.delta, "delta_rel": d.delta_rel,
                              "tolerance": d.tolerance, "flagged": d.flagged} for d in self.deltas])


def tolerance_for(quantity: str, value: float, tolerances: Mapping[str, float]) -> float:
    """The flag threshold of a quantity: given explicitly, else 2 % of the value, at least
    the unit's floor (see :data:`ABSOLUTE_FLOORS`)."""
    if quantity in tolerances and tolerances[quantity] > 0:
        return float(tolerances[quantity])
    floor = next((f for suffix, f in ABSOLUTE_FLOORS.items() if quantity.endswith(suffix)), 0.0)
    return max(DEFAULT_REL_TOLERANCE * abs(value), floor)


def _setpoint_columns(points: pd.DataFrame) -> list[str]:
    return sorted(c for c in points.columns if "_set_" in c)


def _group(points: pd.DataFrame, keys: list[str]) -> pd.DataFrame:
    numeric = [c for c in points.columns if c not in _POINT_META and c not in keys and c != "tag"
               and pd.api.types.is_numeric_dtype(points[c])]
    by = keys + (["tag"] if "tag" in points.columns else [])
    return points.groupby(by, dropna=False)[numeric].mean().reset_index()


def _close(a: float, b: float, rel_tol: float, abs_tol: float) -> bool:
    return abs(a - b) <= rel_tol * max(abs(a), abs(b)) + abs_tol


def compare_points(
    points_a: pd.DataFrame,
    points_b: pd.DataFrame,
    *,
    run_a: int = 0,
    run_b: int = 0,
    rel_tol: float = 0.01,
    abs_tol: float = 1e-6,
    tolerances: Mapping[str, float] | None = None,
    results_a: pd.DataFrame | None = None,
    results_b: pd.DataFrame | None = None,
) -> Comparison:
    """Match the operating points of two runs and compute per-quantity deltas B − A."""
    tol = {**DEFAULT_TOLERANCES, **(tolerances or {})}
    keys = sorted(set(_setpoint_columns(points_a)) & set(_setpoint_columns(points_b)))
    deltas: list[Delta] = []
    matched = 0
    used_b: set[int] = set()
    ga = _group(points_a, keys) if keys and not points_a.empty else pd.DataFrame()
    gb = _group(points_b, keys) if keys and not points_b.empty else pd.DataFrame()
    if "pout_w" in ga.columns and "pin_w" in ga.columns:
        for g in (ga, gb):
            if not g.empty:
                g["efficiency"] = np.where(g["pin_w"] > 0, g["pout_w"] / g["pin_w"], np.nan)
    for _, row_a in ga.iterrows():
        for j, row_b in gb.iterrows():
            if j in used_b:
                continue
            if ("tag" in ga.columns and "tag" in gb.columns) and row_a["tag"] != row_b["tag"]:
                continue
            if all(_close(float(row_a[k]), float(row_b[k]), rel_tol, abs_tol) for k in keys):
                used_b.add(j)
                matched += 1
                where = {k: float(row_a[k]) for k in keys}
                for q in ga.columns:
                    if q in keys or q == "tag" or q not in gb.columns:
                        continue
                    a, b = float(row_a[q]), float(row_b[q])
                    if math.isnan(a) or math.isnan(b):
                        continue
                    if q == "efficiency" and where.get("iout_set_a", 1.0) == 0.0:
                        continue  # no efficiency at no load
                    deltas.append(_delta(q, where, a, b, tol))
                break
    deltas.extend(_compare_results(results_a, results_b, tol))
    return Comparison(run_a, run_b, matched, len(ga) - matched, len(gb) - matched, tuple(deltas))


def _delta(q: str, where: Mapping[str, float], a: float, b: float, tol: Mapping[str, float]) -> Delta:
    d = b - a
    t = tolerance_for(q, a, tol)
    return Delta(q, dict(where), a, b, d, (d / abs(a)) if a else None, t, abs(d) > t)


def _compare_results(ra: pd.DataFrame | None, rb: pd.DataFrame | None, tol: Mapping[str, float]) -> list[Delta]:
    """Results that are not per point (their scope has no ``seq``), matched by name and scope."""
    if ra is None or rb is None or ra.empty or rb.empty:
        return []

    def keyed(frame: pd.DataFrame) -> dict[tuple, float]:
        out: dict[tuple, float] = {}
        for name, value, scope in zip(frame["name"], frame["value"], frame["scope"]):
            scope = scope if isinstance(scope, dict) else {}
            if "seq" in scope or str(name).startswith("limit:") or value != value:
                continue
            key = (str(name),) + tuple(sorted((k, round(float(v), 6)) for k, v in scope.items()
                                               if isinstance(v, (int, float))))
            out[key] = float(value)
        return out

    a, b = keyed(ra), keyed(rb)
    return [_delta(k[0], dict(k[1:]), a[k], b[k], tol) for k in a if k in b]
