"""Waiting for a DUT to settle after a setpoint change.

``settle_adaptive`` reads a quantity repeatedly until the readings of a trailing window
agree within a tolerance (max − min ≤ tol, tol = max(abs_tol, rel_tol·|value|)); then the
settling time is found the way a step response's settling time is defined — the moment
after which every reading stays within ±tol of the final value (common practice; e.g.
the 2 % settling time of control textbooks) — counted from the start of the settle.
When the window never agrees before ``timeout_s`` it returns an *unsettled* result
instead of hanging; the procedure records the point with ``settled=False``.

The window is ``window`` readings spanning at least ``window_s`` seconds. Its length
decides when the routine stops: for a first-order response x∞ + A·e^(−t/τ) the spread
over a window W is A·e^(−(t−W)/τ)·(1 − e^(−W/τ)), which reaches tol at the true
settling time τ·ln(A/tol) when W ≈ 0.7 τ (W + τ·ln(1 − e^(−W/τ)) = 0). A much shorter
window stops early (while the output still creeps), a much longer one late; give
``window_s`` about 0.7 × the DUT's dominant time constant when it is known.
"""

from __future__ import annotations

import time
from dataclasses import dataclass
from typing import Callable


@dataclass(frozen=True)
class SettleResult:
    """Outcome of a settle: whether it settled, when, and the last reading."""

    settled: bool
    settling_time_s: float | None  # from the start until readings stayed within ±tol; None if unsettled
    elapsed_s: float  # time spent in the settle routine
    final_value: float
    tolerance: float
    readings: int
    reason: str = ""


def settle_adaptive(
    read: Callable[[], float],
    *,
    rel_tol: float = 1e-3,
    abs_tol: float = 1e-3,
    window: int = 4,
    window_s: float = 0.0,
    interval_s: float = 0.0,
    timeout_s: float = 10.0,
    clock: Callable[[], float] = time.monotonic,
    sleep: Callable[[float], None] = time.sleep,
) -> SettleResult:
    """Read until the trailing window of readings agrees within the tolerance, or time out."""
    if window < 2:
        raise ValueError("window must be at least 2 readings")
    if window_s < 0:
        raise ValueError("window_s must not be negative")
    t0 = clock()
    times: list[float] = []
    values: list[float] = []
    while True:
        value = read()
        now = clock()
        times.append(now - t0)
        values.append(value)
        start = len(values) - window
        while start > 0 and times[-1] - times[start] < window_s:
            start -= 1
        if start >= 0 and times[-1] - times[start] >= window_s:
            recent = values[start:]
            tol = max(abs_tol, rel_tol * abs(recent[-1]))
            if max(recent) - min(recent) <= tol:
                final = sum(recent) / len(recent)
                k = len(values) - 1
                while k > 0 and abs(values[k - 1] - final) <= tol:
                    k -= 1
                return SettleResult(True, times[k], now - t0, final, tol, len(values))
        if now - t0 >= timeout_s:
            tol = max(abs_tol, rel_tol * abs(value))
            return SettleResult(
                False, None, now - t0, value, tol, len(values),
                reason=f"readings did not agree within {tol:g} over {window} readings in {timeout_s:g} s",
            )
        if interval_s > 0:
            sleep(interval_s)
