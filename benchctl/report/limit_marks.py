"""Limit-check results as marks to draw on plots and rows to list in the report.

A limit check stores one result per limit, named ``limit:<name>``, whose ``details``
hold the outcome: the limit (quantity, min and/or max, where it applies), the worst
value found and whether it passed. This module reads those results tolerantly: keys
may sit at the top of ``details`` or inside ``details["limit"]`` / ``details["spec"]``;
anything missing becomes ``None`` or ``""``. No ``limit:`` results -> no marks.
"""

from __future__ import annotations

import logging
import math
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

import pandas as pd

log = logging.getLogger(__name__)

LIMIT_PREFIX = "limit:"

_MIN_KEYS = ("min", "minimum", "min_value", "lower", "low")
_MAX_KEYS = ("max", "maximum", "max_value", "upper", "high")
_QUANTITY_KEYS = ("quantity", "column", "result", "of")
_PASSED_KEYS = ("passed", "pass", "ok")
_WORST_KEYS = ("worst_value", "worst")
_UNIT_KEYS = ("unit", "units")


@dataclass(frozen=True)
class LimitMark:
    """One stored limit check.

    ``quantity`` is the name of the bounded quantity as stored (``efficiency`` is a
    fraction 0..1, ``vout_v`` in V). ``min_value`` / ``max_value`` are ``None`` when
    that side is unbounded. ``passed`` is ``None`` when the check could not decide
    (no data where the limit applies, a borderline value under guarded acceptance,
    suspect data); ``note`` then says why and ``status`` which (``pass``, ``fail``,
    ``borderline``, ``suspect``, ``not_checked``). ``where`` is a readable form of the
    scope the limit applies to ("" = every point). ``uncertainty`` is the worst value's
    expanded uncertainty U (k = 2) when stored; ``decision`` the rule (``simple`` /
    ``guarded``).
    """

    name: str
    quantity: str
    min_value: float | None
    max_value: float | None
    unit: str
    where: str
    worst_value: float | None
    passed: bool | None
    note: str
    status: str = ""
    uncertainty: float | None = None
    decision: str = "simple"

    def __post_init__(self) -> None:
        if not self.status:
            object.__setattr__(self, "status", "not_checked" if self.passed is None
                               else "pass" if self.passed else "fail")

    @property
    def bound_text(self) -> str:
        """``≥ 0.86``, ``≤ 5.1``, ``4.9 … 5.1`` (in the stored unit)."""
        u = f" {self.unit}" if self.unit else ""
        if self.min_value is not None and self.max_value is not None:
            return f"{self.min_value:g} … {self.max_value:g}{u}"
        if self.min_value is not None:
            return f"≥ {self.min_value:g}{u}"
        if self.max_value is not None:
            return f"≤ {self.max_value:g}{u}"
        return "no bound stored"


def limit_marks(results: pd.DataFrame) -> tuple[LimitMark, ...]:
    """Every ``limit:<name>`` result of a run's results frame, in recording order."""
    if results is None or results.empty or "name" not in results.columns:
        return ()
    marks: list[LimitMark] = []
    for _, row in results.iterrows():
        name = str(row["name"])
        if not name.startswith(LIMIT_PREFIX):
            continue
        try:
            marks.append(_mark(row))
        except (TypeError, ValueError) as exc:  # a malformed result must not stop the report
            log.warning("limit result %r could not be read (%s); listed without bounds", name, exc)
            marks.append(LimitMark(name[len(LIMIT_PREFIX):], "", None, None, str(row.get("unit", "")), "",
                                   None, None, f"could not be read: {exc}"))
    return tuple(marks)


def _mark(row: pd.Series) -> LimitMark:
    name = str(row["name"])[len(LIMIT_PREFIX):]
    details = row.get("details")
    top: Mapping[str, Any] = details if isinstance(details, Mapping) else {}
    layers = [top]
    for key in ("limit", "spec"):
        inner = top.get(key)
        if isinstance(inner, Mapping):
            layers.append(inner)

    def pick(keys: tuple[str, ...]) -> Any:
        for layer in layers:
            for k in keys:
                if k in layer and layer[k] is not None:
                    return layer[k]
        return None

    quantity = pick(_QUANTITY_KEYS)
    if not isinstance(quantity, str) or not quantity:
        quantity = name
    unit = pick(_UNIT_KEYS)
    if not isinstance(unit, str):
        unit = str(row.get("unit", "") or "")
    worst = pick(_WORST_KEYS)
    if isinstance(worst, Mapping):
        worst = worst.get("value")
    if worst is None:
        value = row.get("value")
        worst = value if value is not None and not _is_nan(value) else None
    note = pick(("reason", "note", "message"))
    status = pick(("status",))
    decision = pick(("decision",))
    return LimitMark(
        name=name,
        quantity=quantity,
        min_value=_number(pick(_MIN_KEYS)),
        max_value=_number(pick(_MAX_KEYS)),
        unit=unit,
        where=_where_text(pick(("where", "scope"))),
        worst_value=_number(worst),
        passed=_passed(pick(_PASSED_KEYS), pick(("outcome", "status", "result_text"))),
        note="" if note is None else str(note),
        status=str(status) if status in _STATUSES else "",
        uncertainty=_number(pick(("uncertainty",))),
        decision=str(decision) if decision in ("simple", "guarded") else "simple",
    )


_STATUSES = ("pass", "fail", "borderline", "suspect", "not_checked")


def _is_nan(x: Any) -> bool:
    return isinstance(x, float) and math.isnan(x)


def _number(x: Any) -> float | None:
    if x is None or isinstance(x, bool):
        return None
    value = float(x)
    return value if math.isfinite(value) else None


def _passed(flag: Any, outcome: Any) -> bool | None:
    if isinstance(flag, bool):
        return flag
    text = str(outcome if flag is None else flag).strip().lower()
    if text in ("pass", "passed", "true", "ok", "1"):
        return True
    if text in ("fail", "failed", "false", "0"):
        return False
    return None


_EVERYWHERE = frozenset({"", "all", "all values", "all points", "every point", "everywhere"})


def _where_text(where: Any) -> str:
    if where is None:
        return ""
    if isinstance(where, str) and where.strip().lower() in _EVERYWHERE:
        return ""
    if isinstance(where, Mapping):
        return ", ".join(f"{k} {_fmt(v)}" if isinstance(v, str) else f"{k} = {_fmt(v)}" for k, v in where.items())
    return str(where)


def _fmt(v: Any) -> str:
    if isinstance(v, float):
        return f"{v:g}"
    if isinstance(v, (list, tuple)):
        return "[" + ", ".join(_fmt(x) for x in v) + "]"
    return str(v)
