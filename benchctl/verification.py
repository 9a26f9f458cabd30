"""Setpoints verified before a point is recorded.

A point is only what it claims to be when the bench is where the procedure put it: the
measured load current and source voltage (an instrument's own read-back, or a meter's
reading) within a tolerance of their setpoints, tol = rel_tol·|setpoint| + abs_tol (the
"% of setting + offset" form instrument data sheets use for programming accuracy; common
practice). A point that fails is still recorded, with ``settled = False`` and the reason.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Mapping


def setpoint_tolerance(setpoint: float, rel_tol: float, abs_tol: float) -> float:
    """rel_tol·|setpoint| + abs_tol, in the setpoint's unit."""
    if rel_tol < 0 or abs_tol < 0:
        raise ValueError(f"tolerances must not be negative (rel_tol={rel_tol!r}, abs_tol={abs_tol!r})")
    return rel_tol * abs(setpoint) + abs_tol


@dataclass(frozen=True)
class SetpointCheck:
    """One setpoint against what was measured."""

    name: str
    setpoint: float
    measured: float
    tol: float

    @property
    def ok(self) -> bool:
        return math.isfinite(self.measured) and abs(self.measured - self.setpoint) <= self.tol

    def as_dict(self) -> dict[str, float]:
        return {"setpoint": float(self.setpoint), "measured": float(self.measured), "tol": float(self.tol)}


@dataclass(frozen=True)
class Verification:
    """All checks of one point; ``reason`` names every check that failed ("" when all passed)."""

    checks: tuple[SetpointCheck, ...]

    @property
    def verified(self) -> bool:
        return all(c.ok for c in self.checks)

    @property
    def reason(self) -> str:
        bad = [c for c in self.checks if not c.ok]
        return "; ".join(
            f"{c.name} measured {c.measured:.6g}, setpoint {c.setpoint:.6g}, off by {c.measured - c.setpoint:+.3g} "
            f"(tolerance ±{c.tol:.3g})" for c in bad)

    def as_dict(self) -> dict[str, dict[str, float]]:
        return {c.name: c.as_dict() for c in self.checks}


def verify_setpoints(checks: Mapping[str, tuple[float, float, float]]) -> Verification:
    """``{name: (setpoint, measured, tol)}`` → :class:`Verification`."""
    return Verification(tuple(SetpointCheck(name, float(sp), float(m), float(tol))
                              for name, (sp, m, tol) in checks.items()))
