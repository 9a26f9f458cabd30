"""Evaluating limits against a run's data: matching values, margins, outcomes, exit code."""

from __future__ import annotations

import logging
import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from datetime import datetime
from typing import Any

import numpy as np

from benchctl.cli import EXIT_FAILED, EXIT_NOT_CHECKED, EXIT_OK
from benchctl.units import unit_from_name

from .outcomes import CheckedValue, CheckReport, LimitOutcome, RunData
from .spec import (
    COMPLETED_STATUS, FAIL, FILTER_ABS_TOL, FILTER_REL_TOL, LOAD_PCT, NOT_CHECKED, PASS, RATED_CURRENT_PARAMETER,
    SOURCE_POINT, SOURCE_RESULT, Filter, LimitsFile, LimitSpec, _num,
)

log = logging.getLogger(__name__)


# ---------------------------------------------------------------- evaluation
@dataclass(frozen=True)
class _Row:
    value: float          # NaN when absent
    scope: Mapping[str, Any]
    lookup: Mapping[str, Any]   # every key a filter may use
    note: str = ""


def _plain(value: Any) -> Any:
    """numpy scalars -> Python, for scopes that go to JSON."""
    if isinstance(value, np.generic):
        return value.item()
    return value


def _as_float(value: Any) -> float:
    if value is None or isinstance(value, (str, bool, np.bool_)):
        return math.nan
    try:
        return float(value)
    except (TypeError, ValueError):
        return math.nan


def _result_rows(data: RunData, quantity: str) -> tuple[list[_Row], str]:
    frame = data.results
    if frame.empty or "name" not in frame.columns:
        return [], ""
    sel = frame[frame["name"] == quantity]
    if sel.empty:
        return [], ""
    units = [u for u in sel["unit"] if isinstance(u, str) and u] if "unit" in sel.columns else []
    by_seq: dict[int, Mapping[str, Any]] = {}
    if not data.points.empty and "seq" in data.points.columns:
        by_seq = {int(r["seq"]): r for r in data.points.to_dict("records")}
    rows = []
    for _, r in sel.iterrows():
        scope = r.get("scope") if isinstance(r.get("scope"), Mapping) else {}
        details = r.get("details")
        lookup: dict[str, Any] = {}
        seq = scope.get("seq")
        if isinstance(seq, (int, float)) and not isinstance(seq, bool) and int(seq) in by_seq:
            lookup.update(by_seq[int(seq)])
        lookup.update(scope)
        value = _as_float(r.get("value"))
        note = ""
        if math.isnan(value):
            note = "result stored without a value"
            if isinstance(details, Mapping) and details.get("reason"):
                note += f": {details['reason']}"
        rows.append(_Row(value, {k: _plain(v) for k, v in scope.items()}, lookup, note))
    return rows, units[0] if units else ""


def _point_rows(data: RunData, quantity: str) -> tuple[list[_Row], str]:
    frame = data.points
    if frame.empty or quantity not in frame.columns:
        return [], ""
    rows = []
    for rec in frame.to_dict("records"):
        scope: dict[str, Any] = {}
        if "seq" in rec:
            scope["seq"] = int(rec["seq"])
        for col, v in rec.items():
            if "_set_" in col or col == "tag":
                scope[col] = _plain(v)
        value = _as_float(rec.get(quantity))
        rows.append(_Row(value, scope, rec, "not measured at this point" if math.isnan(value) else ""))
    return rows, data.units.get(quantity, "")


def _key_value(row: _Row, key: str, rated_a: float | None) -> Any:
    """Value of a filter key for a row (None when the row has none)."""
    if key in row.lookup:
        v = row.lookup[key]
        if isinstance(v, float) and math.isnan(v):
            return None
        return _plain(v)
    if key == LOAD_PCT and rated_a is not None:
        iout = row.lookup.get("iout_set_a")
        iout_f = _as_float(iout)
        if not math.isnan(iout_f):
            return 100.0 * iout_f / rated_a
    return None


def _close(a: float, b: float) -> bool:
    return math.isclose(a, b, rel_tol=FILTER_REL_TOL, abs_tol=FILTER_ABS_TOL)


def _slack(bound: float) -> float:
    return max(abs(bound) * FILTER_REL_TOL, FILTER_ABS_TOL)


def _matches(f: Filter, value: Any, extremes: tuple[float, float] | None) -> bool:
    if value is None:
        return False
    if isinstance(f.equals, (str, bool)):
        if isinstance(f.equals, bool):
            return isinstance(value, (bool, np.bool_)) and bool(value) == f.equals
        return isinstance(value, str) and value == f.equals
    v = _as_float(value)
    if math.isnan(v):
        return False
    if f.at is not None:
        if extremes is None:
            return False
        lo, hi = extremes
        return (f.at in ("min", "extremes") and _close(v, lo)) or (f.at in ("max", "extremes") and _close(v, hi))
    if f.one_of:
        return any(_close(v, c) for c in f.one_of)
    if f.minimum is not None or f.maximum is not None:
        if f.minimum is not None and v < f.minimum - _slack(f.minimum):
            return False
        if f.maximum is not None and v > f.maximum + _slack(f.maximum):
            return False
        return True
    return f.equals is not None and _close(v, float(f.equals))


def _present_values(rows: list[_Row], key: str, rated_a: float | None) -> str:
    seen: list[str] = []
    for r in rows:
        v = _key_value(r, key, rated_a)
        if v is None:
            continue
        text = _num(v) if not isinstance(v, str) else repr(v)
        if text not in seen:
            seen.append(text)
    if not seen:
        return f"none of them has {key!r}"
    shown = ", ".join(seen[:12]) + (" ..." if len(seen) > 12 else "")
    return f"{key} values present: {shown}"


def _not_checked(spec: LimitSpec, where: str, reason: str, *, unit: str = "", source: str = "",
                 n_missing: int = 0) -> LimitOutcome:
    return LimitOutcome(limit=spec, where=where, n_values=0, worst_value=None, worst_scope={}, margin=None,
                        passed=None, reason=reason, unit=unit, source=source, n_missing=n_missing)


def _margin(spec: LimitSpec, value: float) -> tuple[float, str, float]:
    """(margin, bound name, bound value) of one finite value; margin >= 0 inside."""
    candidates = []
    if spec.minimum is not None:
        candidates.append((value - spec.minimum, "min", spec.minimum))
    if spec.maximum is not None:
        candidates.append((spec.maximum - value, "max", spec.maximum))
    return min(candidates, key=lambda c: c[0])


def evaluate_limit(spec: LimitSpec, data: RunData) -> LimitOutcome:
    """Check one limit against a run's values (see the module docstring for the rules)."""
    rated_a = data.context.rated_current_a
    where = spec.where_text(rated_a)

    result_rows, result_unit = ([], "") if spec.source == SOURCE_POINT else _result_rows(data, spec.quantity)
    if result_rows:
        rows, unit, source = result_rows, result_unit, SOURCE_RESULT
    elif spec.source == SOURCE_RESULT:
        names = sorted(set(data.results["name"])) if "name" in data.results.columns else []
        return _not_checked(spec, where, f"run {data.context.run_id} has no result named {spec.quantity!r}; "
                                         f"its results: {', '.join(names) or 'none'}")
    else:
        rows, unit = _point_rows(data, spec.quantity)
        source = SOURCE_POINT
        if not rows:
            names = sorted(set(data.results["name"])) if "name" in data.results.columns else []
            columns = [c for c in data.points.columns if c not in ("seq", "t_utc", "tag", "settled")]
            if spec.source == SOURCE_POINT:
                return _not_checked(spec, where, f"run {data.context.run_id} has no point quantity "
                                                 f"{spec.quantity!r}; its quantities: {', '.join(columns) or 'none'}")
            return _not_checked(
                spec, where,
                f"run {data.context.run_id} has neither a result nor a point quantity named {spec.quantity!r}; "
                f"results: {', '.join(names) or 'none'}; point quantities: {', '.join(columns) or 'none'}",
            )
    if not unit:
        unit = unit_from_name(spec.quantity)
    if spec.unit is not None and unit != spec.unit:
        return _not_checked(spec, where, f"{spec.quantity} is stored in {unit or 'no unit'!r} but the limit is "
                                         f"written in {spec.unit or 'no unit'!r}; convert the bounds to the stored unit",
                            unit=unit, source=source)

    if any(f.key == LOAD_PCT for f in spec.where) and rated_a is None:
        has_own = any(LOAD_PCT in r.lookup for r in rows)
        if not has_own:
            return _not_checked(
                spec, where,
                f"the filter on {LOAD_PCT} needs the run parameter {RATED_CURRENT_PARAMETER} (rated output current), "
                f"which run {data.context.run_id} does not have as a positive number; filter on iout_set_a in amps",
                unit=unit, source=source,
            )

    all_rows = rows
    for f in spec.where:
        extremes = None
        if f.at is not None:
            known = [_as_float(_key_value(r, f.key, rated_a)) for r in all_rows]
            known = [k for k in known if not math.isnan(k)]
            extremes = (min(known), max(known)) if known else None
        kept = [r for r in rows if _matches(f, _key_value(r, f.key, rated_a), extremes)]
        if not kept:
            return _not_checked(
                spec, where,
                f"{len(rows)} {spec.quantity} {source} value(s), none with {f.describe(rated_a)} "
                f"({_present_values(rows, f.key, rated_a)})",
                unit=unit, source=source,
            )
        rows = kept

    missing_mode = spec.missing or ("fail" if source == SOURCE_RESULT else "ignore")
    finite = [r for r in rows if math.isfinite(r.value)]
    absent = [r for r in rows if not math.isfinite(r.value)]
    if not finite and (missing_mode == "ignore" or not absent):
        return _not_checked(spec, where, f"all {len(rows)} matching {spec.quantity} value(s) are absent "
                                         f"({absent[0].note if absent else 'no values'})",
                            unit=unit, source=source, n_missing=len(absent))

    failing: list[CheckedValue] = []
    worst: tuple[float, str, float, _Row] | None = None
    for r in rows:
        if not math.isfinite(r.value):
            if missing_mode == "fail":
                failing.append(CheckedValue(None, None, r.scope, r.note))
            continue
        m, bname, bvalue = _margin(spec, r.value)
        if worst is None or m < worst[0]:
            worst = (m, bname, bvalue, r)
        if m < 0:
            failing.append(CheckedValue(r.value, m, r.scope))

    n_missing = len(absent)
    missing_fail = missing_mode == "fail" and n_missing > 0
    if worst is None:  # every matching value absent and missing = "fail"
        return LimitOutcome(
            limit=spec, where=where, n_values=0, worst_value=None, worst_scope=dict(absent[0].scope), margin=None,
            passed=False, reason=f"all {n_missing} matching value(s) absent ({absent[0].note})",
            unit=unit, source=source, n_missing=n_missing, failing=tuple(failing),
        )
    m, bname, bvalue, wrow = worst
    rel = None if bvalue == 0 else m / abs(bvalue)
    passed = m >= 0 and not missing_fail
    reasons = []
    n_out = sum(1 for f in failing if f.value is not None)
    if n_out:
        side = "below min" if bname == "min" else "above max"
        reasons.append(f"{n_out} of {len(finite)} value(s) outside the limit; worst {_num(wrow.value)} "
                       f"{side} {_num(bvalue)} by {_num(-m)}{' ' + unit if unit else ''}")
    if missing_fail:
        reasons.append(f"{n_missing} matching value(s) absent ({absent[0].note})")
    if passed:
        reasons.append(f"{len(finite)} value(s) within the limit"
                       + (f"; {n_missing} absent value(s) ignored" if n_missing else ""))
    return LimitOutcome(
        limit=spec, where=where, n_values=len(finite), worst_value=wrow.value, worst_scope=dict(wrow.scope),
        margin=m, passed=passed, reason="; ".join(reasons), unit=unit, source=source,
        bound=bname, bound_value=bvalue, margin_rel=rel, n_missing=n_missing, failing=tuple(failing),
    )


def exit_code_for(outcomes: Sequence[LimitOutcome], run_status: str) -> int:
    """The check's exit code (module docstring, "Exit code of a check")."""
    if not outcomes:
        return EXIT_NOT_CHECKED
    required = [o for o in outcomes if o.limit.required]
    if any(o.passed is False for o in required):
        return EXIT_FAILED
    if any(o.passed is None for o in required) or run_status != COMPLETED_STATUS:
        return EXIT_NOT_CHECKED
    return EXIT_OK


def check_limits(limits: LimitsFile, data: RunData, *, checked_utc: datetime | None = None) -> CheckReport:
    """Evaluate every limit that applies to the run's procedure; the report and its exit code."""
    applicable = [s for s in limits.limits if s.applies_to(data.context.procedure)]
    skipped = tuple(s.name for s in limits.limits if not s.applies_to(data.context.procedure))
    outcomes = tuple(evaluate_limit(s, data) for s in applicable)
    code = exit_code_for(outcomes, data.context.status)
    n_pass = sum(o.status == PASS for o in outcomes)
    n_fail = sum(o.status == FAIL for o in outcomes)
    n_nc = sum(o.status == NOT_CHECKED for o in outcomes)
    verdict = {EXIT_OK: "PASSED", EXIT_FAILED: "FAILED", EXIT_NOT_CHECKED: "NOT CHECKED"}[code]
    summary = (f"run {data.context.run_id} {verdict}: {n_pass} passed, {n_fail} failed, {n_nc} not checked"
               f" of {len(outcomes)} limit(s)")
    if skipped:
        summary += f"; {len(skipped)} limit(s) for other procedures"
    if not outcomes:
        summary += f"; no limit of the file applies to procedure {data.context.procedure!r}"
    if data.context.status != COMPLETED_STATUS:
        summary += f"; the run is {data.context.status}, not completed"
    log.info("limit check: %s", summary)
    return CheckReport(
        run_id=data.context.run_id, outcomes=outcomes, passed=code == EXIT_OK, exit_code=code, run=data.context,
        limits_name=limits.name, limits_path=str(limits.path or ""), limits_sha256=limits.sha256,
        not_applicable=skipped, checked_utc=checked_utc, summary=summary,
    )
