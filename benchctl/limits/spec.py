"""The limits file: its format (see the package docstring), validation and loading."""

from __future__ import annotations

import hashlib
import math
import tomllib
from dataclasses import dataclass
from pathlib import Path
from typing import Any, TypeGuard

from benchctl.config_file import read_config_text
from benchctl.errors import LimitsFileError
from benchctl.units import unit_from_name
from benchctl.run_status import RunStatus

PASS = "pass"
FAIL = "fail"
NOT_CHECKED = "not_checked"
#: Guarded acceptance: the value is within its expanded uncertainty U of a bound, so it is
#: proven neither inside nor outside (ILAC-G8:09/2019 4.2.3, "conditional" pass or fail).
BORDERLINE = "borderline"
#: The value would pass, but its point did not settle or was not verified, or its result is
#: flagged (clipped, only a bound, outside the band ...): it cannot pass silently.
SUSPECT = "suspect"
STATUSES = (PASS, FAIL, BORDERLINE, SUSPECT, NOT_CHECKED)

#: Decision rules (ILAC-G8:09/2019 4.2, from memory): the value alone (simple acceptance,
#: 4.2.1) or the value with its expanded uncertainty U (guarded acceptance, guard band w = U,
#: 4.2.2/4.2.3).
SIMPLE = "simple"
GUARDED = "guarded"
DECISIONS = (SIMPLE, GUARDED)

SOURCE_RESULT = "result"
SOURCE_POINT = "point"

#: Relative slack of filter comparisons (equality and range ends): setpoints are floats.
FILTER_REL_TOL = 1e-9
FILTER_ABS_TOL = 1e-12

#: Run status whose points cover the whole planned envelope.
COMPLETED_STATUS = RunStatus.COMPLETED

LOAD_PCT = "load_pct"
RATED_CURRENT_PARAMETER = "iout_rated_a"

_TOP_KEYS = {"spec", "limit"}
_SPEC_KEYS = {"name", "description"}
_LIMIT_KEYS = {
    "name", "quantity", "min", "max", "where", "description", "unit", "required", "missing", "source", "procedure",
    "decision",
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
    ``decision`` is the decision rule: ``"simple"`` (the value alone) or ``"guarded"``
    (the value with its expanded uncertainty; see the package docstring).
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
    decision: str = SIMPLE

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
            "decision": self.decision,
        }


@dataclass(frozen=True)
class LimitsFile:
    """A validated limits file. ``sha256`` is that of its text (FIPS 180-4), for provenance."""

    limits: tuple[LimitSpec, ...]
    name: str = ""
    description: str = ""
    path: Path | None = None
    sha256: str = ""


def _is_number(value: Any) -> TypeGuard[float]:
    """True for a finite int or float (not a bool): a number a bound or a value may be."""
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

    decision = item.get("decision", SIMPLE)
    if decision not in DECISIONS:
        problems.append(f"{key}.decision: {decision!r} must be one of {', '.join(repr(c) for c in DECISIONS)} "
                        "(the value alone, or the value with its expanded uncertainty)")

    if len(problems) > before or not isinstance(name, str) or not isinstance(quantity, str):
        return None  # (a name or quantity that is not text was listed among the problems above)
    return LimitSpec(
        index=index, name=name.strip(), quantity=quantity,
        minimum=None if lo is None else float(lo), maximum=None if hi is None else float(hi),
        where=tuple(filters), description=description, unit=unit, required=required,
        missing=missing, source=source, procedures=tuple(p.strip() for p in procedure), decision=decision,
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
