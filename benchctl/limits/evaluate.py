"""Evaluating limits against a run's data: matching values, margins, outcomes, exit code."""

from __future__ import annotations

import logging
import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from datetime import datetime
from typing import Any

import numpy as np
import pandas as pd

from benchctl.analysis.quality import CLIPPED, LOWER_BOUND, NOT_EXIST, UPPER_BOUND, point_flags, result_flags
from benchctl.exit_codes import EXIT_FAILED, EXIT_NOT_CHECKED, EXIT_OK, ExitCode
from benchctl.units import unit_from_name

from .outcomes import CheckedValue, CheckReport, LimitOutcome, RunData
from .spec import (
    BORDERLINE, COMPLETED_STATUS, FAIL, FILTER_ABS_TOL, FILTER_REL_TOL, GUARDED, LOAD_PCT, NOT_CHECKED, PASS,
    RATED_CURRENT_PARAMETER, SOURCE_POINT, SOURCE_RESULT, SUSPECT, Filter, LimitsFile, LimitSpec, _num,
)

log = logging.getLogger(__name__)


# ---------------------------------------------------------------- evaluation
@dataclass(frozen=True)
class _Row:
    value: float          # NaN when absent; +/-inf for a quantity that does not exist and is unbounded
    scope: Mapping[str, Any]
    lookup: Mapping[str, Any]   # every key a filter may use
    note: str = ""
    expanded_u: float = math.nan   # U (k = 2) of the value, NaN when none is stored
    flags: tuple[str, ...] = ()    # quality flags of the result and of the point it was measured at
    flag_reasons: str = ""
    not_exist: bool = False


def _point_quality(point: Mapping[str, Any] | None) -> tuple[tuple[str, ...], str]:
    if not point:
        return (), ""
    return point_flags(point.get("settled"), point.get("settle_info"), point.get("settle_reason"))


def _merged(a: tuple[tuple[str, ...], str], b: tuple[tuple[str, ...], str]) -> tuple[tuple[str, ...], str]:
    flags = tuple(dict.fromkeys(a[0] + b[0]))
    reasons = "; ".join(dict.fromkeys(r for r in (a[1], b[1]) if r))
    return flags, reasons


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


def _records(frame: pd.DataFrame) -> list[dict[str, Any]]:
    """The frame's rows as dicts keyed by column name (the store's columns are named by text)."""
    return [{str(k): v for k, v in rec.items()} for rec in frame.to_dict("records")]


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
        by_seq = {int(r["seq"]): r for r in _records(data.points)}
    rows = []
    for _, r in sel.iterrows():
        stored_scope = r.get("scope")
        scope: Mapping[str, Any] = stored_scope if isinstance(stored_scope, Mapping) else {}
        details = r.get("details")
        lookup: dict[str, Any] = {}
        point = None
        seq = scope.get("seq")
        if seq is None and isinstance(details, Mapping):
            seq = details.get("seq")  # results that name their point in details (the loop-gain margins)
        if isinstance(seq, (int, float)) and not isinstance(seq, bool) and int(seq) in by_seq:
            point = by_seq[int(seq)]
            lookup.update(point)
        lookup.update(scope)
        value = _as_float(r.get("value"))
        flags, reasons = _merged(result_flags(details), _point_quality(point))
        not_exist = NOT_EXIST in flags
        note = ""
        if math.isnan(value) and not_exist:
            unbounded = details.get("unbounded") if isinstance(details, Mapping) else None
            if unbounded in ("above", "below"):
                value = math.inf if unbounded == "above" else -math.inf
            note = f"does not exist ({reasons or 'not_exist'})" + (f"; unbounded {unbounded}" if unbounded else "")
        elif math.isnan(value):
            note = "result stored without a value"
            if isinstance(details, Mapping) and details.get("reason"):
                note += f": {details['reason']}"
        rows.append(_Row(value, {k: _plain(v) for k, v in scope.items()}, lookup, note,
                         expanded_u=_as_float(r.get("expanded_uncertainty")),
                         flags=tuple(f for f in flags if f != NOT_EXIST), flag_reasons=reasons, not_exist=not_exist))
    return rows, units[0] if units else ""


def _point_rows(data: RunData, quantity: str) -> tuple[list[_Row], str]:
    frame = data.points
    if frame.empty or quantity not in frame.columns:
        return [], ""
    rows = []
    for rec in _records(frame):
        scope: dict[str, Any] = {}
        if "seq" in rec:
            scope["seq"] = int(rec["seq"])
        for col, v in rec.items():
            if "_set_" in col or col == "tag":
                scope[col] = _plain(v)
        value = _as_float(rec.get(quantity))
        flags, reasons = _point_quality(rec)
        rows.append(_Row(value, scope, rec, "not measured at this point" if math.isnan(value) else "",
                         flags=flags, flag_reasons=reasons))
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


def _extremes(f: Filter, rows: list[Any], rated_a: float | None) -> tuple[float, float] | None:
    """(lowest, highest) of a filter's key over ``rows`` for ``at = "min" | "max" | "extremes"``; else None."""
    if f.at is None:
        return None
    known = [_as_float(_key_value(r, f.key, rated_a)) for r in rows]
    known = [k for k in known if not math.isnan(k)]
    return (min(known), max(known)) if known else None


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
        extremes = _extremes(f, all_rows, rated_a)
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
    nonexistent = [r for r in rows if r.not_exist and not math.isinf(r.value)]  # no direction: not a value
    rows = [r for r in rows if not (r.not_exist and not math.isinf(r.value))]
    finite = [r for r in rows if not math.isnan(r.value)]
    absent = [r for r in rows if math.isnan(r.value)]
    if not finite and (missing_mode == "ignore" or not absent):
        if nonexistent:
            return _not_checked(spec, where, f"{spec.quantity} does not exist at any of the {len(nonexistent)} "
                                             f"matching value(s) ({nonexistent[0].note}), so there is nothing to "
                                             "compare with the limit", unit=unit, source=source)
        return _not_checked(spec, where, f"all {len(rows)} matching {spec.quantity} value(s) are absent "
                                         f"({absent[0].note if absent else 'no values'})",
                            unit=unit, source=source, n_missing=len(absent))

    failing: list[CheckedValue] = []
    doubtful: list[CheckedValue] = []
    # The worst value decides the verdict: the most severe status first, then the smallest
    # margin (less U under guarded acceptance).
    worst: tuple[int, float, float, str, float, _Row] | None = None
    counts = {PASS: 0, FAIL: 0, BORDERLINE: 0, SUSPECT: 0, NOT_CHECKED: 0}
    within_u_simple = 0
    for r in rows:
        if math.isnan(r.value):
            if missing_mode == "fail":
                failing.append(CheckedValue(None, None, r.scope, r.note))
            continue
        status, m, bname, bvalue, note = _judge(spec, r)
        counts[status] += 1
        u = r.expanded_u if math.isfinite(r.expanded_u) else None
        deciding = m - u if (spec.decision == GUARDED and u is not None and math.isfinite(m)) else m
        key = (_SEVERITY.index(status), deciding)
        if worst is None or key < worst[:2]:
            worst = (key[0], deciding, m, bname, bvalue, r)
        if spec.decision != GUARDED and u is not None and math.isfinite(m) and abs(m) < u:
            within_u_simple += 1
        item = CheckedValue(r.value, m, r.scope, note, status=status, uncertainty=u, flags=r.flags)
        if status == FAIL:
            failing.append(item)
        elif status != PASS:
            doubtful.append(item)

    n_missing = len(absent)
    missing_fail = missing_mode == "fail" and n_missing > 0
    if worst is None:  # every matching value absent and missing = "fail"
        return LimitOutcome(
            limit=spec, where=where, n_values=0, worst_value=None, worst_scope=dict(absent[0].scope), margin=None,
            passed=False, reason=f"all {n_missing} matching value(s) absent ({absent[0].note})",
            unit=unit, source=source, n_missing=n_missing, failing=tuple(failing), verdict=FAIL,
            n_not_exist=len(nonexistent),
        )
    _, _, m, bname, bvalue, wrow = worst
    rel = None if bvalue == 0 or not math.isfinite(m) else m / abs(bvalue)
    u_txt = f" {unit}" if unit else ""
    if counts[FAIL] or missing_fail:
        verdict = FAIL
    elif counts[NOT_CHECKED]:
        verdict = NOT_CHECKED
    elif counts[BORDERLINE]:
        verdict = BORDERLINE
    elif counts[SUSPECT]:
        verdict = SUSPECT
    else:
        verdict = PASS
    reasons = []
    if counts[FAIL]:
        side = "below min" if bname == "min" else "above max"
        wnote = next((f.note for f in failing if f.value is not None and f.scope == wrow.scope and f.note), "")
        reasons.append(f"{counts[FAIL]} of {len(finite)} value(s) outside the limit"
                       + (" by more than their U" if spec.decision == GUARDED else "")
                       + f"; worst {_num(wrow.value)} {side} {_num(bvalue)} by {_num(-m)}{u_txt}"
                       + (f" ({wnote})" if wnote else ""))
    if missing_fail:
        reasons.append(f"{n_missing} matching value(s) absent ({absent[0].note})")
    if counts[NOT_CHECKED]:
        reasons.append(f"{counts[NOT_CHECKED]} value(s) have no stored uncertainty, so guarded acceptance cannot "
                       "be applied to them: give the instruments' accuracy in the station file, or use "
                       "decision = \"simple\"")
    if counts[BORDERLINE]:
        first = next(d for d in doubtful if d.status == BORDERLINE)
        reasons.append(f"{counts[BORDERLINE]} value(s) borderline: within their expanded uncertainty U of a bound, "
                       f"so neither proven inside nor outside (guarded acceptance, ILAC-G8:09/2019 4.2.3); "
                       f"e.g. {first.note}")
    if counts[SUSPECT]:
        first = next(d for d in doubtful if d.status == SUSPECT)
        reasons.append(f"{counts[SUSPECT]} value(s) suspect: inside the limit but {first.note}; re-measure them")
    if nonexistent:
        reasons.append(f"{len(nonexistent)} value(s) do not exist and are not compared ({nonexistent[0].note})")
    n_inf = sum(1 for r in finite if math.isinf(r.value))
    if n_inf:
        reasons.append(f"{n_inf} value(s) do not exist and are unbounded, compared as such")
    if verdict == PASS:
        text = f"{len(finite)} value(s) within the limit"
        if spec.decision == GUARDED:
            text += " with their expanded uncertainty (guarded acceptance)"
        reasons.insert(0, text + (f"; {n_missing} absent value(s) ignored" if n_missing else ""))
    if within_u_simple:
        reasons.append(f"simple acceptance: {within_u_simple} value(s) lie within their expanded uncertainty of a "
                       "bound (the value alone decides)")
    passed = True if verdict == PASS else False if verdict == FAIL else None
    return LimitOutcome(
        limit=spec, where=where, n_values=len(finite), worst_value=wrow.value, worst_scope=dict(wrow.scope),
        margin=m, passed=passed, reason="; ".join(reasons), unit=unit, source=source,
        bound=bname, bound_value=bvalue, margin_rel=rel, n_missing=n_missing, failing=tuple(failing),
        verdict=verdict, uncertainty=wrow.expanded_u if math.isfinite(wrow.expanded_u) else None,
        doubtful=tuple(doubtful), n_not_exist=len(nonexistent) + n_inf,
    )


_SEVERITY = (FAIL, NOT_CHECKED, BORDERLINE, SUSPECT, PASS)


def _judge(spec: LimitSpec, row: _Row) -> tuple[str, float, str, float, str]:
    """One value's verdict: (status, margin, bound name, bound value, note).

    Simple acceptance (ILAC-G8:09/2019 4.2.1): inside (margin >= 0) passes. Guarded
    acceptance (4.2.2/4.2.3, guard band w = U): margin >= U passes, margin < -U fails,
    anything between is borderline (the interval value ± U touches or crosses the bound);
    no stored U: not checked. A flagged value never passes on its own number: a lower bound
    above a max (an upper bound below a min) is a definite fail; a lower bound at or above a
    min where the limit has no max (an upper bound under a max, no min) is a pass, the bound
    proving it, when nothing but the bound (and the clipping that made it) is flagged; any
    other flagged value that is not failing is suspect.
    """
    m, bname, bvalue = _margin(spec, row.value)
    guarded = spec.decision == GUARDED
    u = row.expanded_u
    if guarded and not math.isinf(row.value):
        if not math.isfinite(u):
            status, note = NOT_CHECKED, "no uncertainty stored"
        elif m >= u:
            status, note = PASS, ""
        elif m < -u:
            status, note = FAIL, f"outside by more than U = {_num(u)}"
        else:
            status = BORDERLINE
            note = f"{_num(row.value)} ± {_num(u)} (U, k = 2) reaches {bname} {_num(bvalue)}"
    else:
        status, note = (PASS if m >= 0 else FAIL), ""
    if not row.flags:
        return status, m, bname, bvalue, note
    g = u if guarded and math.isfinite(u) else 0.0
    why = ", ".join(row.flags) + (f" ({row.flag_reasons})" if row.flag_reasons else "")
    if LOWER_BOUND in row.flags or UPPER_BOUND in row.flags:
        if LOWER_BOUND in row.flags and spec.maximum is not None and row.value - g > spec.maximum:
            return FAIL, m, "max", spec.maximum, f"a lower bound above the max: {why}"
        if UPPER_BOUND in row.flags and spec.minimum is not None and row.value + g < spec.minimum:
            return FAIL, m, "min", spec.minimum, f"an upper bound below the min: {why}"
        if not [f for f in row.flags if f not in (LOWER_BOUND, UPPER_BOUND, CLIPPED)]:
            # only the bound is in doubt, and it lies on the safe side of the one bound the limit has
            if (LOWER_BOUND in row.flags and spec.maximum is None and spec.minimum is not None
                    and row.value - g >= spec.minimum):
                return PASS, m, "min", spec.minimum, f"the true value is at least {_num(row.value)}, which meets " \
                    f"the min: {why}"
            if (UPPER_BOUND in row.flags and spec.minimum is None and spec.maximum is not None
                    and row.value + g <= spec.maximum):
                return PASS, m, "max", spec.maximum, f"the true value is at most {_num(row.value)}, which meets " \
                    f"the max: {why}"
        return SUSPECT, m, bname, bvalue, f"only a bound is known: {why}"
    if status == FAIL:
        return FAIL, m, bname, bvalue, (note + "; " if note else "") + f"flagged {why}"
    return SUSPECT, m, bname, bvalue, f"flagged {why}"


def exit_code_for(outcomes: Sequence[LimitOutcome], run_status: str) -> ExitCode:
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
    n_bl = sum(o.status == BORDERLINE for o in outcomes)
    n_sus = sum(o.status == SUSPECT for o in outcomes)
    undecided = any(o.limit.required and o.status in (BORDERLINE, SUSPECT) for o in outcomes)
    verdict = {EXIT_OK: "PASSED", EXIT_FAILED: "FAILED",
               EXIT_NOT_CHECKED: "NOT DECIDED" if undecided else "NOT CHECKED"}[code]
    summary = (f"run {data.context.run_id} {verdict}: {n_pass} passed, {n_fail} failed"
               + (f", {n_bl} borderline" if n_bl else "") + (f", {n_sus} suspect" if n_sus else "")
               + f", {n_nc} not checked of {len(outcomes)} limit(s)")
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


# ---------------------------------------------------------------- the values a limit covers
@dataclass(frozen=True)
class CoveredValue:
    """One value a limit covers in a run (its filters hold): ``value`` (NaN when absent,
    ±inf for a quantity that does not exist and is unbounded), ``scope`` (where it was
    found: setpoints, ``seq``), ``expanded_uncertainty`` (U, k = 2, None when not stored)
    and the quality ``flags`` of the result and its point."""

    value: float
    scope: Mapping[str, Any]
    expanded_uncertainty: float | None
    flags: tuple[str, ...]
    not_exist: bool = False


def covered_values(spec: LimitSpec, data: RunData) -> tuple[list[CoveredValue], str, str]:
    """The values of run ``data`` that limit ``spec`` covers, with their unit and source
    (``"result"``/``"point"``), chosen exactly as :func:`evaluate_limit` chooses them; an
    empty list when none (the reason is what :func:`evaluate_limit` says)."""
    rated_a = data.context.rated_current_a
    rows, unit = ([], "") if spec.source == SOURCE_POINT else _result_rows(data, spec.quantity)
    source = SOURCE_RESULT
    if not rows and spec.source != SOURCE_RESULT:
        rows, unit = _point_rows(data, spec.quantity)
        source = SOURCE_POINT
    if not rows:
        return [], unit or unit_from_name(spec.quantity), ""
    all_rows = rows
    for f in spec.where:
        extremes = _extremes(f, all_rows, rated_a)
        rows = [r for r in rows if _matches(f, _key_value(r, f.key, rated_a), extremes)]
    out = [CoveredValue(r.value, dict(r.scope), r.expanded_u if math.isfinite(r.expanded_u) else None, r.flags,
                        r.not_exist) for r in rows]
    return out, unit or unit_from_name(spec.quantity), source
