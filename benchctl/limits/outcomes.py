"""What a check sees of a run (its context and data) and what it concludes (outcomes, the report)."""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field
from datetime import datetime
from typing import Any

import pandas as pd

from .spec import BORDERLINE, FAIL, NOT_CHECKED, PASS, RATED_CURRENT_PARAMETER, SUSPECT, LimitSpec, _is_number


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


def run_data_from_store(store: Any, run_id: int) -> RunData:
    """What a limit evaluation sees of a stored run (provenance, points, results, units)."""
    info = store.run(run_id)
    context = RunContext(
        run_id=run_id, procedure=info.procedure, status=info.status, parameters=dict(info.parameters or {}),
        station=info.station_name, dut_part=info.dut_part, dut_revision=info.dut_revision,
        dut_serial=info.dut_serial, host=info.host, started_utc=info.started_utc, ended_utc=info.ended_utc,
    )
    return RunData(context=context, points=store.points(run_id), results=store.results(run_id),
                   units=store.quantity_units(run_id))


# ---------------------------------------------------------------- outcomes
@dataclass(frozen=True)
class CheckedValue:
    """One value that did not pass a limit (``value`` None: absent, ``note`` says why).

    ``status`` is that value's own verdict (``fail``, ``borderline``, ``suspect``, or
    ``not_checked`` when a guarded rule found no uncertainty); ``uncertainty`` its
    expanded uncertainty U (k = 2) when stored; ``flags`` the quality flags it carries.
    """

    value: float | None
    margin: float | None
    scope: Mapping[str, Any]
    note: str = ""
    status: str = FAIL
    uncertainty: float | None = None
    flags: tuple[str, ...] = ()

    def to_dict(self) -> dict[str, Any]:
        return {"value": self.value, "margin": self.margin, "scope": dict(self.scope), "note": self.note,
                "status": self.status, "uncertainty": self.uncertainty, "flags": list(self.flags)}


@dataclass(frozen=True)
class LimitOutcome:
    """The outcome of one limit on one run.

    ``passed`` is True (every value passes), False (a value fails) or None when the limit
    is not decided: not checked, borderline or suspect (``verdict`` says which, ``reason``
    why).
    ``margin`` is the worst value's signed distance to its nearest bound in ``unit``
    (>= 0 inside); ``margin_rel`` = margin / |bound| (None when the bound is 0).
    ``bound`` names the bound the margin is taken to (``"min"``/``"max"``).
    ``n_values`` counts the finite values checked, ``n_missing`` the absent ones
    among the matching values. ``failing`` lists the values outside, in stored order;
    ``doubtful`` the values that are borderline, suspect or lack the uncertainty a guarded
    rule needs. ``uncertainty`` is the worst value's expanded uncertainty U (k = 2), None
    when not stored. ``n_not_exist`` counts values of a quantity that does not exist there
    (``not_exist`` flag; counted as unbounded when the result says which way).
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
    verdict: str = ""
    uncertainty: float | None = None
    doubtful: tuple[CheckedValue, ...] = ()
    n_not_exist: int = 0

    @property
    def status(self) -> str:
        """``pass``, ``fail``, ``borderline``, ``suspect`` or ``not_checked``."""
        if self.verdict:
            return self.verdict
        return NOT_CHECKED if self.passed is None else PASS if self.passed else FAIL

    @property
    def decided(self) -> bool:
        """True when the limit passed or failed (not borderline, suspect or not checked)."""
        return self.passed is not None

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready form (stored with the run as a result's details, printed by --json)."""
        return {
            "limit": self.limit.to_dict(), "where": self.where, "status": self.status,
            "passed": self.passed, "reason": self.reason, "source": self.source, "unit": self.unit,
            "n_values": self.n_values, "n_missing": self.n_missing,
            "worst_value": self.worst_value, "worst_scope": dict(self.worst_scope),
            "bound": self.bound, "bound_value": self.bound_value,
            "margin": self.margin, "margin_rel": self.margin_rel,
            "decision": self.limit.decision, "uncertainty": self.uncertainty, "n_not_exist": self.n_not_exist,
            "failing": [f.to_dict() for f in self.failing],
            "doubtful": [f.to_dict() for f in self.doubtful],
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
            "n_borderline": self.count(BORDERLINE), "n_suspect": self.count(SUSPECT),
            "outcomes": [o.to_dict() for o in self.outcomes],
        }
