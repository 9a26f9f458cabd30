"""Integrating readings: each reading takes an aperture of time and answers the mean over it.

A simulated meter (and the read-back of the simulated source and load) does what an
integrating DC meter does: it integrates for its aperture, ``DEFAULT_APERTURE_S`` = one
50 Hz power-line cycle (20 ms) by default, and answers the mean of the true value over
that interval (the model's ``mean_terminals``; powers are means of v·i), plus the
instrument's own error.  The aperture is wall time, as on the bench; its interval in
model time is the aperture × the clock's scale (``ScaledClock.scale``).  With ``N``
readings averaged the integration lasts N apertures.  SCPI (the instruments register
it): ``[SENSe:]APERture[:TIME] <s>`` (``APERTURE_RANGE_S``), ``[SENSe:]APERture?``.

The wait uses the injectable ``sleep`` and then waits on the model clock itself, so a
reading never answers before its interval has passed in model time.  With a clock that
has no ``scale`` (a manual clock in unit tests) the interval ends where the clock stands
after ``sleep(aperture)``: pass a sleep that advances it.
"""

from __future__ import annotations

import time
from collections.abc import Callable
from dataclasses import dataclass

#: One 50 Hz power-line cycle, s (wall time).
DEFAULT_APERTURE_S = 0.020
#: Settable apertures, s: from 10 µs (fast tests) to 10 s.
APERTURE_RANGE_S = (1e-5, 10.0)
_POLL_S = 2e-4


@dataclass(frozen=True)
class Interval:
    """A reading's integration interval, model s."""

    t0_s: float
    t1_s: float


class Aperture:
    """The integration time of one instrument's readings and the wait it takes."""

    def __init__(self, clock, aperture_s: float = DEFAULT_APERTURE_S,
                 sleep: Callable[[float], None] = time.sleep) -> None:
        self.clock = clock
        self.default_s = float(aperture_s)
        self.seconds = float(aperture_s)
        self._sleep = sleep

    def reset(self) -> None:
        """Back to the instrument's default (``*RST``)."""
        self.seconds = self.default_s

    def set(self, seconds: float) -> None:
        """Set the aperture, s (wall time)."""
        self.seconds = float(seconds)

    @property
    def scale(self) -> float | None:
        """Model seconds per wall second, or None for a clock that does not run by itself."""
        scale = getattr(self.clock, "scale", None)
        return float(scale) if scale is not None else None

    def start(self, count: int = 1) -> Interval:
        """Begin an integration of ``count`` apertures now; return its planned interval (model s)."""
        t0 = self.clock.now_s()
        wall = self.seconds * max(1, int(count))
        scale = self.scale
        return Interval(t0, t0 + wall * (scale if scale is not None else 1.0))

    def done(self, interval: Interval) -> bool:
        """Whether the model clock has passed the end of ``interval``."""
        return self.clock.now_s() >= interval.t1_s

    def wait(self, interval: Interval) -> Interval:
        """Block until ``interval`` has passed (model time); return the interval actually covered."""
        scale = self.scale
        now = self.clock.now_s()
        if scale is None:
            if now < interval.t1_s:
                self._sleep(interval.t1_s - now)
            return Interval(interval.t0_s, max(interval.t0_s, min(interval.t1_s, self.clock.now_s())))
        while now < interval.t1_s:
            self._sleep(max((interval.t1_s - now) / scale, _POLL_S))
            now = self.clock.now_s()
        return interval

    def integrate(self, count: int = 1) -> Interval:
        """Start an integration of ``count`` apertures and wait for it; the interval covered (model s)."""
        return self.wait(self.start(count))
