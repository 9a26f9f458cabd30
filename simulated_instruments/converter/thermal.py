"""The temperature of the DUT's hot parts: one thermal mass behind one thermal resistance.

C·dT/dt = P_loss(T) − (T − T_amb)/R (a first-order thermal network, common practice).
Integrated in steps of at most τ/100 (τ = R·C), each step exact for the loss held at its
start: T ← T_eq + (T − T_eq)·exp(−h/τ), T_eq = T_amb + R·P_loss.  The loss comes from
the model at the present temperature, so losses that grow as the parts warm (the
on-resistances' tempco) feed back into the temperature.  Model time throughout.

The ambient is the design's unless an ``ambient`` function of model time is given (the air
of a thermal chamber, :class:`ChamberAir`: its setpoint approached at a limited ramp rate,
the air following with a first-order lag).
"""

from __future__ import annotations

import bisect
import math
import threading
from collections.abc import Callable

from .design import ThermalPath

#: How many past (time, temperature) points are kept for readings that integrate over the past.
HISTORY = 4096


class ThermalState:
    """Temperature of the hot parts over model time; starts at the ambient at ``t0_s``."""

    def __init__(self, path: ThermalPath, t0_s: float, *, enabled: bool,
                 ambient: Callable[[float], float] | None = None) -> None:
        self.path = path
        self.enabled = bool(enabled)
        self.ambient = ambient
        self._lock = threading.Lock()
        self._t: list[float] = [float(t0_s)]
        self._temp: list[float] = [path.ambient_c if ambient is None else float(ambient(t0_s))]

    @property
    def tau_s(self) -> float:
        """Thermal time constant R·C, model s."""
        return self.path.tau_s

    @property
    def latest_s(self) -> float:
        """Model time up to which the temperature is known."""
        with self._lock:
            return self._t[-1]

    def advance(self, t_s: float, loss_w: Callable[[float, float], float]) -> float:
        """Integrate up to ``t_s`` with ``loss_w(t_s, temp_c)`` (W); return the temperature then (°C)."""
        with self._lock:
            if not self.enabled or t_s <= self._t[-1]:
                return self._at(t_s)
            tau = self.path.tau_s
            t, temp = self._t[-1], self._temp[-1]
            while t < t_s:
                h = min(t_s - t, tau / 100.0)
                t_eq = self.ambient_at(t) + self.path.r_th_k_per_w * max(loss_w(t, temp), 0.0)
                temp = t_eq + (temp - t_eq) * math.exp(-h / tau)
                t = t + h if t_s - t > h else t_s
                self._t.append(t)
                self._temp.append(temp)
            if len(self._t) > HISTORY:
                del self._t[:-HISTORY], self._temp[:-HISTORY]
            return temp

    def temperature_at(self, t_s: float) -> float:
        """Temperature at model time ``t_s`` (°C): interpolated in the past, held beyond what is known."""
        with self._lock:
            return self._at(t_s)

    def ambient_at(self, t_s: float) -> float:
        """Ambient at model time ``t_s`` (°C): the design's, or the ``ambient`` function's."""
        return self.path.ambient_c if self.ambient is None else float(self.ambient(t_s))

    def _at(self, t_s: float) -> float:
        if not self.enabled:
            return self.ambient_at(t_s)
        i = bisect.bisect_right(self._t, t_s)
        if i >= len(self._t):
            return self._temp[-1]
        if i == 0:
            return self._temp[0]
        t0, t1 = self._t[i - 1], self._t[i]
        w = (t_s - t0) / (t1 - t0) if t1 > t0 else 1.0
        return self._temp[i - 1] + w * (self._temp[i] - self._temp[i - 1])


class ChamberAir:
    """The air of a thermal chamber: setpoint, ramp-rate limit, first-order lag (model time).

    The chamber's control reference c(t) moves from where it stands toward the setpoint at
    ``ramp_k_per_s`` at most (a linear ramp) and then holds; the air follows with one lag,
    τ·da/dt = c − a (a first-order plant, common practice for a stirred chamber).  Both are
    solved in closed form, piecewise: during a ramp of slope s, a(t) = c(t) − s·τ +
    (a₀ − c₀ + s·τ)·e^(−t/τ); while holding, a(t) = c + (a₀ − c)·e^(−t/τ) (the first-order
    response to a ramp and to a step; any control-systems text).  With the chamber off the
    reference is ``room_c``.  Thread-safe.
    """

    def __init__(self, t0_s: float, *, room_c: float = 25.0, tau_s: float = 120.0,
                 ramp_k_per_s: float = 3.0 / 60.0) -> None:
        if not (tau_s > 0.0 and ramp_k_per_s > 0.0):
            raise ValueError(f"ChamberAir: tau_s={tau_s!r} and ramp_k_per_s={ramp_k_per_s!r} must be > 0")
        self.room_c = float(room_c)
        self.tau_s = float(tau_s)
        self._lock = threading.Lock()
        self._t0 = float(t0_s)
        self._c0 = self._a0 = float(room_c)
        self._setpoint = float(room_c)
        self._ramp = float(ramp_k_per_s)
        self._on = False

    @property
    def setpoint_c(self) -> float:
        with self._lock:
            return self._setpoint

    @property
    def ramp_k_per_s(self) -> float:
        with self._lock:
            return self._ramp

    @property
    def running(self) -> bool:
        with self._lock:
            return self._on

    @property
    def event_s(self) -> float:
        """Model time of the last change of setpoint, ramp or run state."""
        with self._lock:
            return self._t0

    def _target(self) -> float:
        return self._setpoint if self._on else self.room_c

    def _state(self, t_s: float) -> tuple[float, float]:
        """(reference c, air a) at ``t_s`` ≥ the last change (lock held)."""
        dt = max(t_s - self._t0, 0.0)
        target, c0, a0, tau = self._target(), self._c0, self._a0, self.tau_s
        gap = target - c0
        if gap == 0.0:
            return c0, target + (a0 - target) * math.exp(-dt / tau)
        s = math.copysign(self._ramp, gap)
        t_ramp = abs(gap) / self._ramp
        if dt <= t_ramp:
            c = c0 + s * dt
            return c, c - s * tau + (a0 - c0 + s * tau) * math.exp(-dt / tau)
        a_r = target - s * tau + (a0 - c0 + s * tau) * math.exp(-t_ramp / tau)
        return target, target + (a_r - target) * math.exp(-(dt - t_ramp) / tau)

    def air_c(self, t_s: float) -> float:
        """Air temperature at model time ``t_s`` (°C; held at the last change before it)."""
        with self._lock:
            return self._state(t_s)[1]

    def reference_c(self, t_s: float) -> float:
        """The ramping control reference at ``t_s`` (°C)."""
        with self._lock:
            return self._state(t_s)[0]

    def _change(self, t_s: float, *, setpoint_c: float | None = None, ramp_k_per_s: float | None = None,
                on: bool | None = None) -> None:
        with self._lock:
            c, a = self._state(t_s)
            self._t0, self._c0, self._a0 = max(float(t_s), self._t0), c, a
            if setpoint_c is not None:
                self._setpoint = float(setpoint_c)
            if ramp_k_per_s is not None:
                if not ramp_k_per_s > 0.0:
                    raise ValueError(f"ChamberAir: ramp_k_per_s={ramp_k_per_s!r} must be > 0")
                self._ramp = float(ramp_k_per_s)
            if on is not None:
                self._on = bool(on)

    def set_setpoint(self, t_s: float, setpoint_c: float) -> None:
        self._change(t_s, setpoint_c=setpoint_c)

    def set_ramp(self, t_s: float, ramp_k_per_s: float) -> None:
        self._change(t_s, ramp_k_per_s=ramp_k_per_s)

    def set_running(self, t_s: float, on: bool) -> None:
        self._change(t_s, on=on)

    def in_band_since_s(self, t_s: float, band_k: float) -> float | None:
        """Model time since which the air has stayed within ±``band_k`` of the target up to
        ``t_s``, or None when it is outside now.  Searched from the last change on a grid of
        τ/20 and refined by bisection (the air moves monotonically between grid points)."""
        with self._lock:
            target = self._target()

            def inside(t: float) -> bool:
                return abs(self._state(t)[1] - target) <= band_k

            if not inside(t_s):
                return None
            step = self.tau_s / 20.0
            hi = t_s
            lo = hi - step
            while lo > self._t0 and inside(lo):
                hi, lo = lo, lo - step
            if lo <= self._t0:
                if inside(self._t0):
                    return self._t0
                lo = self._t0
            for _ in range(40):
                mid = 0.5 * (lo + hi)
                if inside(mid):
                    hi = mid
                else:
                    lo = mid
            return hi
