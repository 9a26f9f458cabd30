"""Model time: a clock scaled from real time, and a manual clock for unit tests."""

from __future__ import annotations

import threading
import time
from typing import Callable, Protocol, runtime_checkable


@runtime_checkable
class ModelClock(Protocol):
    """Anything that tells the present model time in seconds."""

    def now_s(self) -> float:
        """Present model time, s (monotonic, starts near 0)."""
        ...


class ScaledClock:
    """Model seconds = real seconds elapsed since construction × ``scale``.

    ``scale`` > 1 runs the model faster than the wall clock so a simulated bench
    settles in milliseconds.  ``real_time`` is injectable (default ``time.monotonic``).
    """

    def __init__(self, scale: float = 1.0, real_time: Callable[[], float] = time.monotonic) -> None:
        if not scale > 0.0:
            raise ValueError(f"ScaledClock: scale must be > 0, got {scale!r}; use 1.0 for real time")
        self.scale = float(scale)
        self._real_time = real_time
        self._t0 = real_time()

    def now_s(self) -> float:
        """Model time, s."""
        return (self._real_time() - self._t0) * self.scale


class ManualClock:
    """A clock that only moves when told to; for deterministic tests."""

    def __init__(self, start_s: float = 0.0) -> None:
        self._t_s = float(start_s)
        self._lock = threading.Lock()

    def now_s(self) -> float:
        """Model time, s."""
        with self._lock:
            return self._t_s

    def advance(self, dt_s: float) -> float:
        """Move time forward by ``dt_s`` seconds (≥ 0); return the new time, s."""
        if dt_s < 0.0:
            raise ValueError(f"ManualClock.advance: dt_s must be >= 0, got {dt_s!r}; time does not run backwards")
        with self._lock:
            self._t_s += float(dt_s)
            return self._t_s
