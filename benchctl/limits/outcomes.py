"""What a check sees of a run (its context and data) and what it concludes (outcomes, the report)."""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field
from datetime import datetime
from typing import Any

import pandas as pd

from .spec import FAIL, NOT_CHECKED, PASS, RATED_CURRENT_PARAMETER, LimitSpec, _is_number


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
