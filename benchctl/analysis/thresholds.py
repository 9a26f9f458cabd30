"""Input thresholds (UVLO on and off) from slow ramps and bisection.

A ramp gives a bracket: the last input voltage at which the output was still in its old
state and the first at which it had changed.  Bisection (any numerical-analysis text,
e.g. Burden & Faires, *Numerical Analysis*, §2.1) halves that bracket with one trial per
step until it is no wider than ``resolution_v``; it needs ceil(log2(width/resolution))
trials, and the threshold is stated as the bracket's midpoint with the half-width as its
bound (the true threshold lies inside the final bracket when the DUT answers each trial
the same way).  The hysteresis is on − off.  Volts.
"""

from __future__ import annotations

import logging
import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike

from benchctl.errors import AnalysisInputError

logger = logging.getLogger(__name__)


@dataclass(frozen=True)
class Bracket:
    """The input voltage interval [low_v, high_v] that contains a threshold, V."""

    low_v: float
    high_v: float

    @property
    def width_v(self) -> float:
        """high_v − low_v, V."""
        return self.high_v - self.low_v

    @property
    def midpoint_v(self) -> float:
        """(low_v + high_v)/2, V."""
        return 0.5 * (self.low_v + self.high_v)


@dataclass(frozen=True)
class Threshold:
    """A threshold found by bisection: ``value_v`` ± ``half_width_v``; ``trials`` made; the final bracket."""

    value_v: float
    half_width_v: float
    trials: int
    bracket: Bracket
    trial_v: tuple[float, ...]


def ramp_bracket(vin_v: ArrayLike, state_on: ArrayLike) -> Bracket | None:
    """The first change of ``state_on`` (bools) along a ramp ``vin_v`` (V): between the last
    sample before and the first after it; None when the state never changes."""
    v = np.asarray(vin_v, dtype=float)
    s = np.asarray(state_on, dtype=bool)
    if v.shape != s.shape or v.ndim != 1 or v.size < 2:
        raise AnalysisInputError("ramp_bracket: vin_v and state_on must be 1-D and of one length (2 or more)")
    change = np.flatnonzero(s[1:] != s[:-1])
    if change.size == 0:
        return None
    k = int(change[0])
    a, b = float(v[k]), float(v[k + 1])
    return Bracket(min(a, b), max(a, b))


def trials_needed(width_v: float, resolution_v: float) -> int:
    """ceil(log2(width/resolution)) bisection trials (0 when already narrow enough)."""
    if not (width_v >= 0 and resolution_v > 0):
        raise AnalysisInputError("trials_needed: need width_v >= 0 and resolution_v > 0")
    return 0 if width_v <= resolution_v else math.ceil(math.log2(width_v / resolution_v))


def bisect_threshold(changed_at: Callable[[float], bool], bracket: Bracket, resolution_v: float,
                     *, max_trials: int = 40) -> Threshold:
    """Narrow ``bracket`` until it is at most ``resolution_v`` wide.

    ``changed_at(v)`` runs one trial at input ``v`` and answers whether ``v`` is on the
    ``high_v`` side of the threshold (for UVLO on and off alike: whether the converter runs).
    """
    if not resolution_v > 0:
        raise AnalysisInputError(f"bisect_threshold: resolution_v={resolution_v!r} must be > 0 V")
    lo, hi = bracket.low_v, bracket.high_v
    tried: list[float] = []
    while hi - lo > resolution_v and len(tried) < max_trials:
        mid = 0.5 * (lo + hi)
        tried.append(mid)
        if changed_at(mid):
            hi = mid
        else:
            lo = mid
    final = Bracket(lo, hi)
    return Threshold(final.midpoint_v, 0.5 * final.width_v, len(tried), final, tuple(tried))


def hysteresis_v(on: Threshold, off: Threshold) -> tuple[float, float]:
    """(on − off, its bound: the sum of the two half-widths), V."""
    return on.value_v - off.value_v, on.half_width_v + off.half_width_v


def states_from_output(vout_v: Sequence[float] | ArrayLike, on_level_v: float) -> np.ndarray:
    """Whether the converter is running at each reading: output above ``on_level_v`` (V)."""
    return np.asarray(vout_v, dtype=float) > float(on_level_v)
