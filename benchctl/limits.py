"""Spec limits: load a limits file, validate it, evaluate it against a stored run.

A limits file is TOML, read with the standard library's ``tomllib``; nothing in it is
evaluated as code. Loading validates the whole file and reports every problem with
its key (``limit[2].min: must be a number ...``; limits are numbered from 1 in file
order), so one edit fixes them all. The format::

    [spec]                                   # optional
    name = "FB-48S05 rev B"
    description = "36-75 V telecom-input flyback, 5 V / 5 A"

    [[limit]]
    name = "efficiency at half load and above, 48 V"   # required, unique
    quantity = "efficiency"          # required: a result name or a point quantity (column)
    min = 0.86                       # min and/or max, inclusive, in the quantity's stored unit
    where.vin_set_v = 48.0           # optional filter: only these values are checked
    where.load_pct = { min = 50 }    # load in % of the run parameter iout_rated_a
    description = "spec table 3, line 2"               # optional, free text

    [[limit]]
    name = "load regulation within +/-1 %"
    quantity = "load_regulation_pct"
    min = -1.0
    max = 1.0

    [[limit]]
    name = "phase margin at every corner"
    quantity = "phase_margin_deg"
    min = 45.0
    where.vin_set_v = { at = "extremes" }
    where.iout_set_a = { at = "extremes" }
    procedure = "loop_gain"          # only runs of this procedure (a name or a list)
    unit = "deg"                     # optional: refuse to compare if the stored unit differs
    required = true                  # false: advisory, shown but never fails the check
    missing = "fail"                 # what a value that is absent (NaN) does: "fail" | "ignore"
    source = "result"                # "result" | "point"; default: result if one exists

Values. ``quantity`` names a derived result (``store.results``) when the run has a
result of that name, else a column of the run's points (``store.points``); ``source``
forces one. Results are matched on their ``scope`` (``{"vin_set_v": 48.0,
"iout_set_a": 2.5}``); a key missing from a result's scope is looked up in the point
the scope names by ``seq``. Points are matched on their own columns.

Filters (``where.<key> = ...``), all of which must hold:

* a number: equal within a relative 1e-9 (setpoints round-trip through floats);
* a list of numbers: equal to any of them;
* text or true/false: exactly equal (``where.tag = "ascending"``, ``where.settled = true``);
* ``{ min = a, max = b }`` (one or both): inclusive range, with the same 1e-9 slack;
* ``{ at = "min" | "max" | "extremes" }``: the smallest, the largest, or both values of
  that key among all values of the quantity in the run (``extremes`` on line and on
  load selects the four corners of the envelope).

``load_pct`` is 100 x ``iout_set_a`` / ``iout_rated_a`` (the run parameter) unless the
result scope or the points carry a ``load_pct`` of their own; a run without a positive
``iout_rated_a`` leaves such a limit not checked (filter on ``iout_set_a`` in amps then).

Outcome of one limit. Each checked value has a margin to the limit, in the quantity's
unit, positive inside: ``value - min`` and ``max - value`` (the smaller of the two when
both are given). The worst value is the one with the smallest margin (the first such
in stored order); the relative margin is that margin over ``|bound|`` (None when the
bound is 0). The limit passes when every margin is >= 0. A value that is absent (NaN:
a result stored as "not found", or a point quantity not measured at that point) fails
the limit when ``missing = "fail"``, the default for results, and is skipped when
``missing = "ignore"``, the default for point columns (procedures record different
quantities at different points). A limit with no value left to check is *not checked*,
with the reason.

Exit code of a check (``benchctl check``), in this order:

1. ``EXIT_FAILED`` (1) when a required limit failed - the measured data violate the
   spec, whatever else is missing;
2. ``EXIT_NOT_CHECKED`` (4) when a required limit could not be checked, the run's
   status is not ``completed`` (running, interrupted, tripped, failed: its points are
   not the whole envelope), or no limit of the file applies to the run's procedure;
3. ``EXIT_OK`` (0) otherwise.

Advisory limits (``required = false``) and limits for other procedures never change it.
The method is common practice for spec-limit checks; no published standard is followed.
"""

from __future__ import annotations

import hashlib
import logging
import math
import tomllib
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from datetime import datetime
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from benchctl.cli import EXIT_FAILED, EXIT_NOT_CHECKED, EXIT_OK
from benchctl.errors import LimitsFileError
from benchctl.config_file import read_config_text
from benchctl.units import unit_from_name

log = logging.getLogger(__name__)

PASS = "pass"
FAIL = "fail"
NOT_CHECKED = "not_checked"

SOURCE_RESULT = "result"
SOURCE_POINT = "point"

#: Relative slack of filter comparisons (equality and range ends): setpoints are floats.
FILTER_REL_TOL = 1e-9
FILTER_ABS_TOL = 1e-12

#: Run status whose points cover the whole planned envelope.
COMPLETED_STATUS = "completed"

LOAD_PCT = "load_pct"
RATED_CURRENT_PARAMETER = "iout_rated_a"

_TOP_KEYS = {"spec", "limit"}
_SPEC_KEYS = {"name", "description"}
_LIMIT_KEYS = {
    "name", "quantity", "min", "max", "where", "description", "unit", "required", "missing", "source", "procedure",
}
_RANGE_KEYS = {"min", "max", "at"}
_AT_CHOICES = ("min", "max", "extremes")
_MISSING_CHOICES = ("fail", "ignore")
_SOURCE_CHOICES = (SOURCE_RESULT, SOURCE_POINT)


# ---------------------------------------------------------------- the limits file
@dataclass(frozen=True)
class Filter:
    """One ``where.<key>`` condition. Exactly one form is set: ``equals``, ``one_of``,
    a range (``minimum`` and/or ``maximum``) or ``at`` (``min``/``max``/``extremes``)."""

    key: str
    equals: float | str | bool | None = None
    one_of: tuple[float, ...] = ()
    minimum: float | None = None
    maximum: float | None = None
    at: str | None = None

    def describe(self, rated_current_a: float | None = None) -> str:
        """Plain-English condition, with the key's unit (``vin_set_v = 48 V``)."""
        unit = "%" if self.key == LOAD_PCT else unit_from_name(self.key)
        u = f" {unit}" if unit else ""
        if self.at is not None:
            text = {"min": "at its smallest value", "max": "at its largest value",
                    "extremes": "at its smallest and largest values"}[self.at]
            text = f"{self.key} {text}"
        elif self.one_of:
            text = f"{self.key} in {{{', '.join(_num(v) for v in self.one_of)}}}{u}"
        elif self.minimum is not None or self.maximum is not None:
            if self.minimum is not None and self.maximum is not None:
                text = f"{_num(self.minimum)} <= {self.key} <= {_num(self.maximum)}{u}"
            elif self.minimum is not None:
                text = f"{self.key} >= {_num(self.minimum)}{u}"
            else:
                text = f"{self.key} <= {_num(self.maximum)}{u}"
        elif isinstance(self.equals, str):
            text = f"{self.key} = {self.equals!r}"
        elif isinstance(self.equals, bool):
            text = f"{self.key} = {'true' if self.equals else 'false'}"
        else:
            text = f"{self.key} = {_num(self.equals)}{u}"
        if self.key == LOAD_PCT and rated_current_a is not None:
            text += f" (of {RATED_CURRENT_PARAMETER} = {_num(rated_current_a)} A)"
        return text


@dataclass(frozen=True)
class LimitSpec:
    """One limit of a limits file; ``index`` counts from 1 in file order.

    ``minimum``/``maximum`` are inclusive bounds in the quantity's stored (SI) unit.
    ``missing`` is ``"fail"``, ``"ignore"`` or ``None`` (the default of the source:
    fail for results, ignore for point columns). ``source`` is ``None`` (result if the
    run has one of that name, else point column), ``"result"`` or ``"point"``.
    ``procedures`` empty means the limit applies to runs of every procedure.
    """

    index: int
    name: str
    quantity: str
    minimum: float | None = None
    maximum: float | None = None
    where: tuple[Filter, ...] = ()
    description: str = ""
    unit: str | None = None
    required: bool = True
    missing: str | None = None
    source: str | None = None
    procedures: tuple[str, ...] = ()

    def bounds_text(self, unit: str = "") -> str:
        """``>= 0.86``, ``<= 1 %`` or ``-1 ... 1 %``."""
        u = f" {unit}" if unit else ""
        if self.minimum is not None and self.maximum is not None:
            return f"{_num(self.minimum)} ... {_num(self.maximum)}{u}"
        if self.minimum is not None:
            return f">= {_num(self.minimum)}{u}"
        return f"<= {_num(self.maximum)}{u}"

    def where_text(self, rated_current_a: float | None = None) -> str:
        """The filters in plain English, ``all values`` when there are none."""
        if not self.where:
            return "all values"
        return "; ".join(f.describe(rated_current_a) for f in self.where)

    def applies_to(self, procedure: str) -> bool:
        return not self.procedures or procedure in self.procedures

    def to_dict(self) -> dict[str, Any]:
        return {
            "index": self.index, "name": self.name, "quantity": self.quantity,
            "min": self.minimum, "max": self.maximum, "where": self.where_text(),
            "description": self.description, "unit": self.unit, "required": self.required,
            "missing": self.missing, "source": self.source, "procedures": list(self.procedures),
        }


@dataclass(frozen=True)
class LimitsFile:
    """A validated limits file. ``sha256`` is that of its text (FIPS 180-4), for provenance."""

    limits: tuple[LimitSpec, ...]
    name: str = ""
    description: str = ""
    path: Path | None = None
    sha256: str = ""


def _is_number(value: Any) -> bool:
    return isinstance(value, (int, float)) and not isinstance(value, bool) and math.isfinite(value)


def _num(value: Any) -> str:
    return f"{value:.6g}" if isinstance(value, (int, float)) and not isinstance(value, bool) else str(value)


def _parse_filter(key: str, value: Any, at: str, problems: list[str]) -> Filter | None:
    if not isinstance(key, str) or not key.strip():
        problems.append(f"{at}: a filter key must be a non-empty name of a scope key or point column")
        return None
    if isinstance(value, bool) or isinstance(value, str):
        return Filter(key, equals=value)
    if isinstance(value, (int, float)):
        if not math.isfinite(value):
            problems.append(f"{at}: {value!r} must be a finite number")
            return None
        return Filter(key, equals=float(value))
    if isinstance(value, list):
        if not value or not all(_is_number(v) for v in value):
            problems.append(f"{at}: a list must hold one or more finite numbers, got {value!r}")
            return None
        return Filter(key, one_of=tuple(float(v) for v in value))
    if isinstance(value, dict):
        ok = True
        for extra in sorted(set(value) - _RANGE_KEYS):
            problems.append(f"{at}.{extra}: unknown key; a range takes min and/or max, or at = "
                            f"{' | '.join(repr(c) for c in _AT_CHOICES)}")
            ok = False
        lo, hi, where_at = value.get("min"), value.get("max"), value.get("at")
        if where_at is not None:
            if where_at not in _AT_CHOICES:
                problems.append(f"{at}.at: {where_at!r} must be one of {', '.join(repr(c) for c in _AT_CHOICES)}")
                ok = False
            if lo is not None or hi is not None:
                problems.append(f"{at}: give either at or min/max, not both")
                ok = False
            return Filter(key, at=where_at) if ok else None
        if lo is None and hi is None:
            if ok:
                problems.append(f"{at}: an empty range; give min and/or max, or at = \"extremes\"")
            return None
        for name, bound in (("min", lo), ("max", hi)):
            if bound is not None and not _is_number(bound):
                problems.append(f"{at}.{name}: {bound!r} must be a finite number")
                ok = False
        if ok and lo is not None and hi is not None and lo > hi:
            problems.append(f"{at}: min {lo!r} is above max {hi!r}")
            ok = False
        if not ok:
            return None
        return Filter(key, minimum=None if lo is None else float(lo), maximum=None if hi is None else float(hi))
    problems.append(f"{at}: {value!r} must be a number, a list of numbers, text, true/false, "
                    "or a table { min = ..., max = ... } / { at = \"extremes\" }")
    return None


def _parse_limit(index: int, item: Any, problems: list[str], names: dict[str, int]) -> LimitSpec | None:
    key = f"limit[{index}]"
    if not isinstance(item, dict):
        problems.append(f"{key}: must be a table ([[limit]])")
        return None
    before = len(problems)
    for extra in sorted(set(item) - _LIMIT_KEYS):
        problems.append(f"{key}.{extra}: unknown key; known keys: {', '.join(sorted(_LIMIT_KEYS))}")

    name = item.get("name")
    if not isinstance(name, str) or not name.strip():
        problems.append(f"{key}.name: required, a non-empty string naming the limit")
    elif name.strip() in names:
        problems.append(f"{key}.name: {name.strip()!r} is already the name of limit[{names[name.strip()]}]; "
                        "names must be unique")
    else:
        names[name.strip()] = index

    quantity = item.get("quantity")
    if not isinstance(quantity, str) or not quantity.strip() or quantity != quantity.strip():
        problems.append(f"{key}.quantity: required, the name of a result or point quantity (e.g. \"efficiency\"), "
                        f"got {quantity!r}")

    lo, hi = item.get("min"), item.get("max")
    for bname, bound in (("min", lo), ("max", hi)):
        if bound is not None and not _is_number(bound):
            problems.append(f"{key}.{bname}: must be a finite number, got {bound!r}")
    if lo is None and hi is None:
        problems.append(f"{key}: give min and/or max")
    elif _is_number(lo) and _is_number(hi) and lo > hi:
        problems.append(f"{key}.min: {lo!r} is above max {hi!r}")

    filters: list[Filter] = []
    where = item.get("where", {})
    if not isinstance(where, dict):
        problems.append(f"{key}.where: must be a table of key = condition, e.g. where.vin_set_v = 48.0")
    else:
        for fkey, fvalue in where.items():
            parsed = _parse_filter(fkey, fvalue, f"{key}.where.{fkey}", problems)
            if parsed is not None:
                filters.append(parsed)

    description = item.get("description", "")
    if not isinstance(description, str):
        problems.append(f"{key}.description: must be a string")
    unit = item.get("unit")
    if unit is not None and not isinstance(unit, str):
        problems.append(f"{key}.unit: must be a string such as \"V\" or \"\" (no unit)")
    required = item.get("required", True)
    if not isinstance(required, bool):
        problems.append(f"{key}.required: {required!r} must be true or false")
    missing = item.get("missing")
    if missing is not None and missing not in _MISSING_CHOICES:
        problems.append(f"{key}.missing: {missing!r} must be one of {', '.join(repr(c) for c in _MISSING_CHOICES)}")
    source = item.get("source")
    if source is not None and source not in _SOURCE_CHOICES:
        problems.append(f"{key}.source: {source!r} must be one of {', '.join(repr(c) for c in _SOURCE_CHOICES)}")
    procedure = item.get("procedure", [])
    if isinstance(procedure, str):
        procedure = [procedure]
    if not isinstance(procedure, list) or not all(isinstance(p, str) and p.strip() for p in procedure):
        problems.append(f"{key}.procedure: must be a procedure name or a list of names, got {item.get('procedure')!r}")
        procedure = []

    if len(problems) > before:
        return None
    return LimitSpec(
        index=index, name=name.strip(), quantity=quantity,
        minimum=None if lo is None else float(lo), maximum=None if hi is None else float(hi),
        where=tuple(filters), description=description, unit=unit, required=required,
        missing=missing, source=source, procedures=tuple(p.strip() for p in procedure),
    )


def parse_limits(text: str, *, path: Path | None = None) -> LimitsFile:
    """Validate limits-file TOML text completely; raise LimitsFileError listing every problem."""
    where = str(path) if path else "limits text"
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise LimitsFileError(f"{where}: not valid TOML: {exc}; fix the syntax at that line") from exc

    problems: list[str] = []
    for key in sorted(set(data) - _TOP_KEYS):
        problems.append(f"{key}: unknown top-level key; a limits file has an optional [spec] table "
                        "and [[limit]] tables")
    spec = data.get("spec", {})
    if not isinstance(spec, dict):
        problems.append("spec: must be a table [spec] with name and description")
        spec = {}
    for key in sorted(set(spec) - _SPEC_KEYS):
        problems.append(f"spec.{key}: unknown key; known keys: {', '.join(sorted(_SPEC_KEYS))}")
    for key in _SPEC_KEYS:
        if key in spec and not isinstance(spec[key], str):
            problems.append(f"spec.{key}: must be a string")

    items = data.get("limit")
    limits: list[LimitSpec] = []
    if items is None:
        problems.append("limit: no [[limit]] tables; a limits file needs at least one")
    elif not isinstance(items, list):
        problems.append("limit: must be an array of tables, written [[limit]]")
    else:
        if not items:
            problems.append("limit: no [[limit]] tables; a limits file needs at least one")
        names: dict[str, int] = {}
        for i, item in enumerate(items, start=1):
            parsed = _parse_limit(i, item, problems, names)
            if parsed is not None:
                limits.append(parsed)

    if problems:
        raise LimitsFileError(f"{where}: {len(problems)} problem(s) in the limits file", problems)
    return LimitsFile(
        limits=tuple(limits),
        name=str(spec.get("name", "")),
        description=str(spec.get("description", "")),
        path=path,
        sha256=hashlib.sha256(text.encode("utf-8")).hexdigest(),
    )


def load_limits(path: str | Path) -> LimitsFile:
    """Read and validate a limits file."""
    path = Path(path)
    text = read_config_text(path, "limits file", LimitsFileError, "examples are in procedures/limits/")
    return parse_limits(text, path=path)


# ---------------------------------------------------------------- the run's data
@dataclass(frozen=True)
class RunContext:
    """What a check needs to know about the run besides its values (provenance)."""

    run_id: int
    procedure: str
    status: str
    parameters: Mapping[str, Any] = field(default_factory=dict)
    station: str = ""
    dut_part: str = ""
    dut_revision: str = ""
    dut_serial: str = ""
    host: str = ""
    started_utc: datetime | None = None
    ended_utc: datetime | None = None

    @property
    def rated_current_a(self) -> float | None:
        """The run parameter ``iout_rated_a`` when it is a positive number, else None."""
        value = self.parameters.get(RATED_CURRENT_PARAMETER)
        if _is_number(value) and value > 0:
            return float(value)
        return None

    @property
    def duration_s(self) -> float | None:
        if self.started_utc is None or self.ended_utc is None:
            return None
        return (self.ended_utc - self.started_utc).total_seconds()


@dataclass(frozen=True, eq=False)
class RunData:
    """A run's values as the store gives them: ``points`` (wide, one column per
    quantity), ``results`` (name, value, unit, details, scope) and quantity ``units``."""

    context: RunContext
    points: pd.DataFrame
    results: pd.DataFrame
    units: Mapping[str, str] = field(default_factory=dict)


# ---------------------------------------------------------------- outcomes
@dataclass(frozen=True)
class CheckedValue:
    """One value that failed a limit (``value`` None: absent, ``note`` says why)."""

    value: float | None
    margin: float | None
    scope: Mapping[str, Any]
    note: str = ""


@dataclass(frozen=True)
class LimitOutcome:
    """The outcome of one limit on one run.

    ``passed`` is True, False, or None when not checked (``reason`` says why).
    ``margin`` is the worst value's signed distance to its nearest bound in ``unit``
    (>= 0 inside); ``margin_rel`` = margin / |bound| (None when the bound is 0).
    ``bound`` names the bound the margin is taken to (``"min"``/``"max"``).
    ``n_values`` counts the finite values checked, ``n_missing`` the absent ones
    among the matching values. ``failing`` lists the values outside, in stored order.
    """

    limit: LimitSpec
    where: str
    n_values: int
    worst_value: float | None
    worst_scope: Mapping[str, Any]
    margin: float | None
    passed: bool | None
    reason: str
    unit: str = ""
    source: str = ""
    bound: str = ""
    bound_value: float | None = None
    margin_rel: float | None = None
    n_missing: int = 0
    failing: tuple[CheckedValue, ...] = ()

    @property
    def status(self) -> str:
        """``pass``, ``fail`` or ``not_checked``."""
        return NOT_CHECKED if self.passed is None else PASS if self.passed else FAIL

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready form (stored with the run as a result's details, printed by --json)."""
        return {
            "limit": self.limit.to_dict(), "where": self.where, "status": self.status,
            "passed": self.passed, "reason": self.reason, "source": self.source, "unit": self.unit,
            "n_values": self.n_values, "n_missing": self.n_missing,
            "worst_value": self.worst_value, "worst_scope": dict(self.worst_scope),
            "bound": self.bound, "bound_value": self.bound_value,
            "margin": self.margin, "margin_rel": self.margin_rel,
            "failing": [
                {"value": f.value, "margin": f.margin, "scope": dict(f.scope), "note": f.note}
                for f in self.failing
            ],
        }


@dataclass(frozen=True)
class CheckReport:
    """All outcomes of one limits file on one run, and the check's exit code.

    ``passed`` is True only when ``exit_code`` is ``EXIT_OK``; ``not_applicable`` names
    the limits skipped because they are for other procedures. ``checked_utc`` is when
    the check was made (aware UTC datetime).
    """

    run_id: int
    outcomes: tuple[LimitOutcome, ...]
    passed: bool
    exit_code: int
    run: RunContext
    limits_name: str = ""
    limits_path: str = ""
    limits_sha256: str = ""
    not_applicable: tuple[str, ...] = ()
    checked_utc: datetime | None = None
    summary: str = ""

    def count(self, status: str) -> int:
        return sum(1 for o in self.outcomes if o.status == status)

    def to_dict(self) -> dict[str, Any]:
        return {
            "run_id": self.run_id, "procedure": self.run.procedure, "run_status": self.run.status,
            "passed": self.passed, "exit_code": self.exit_code, "summary": self.summary,
            "limits_name": self.limits_name, "limits_path": self.limits_path,
            "limits_sha256": self.limits_sha256, "not_applicable": list(self.not_applicable),
            "checked_utc": self.checked_utc.isoformat() if self.checked_utc else None,
            "n_passed": self.count(PASS), "n_failed": self.count(FAIL), "n_not_checked": self.count(NOT_CHECKED),
            "outcomes": [o.to_dict() for o in self.outcomes],
        }


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
