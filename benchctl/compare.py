"""Comparing two runs of the same procedure, operating point by operating point.

Points are matched on their setpoint columns (names containing ``_set_``, e.g.
``vin_set_v``, ``iout_set_a``) and tag, tolerant to small setpoint differences: two
setpoints match when they differ by no more than ``rel_tol``·|value| + ``abs_tol``.
Repeated points at one operating point are averaged first. For each measured quantity
the delta B − A is reported, and flagged when it exceeds the quantity's tolerance.
Derived results with the same name and scope are compared the same way.

One tolerance per quantity, applied to every one of its deltas (:class:`Tolerance`): the
one given (``--tolerance``), else the quantity's default, else 2 % of the median |A| of
its matched values, at least the unit's floor. So a larger change is never let through
while a smaller one of the same quantity is flagged, and the number shown is the number
applied.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from collections.abc import Sequence
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

_POINT_META = {"seq", "t_utc", "settled", "settle_time_s", "settle_info", "settle_reason", "plan_index", "n_readings"}


@dataclass(frozen=True)
class Tolerance:
    """The flag threshold of one quantity (absolute, in its unit) and how it was set:
    ``source`` is ``"given"``, ``"default"`` or ``"relative"``; ``rule`` says it in words."""

    quantity: str
    value: float
    source: str
    rule: str


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
    tolerances: Mapping[str, Tolerance] = field(default_factory=dict)

    @property
    def flagged(self) -> tuple[Delta, ...]:
        return tuple(d for d in self.deltas if d.flagged)

    def frame(self) -> pd.DataFrame:
        return pd.DataFrame([{**{"quantity": d.quantity}, **{f"at_{k}": v for k, v in d.where.items()},
                              "a": d.value_a, "b": d.value_b, "delta": d.delta, "delta_rel": d.delta_rel,
                              "tolerance": d.tolerance, "tolerance_rule": self.tolerances[d.quantity].rule
                              if d.quantity in self.tolerances else "", "flagged": d.flagged}
                             for d in self.deltas])


def tolerance_for(quantity: str, value: float, tolerances: Mapping[str, float]) -> float:
    """The flag threshold of a quantity: given explicitly, else 2 % of the value, at least
    the unit's floor (see :data:`ABSOLUTE_FLOORS`)."""
    if quantity in tolerances and tolerances[quantity] > 0:
        return float(tolerances[quantity])
    floor = next((f for suffix, f in ABSOLUTE_FLOORS.items() if quantity.endswith(suffix)), 0.0)
    return max(DEFAULT_REL_TOLERANCE * abs(value), floor)


def _floor(quantity: str) -> float:
    return next((f for suffix, f in ABSOLUTE_FLOORS.items() if quantity.endswith(suffix)), 0.0)


def quantity_tolerance(quantity: str, values_a: Sequence[float], given: Mapping[str, float]) -> Tolerance:
    """The one tolerance of ``quantity`` (module docstring): ``given`` (the user's) first,
    then :data:`DEFAULT_TOLERANCES`, else 2 % of the median |A| of ``values_a``, at least
    the unit's floor (:data:`ABSOLUTE_FLOORS`)."""
    if quantity in given and given[quantity] > 0:
        return Tolerance(quantity, float(given[quantity]), "given", f"±{given[quantity]:.3g} (given)")
    if DEFAULT_TOLERANCES.get(quantity, 0.0) > 0:
        value = DEFAULT_TOLERANCES[quantity]
        return Tolerance(quantity, value, "default", f"±{value:.3g} (default for {quantity})")
    finite = [abs(v) for v in values_a if math.isfinite(v)]
    median = float(np.median(finite)) if finite else 0.0
    floor = _floor(quantity)
    value = max(DEFAULT_REL_TOLERANCE * median, floor)
    rule = f"±{value:.3g} ({100 * DEFAULT_REL_TOLERANCE:g} % of the median |A| {median:.3g}"
    rule += f", at least {floor:g})" if floor else ")"
    return Tolerance(quantity, value, "relative", rule)


def _setpoint_columns(points: pd.DataFrame) -> list[str]:
    return sorted(c for c in points.columns if "_set_" in c)


def _group(points: pd.DataFrame, keys: list[str]) -> pd.DataFrame:
    # the scatter of a point's readings (``*_sd_*``) and their count describe the bench, not the DUT
    numeric = [c for c in points.columns if c not in _POINT_META and c not in keys and c != "tag"
               and "_sd_" not in c and pd.api.types.is_numeric_dtype(points[c])]
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
    pairs: list[tuple[str, Mapping[str, float], float, float]] = []
    keys = sorted(set(_setpoint_columns(points_a)) & set(_setpoint_columns(points_b)))
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
                    pairs.append((q, where, a, b))
                break
    pairs.extend(_result_pairs(results_a, results_b))
    deltas, tolerances = deltas_with_tolerances(pairs, tolerances or {})
    return Comparison(run_a, run_b, matched, len(ga) - matched, len(gb) - matched, tuple(deltas), tolerances)


def deltas_with_tolerances(pairs: Sequence[tuple[str, Mapping[str, float], float, float]],
                           given: Mapping[str, float]) -> tuple[list[Delta], dict[str, Tolerance]]:
    """Deltas B − A of ``(quantity, where, a, b)`` pairs, each flagged against its quantity's
    one tolerance (:func:`quantity_tolerance`)."""
    by_q: dict[str, list[float]] = {}
    for q, _w, a, _b in pairs:
        by_q.setdefault(q, []).append(a)
    tolerances = {q: quantity_tolerance(q, values, given) for q, values in by_q.items()}
    deltas = []
    for q, where, a, b in pairs:
        d = b - a
        t = tolerances[q].value
        deltas.append(Delta(q, dict(where), a, b, d, (d / abs(a)) if a else None, t, abs(d) > t))
    return deltas, tolerances


def _result_pairs(ra: pd.DataFrame | None, rb: pd.DataFrame | None) -> list[tuple[str, dict, float, float]]:
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
    return [(k[0], dict(k[1:]), a[k], b[k]) for k in a if k in b]


# ---------------------------------------------------------------- two revisions
@dataclass(frozen=True)
class RevisionComparison:
    """Two revisions of a part compared procedure by procedure on the mean over their units
    (the latest completed run of each procedure on each unit, :mod:`benchctl.revision_runs`).
    ``by_procedure`` maps a procedure both revisions ran to its :class:`Comparison`
    (``run_a``/``run_b`` 0: means, not runs); ``units_a``/``units_b`` the serials used."""

    part: str
    revision_a: str
    revision_b: str
    units_a: tuple[str, ...]
    units_b: tuple[str, ...]
    by_procedure: Mapping[str, Comparison]
    only_in_a: tuple[str, ...] = ()
    only_in_b: tuple[str, ...] = ()


def _mean_over_units(store: object, run_ids: Sequence[int]) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Points averaged per operating point over the runs, and results per name and scope
    (without ``seq``) averaged over them."""
    frames, results = [], []
    for run_id in run_ids:
        points = store.points(run_id)  # type: ignore[attr-defined]
        keys = _setpoint_columns(points)
        if keys and not points.empty:
            frames.append(_group(points, keys))
        res = store.results(run_id)  # type: ignore[attr-defined]
        for name, value, scope in zip(res["name"], res["value"], res["scope"]):
            if str(name).startswith("limit:") or value != value:
                continue
            scope = {k: v for k, v in (scope if isinstance(scope, dict) else {}).items() if k not in ("seq",)}
            key = tuple(sorted((k, round(float(v), 6)) for k, v in scope.items() if isinstance(v, (int, float))))
            results.append({"name": str(name), "key": key, "value": float(value)})
    if frames:
        allp = pd.concat(frames, ignore_index=True)
        keys = _setpoint_columns(allp)
        numeric = [c for c in allp.columns if c not in keys and c != "tag" and pd.api.types.is_numeric_dtype(allp[c])]
        by = keys + (["tag"] if "tag" in allp.columns else [])
        points = allp.groupby(by, dropna=False)[numeric].mean().reset_index()
    else:
        points = pd.DataFrame()
    if results:
        r = pd.DataFrame(results).groupby(["name", "key"], sort=False)["value"].mean().reset_index()
        res_frame = pd.DataFrame({"name": r["name"], "value": r["value"], "scope": [dict(k) for k in r["key"]]})
    else:
        res_frame = pd.DataFrame(columns=["name", "value", "scope"])
    return points, res_frame


def compare_revisions(store: object, part: str, revision_a: str, revision_b: str, *,
                      tolerances: Mapping[str, float] | None = None, rel_tol: float = 0.01) -> RevisionComparison:
    """Compare revision B of ``part`` with revision A on the means over their units."""
    from benchctl.revision_runs import revision_runs

    ra = revision_runs(store, part, revision_a)
    rb = revision_runs(store, part, revision_b)
    procs_a = list(dict.fromkeys(ra.latest["procedure"]))
    procs_b = list(dict.fromkeys(rb.latest["procedure"]))
    out: dict[str, Comparison] = {}
    for proc in [p for p in procs_b if p in procs_a]:
        pa, res_a = _mean_over_units(store, [int(x) for x in ra.latest.loc[ra.latest["procedure"] == proc, "run_id"]])
        pb, res_b = _mean_over_units(store, [int(x) for x in rb.latest.loc[rb.latest["procedure"] == proc, "run_id"]])
        out[proc] = compare_points(pa, pb, rel_tol=rel_tol, tolerances=tolerances, results_a=res_a, results_b=res_b)
    return RevisionComparison(part, revision_a, revision_b, ra.serials, rb.serials, out,
                              tuple(p for p in procs_a if p not in procs_b), tuple(p for p in procs_b if p not in procs_a))
