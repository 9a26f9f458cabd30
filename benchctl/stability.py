"""Slow drift: waiting until a quantity is stable over a longer window.

Losses rise as parts warm over minutes, so a quantity that has finished its electrical
transient may still creep. The criterion is the one of IEC 62301:2011 (household
appliances, standby power), clause 5.3 — from memory: the slope of a linear regression
through the readings of a comparison period, here expressed as the change it implies
over the window, |slope|·window_s, must stay below a set fraction of the mean (or an
absolute amount, whichever is larger). Window length and fraction are parameters; the
defaults of the procedures that use it are common practice, not a standard's numbers.
A warm-up before the first point is a fixed hold followed by the same check.
"""

from __future__ import annotations

import math
import time
from dataclasses import dataclass
from typing import Callable

import numpy as np


@dataclass(frozen=True)
class StabilityResult:
    """Whether the readings of the last window changed less than the limit."""

    stable: bool
    window_s: float  # span of the readings judged, s
    change: float  # |slope|·window: change over the window implied by the regression, unit of the quantity
    limit: float  # max(max_change_rel·|mean|, max_change_abs)
    mean: float
    readings: int
    elapsed_s: float
    reason: str = ""

    @property
    def change_rel(self) -> float:
        return self.change / abs(self.mean) if self.mean else math.inf

    def info(self) -> dict:
        return {"stable": self.stable, "window_s": self.window_s, "change": self.change,
                "change_rel": self.change_rel if math.isfinite(self.change_rel) else None,
                "limit": self.limit, "readings": self.readings, "elapsed_s": self.elapsed_s,
                "criterion": "regression slope x window below a fraction of the mean (after IEC 62301:2011 5.3)"}


def regression_change(t_s: np.ndarray, x: np.ndarray) -> float:
    """|slope|·(t_end − t_start) of the least-squares line through (t, x)."""
    span = float(t_s[-1] - t_s[0])
    if span <= 0 or len(t_s) < 3:
        return math.inf
    slope = float(np.polyfit(t_s - t_s[0], x, 1)[0])
    return abs(slope) * span


def wait_stable(
    read: Callable[[], float],
    *,
    window_s: float,
    max_change_rel: float,
    max_change_abs: float = 0.0,
    min_readings: int = 10,
    interval_s: float = 0.0,
    timeout_s: float = 600.0,
    clock: Callable[[], float] = time.monotonic,
    sleep: Callable[[float], None] = time.sleep,
) -> StabilityResult:
    """Read until the trailing ``window_s`` of readings is stable (see the module docstring), or time out."""
    if not window_s > 0:
        raise ValueError(f"window_s must be > 0 s, got {window_s!r}")
    if max_change_rel < 0 or max_change_abs < 0:
        raise ValueError("max_change_rel and max_change_abs must not be negative")
    if min_readings < 3:
        raise ValueError("min_readings must be at least 3 (a line and its scatter)")
    t0 = clock()
    ts: list[float] = []
    xs: list[float] = []
    result: StabilityResult | None = None
    while True:
        value = float(read())
        now = clock()
        ts.append(now - t0)
        xs.append(value)
        while len(ts) > min_readings and ts[-1] - ts[1] >= window_s:
            del ts[0], xs[0]  # keep the shortest trailing span that covers the window
        if ts[-1] - ts[0] >= window_s and len(ts) >= min_readings:
            t, x = np.asarray(ts), np.asarray(xs)
            mean = float(x.mean())
            change = regression_change(t, x)
            limit = max(max_change_rel * abs(mean), max_change_abs)
            result = StabilityResult(change <= limit, float(t[-1] - t[0]), change, limit, mean, len(ts), now - t0)
            if result.stable:
                return result
        if now - t0 >= timeout_s:
            if result is None:
                return StabilityResult(False, ts[-1] - ts[0], math.inf, math.nan, float(np.mean(xs)), len(ts),
                                       now - t0, f"not enough readings over {window_s:g} s within {timeout_s:g} s")
            return StabilityResult(False, result.window_s, result.change, result.limit, result.mean, result.readings,
                                   now - t0, f"still drifting after {timeout_s:g} s: change {result.change:.4g} over "
                                   f"{result.window_s:.3g} s above {result.limit:.4g}")
        if interval_s > 0:
            sleep(interval_s)
