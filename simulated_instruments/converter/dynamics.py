"""First-order settling of terminal quantities between steady states.

After an event at t0 every quantity x relaxes as
    x(t) = x_target(t) + (x(t0) − x_target(t0))·exp(−(t − t0)/τ),
starting from its value at the moment of the event (so a change in the middle of a
transient starts from the present value).  A slowly moving target (an overheat fault)
is followed with the same formula.  The time to stay within a relative tolerance
``rel_tol`` of the step after a step of relative size ``step_fraction`` is
τ·ln(step_fraction/rel_tol) (exponential decay, common practice).
"""

from __future__ import annotations

import math
from dataclasses import dataclass


@dataclass(frozen=True)
class Relaxation:
    """An exponential approach from ``start`` toward a target, begun at ``t0_s`` with time constant ``tau_s``."""

    t0_s: float
    tau_s: float
    start: tuple[float, ...]
    target_at_t0: tuple[float, ...]

    def value(self, t_s: float, target: tuple[float, ...]) -> tuple[float, ...]:
        """Quantities at model time ``t_s`` given the present target."""
        dt = max(t_s - self.t0_s, 0.0)
        w = math.exp(-dt / self.tau_s) if self.tau_s > 0.0 else 0.0
        return tuple(x + (s - x0) * w for x, s, x0 in zip(target, self.start, self.target_at_t0))


def settling_time(tau_s: float, step_fraction: float, rel_tol: float) -> float:
    """Time (s) for exp(−t/τ)·step_fraction to fall to rel_tol; 0 when already within tolerance."""
    if not (tau_s > 0.0 and step_fraction >= 0.0 and rel_tol > 0.0):
        raise ValueError(f"settling_time: need tau_s > 0, step_fraction >= 0, rel_tol > 0; got "
                         f"{tau_s!r}, {step_fraction!r}, {rel_tol!r}")
    if step_fraction <= rel_tol:
        return 0.0
    return tau_s * math.log(step_fraction / rel_tol)
