"""The temperature of the DUT's hot parts: one thermal mass behind one thermal resistance.

C·dT/dt = P_loss(T) − (T − T_amb)/R (a first-order thermal network, common practice).
Integrated in steps of at most τ/100 (τ = R·C), each step exact for the loss held at its
start: T ← T_eq + (T − T_eq)·exp(−h/τ), T_eq = T_amb + R·P_loss.  The loss comes from
the model at the present temperature, so losses that grow as the parts warm (the
on-resistances' tempco) feed back into the temperature.  Model time throughout.
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

    def __init__(self, path: ThermalPath, t0_s: float, *, enabled: bool) -> None:
        self.path = path
        self.enabled = bool(enabled)
        self._lock = threading.Lock()
        self._t: list[float] = [float(t0_s)]
        self._temp: list[float] = [path.ambient_c]

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
                t_eq = self.path.ambient_c + self.path.r_th_k_per_w * max(loss_w(t, temp), 0.0)
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

    def _at(self, t_s: float) -> float:
        if not self.enabled:
            return self.path.ambient_c
        i = bisect.bisect_right(self._t, t_s)
        if i >= len(self._t):
            return self._temp[-1]
        if i == 0:
            return self._temp[0]
        t0, t1 = self._t[i - 1], self._t[i]
        w = (t_s - t0) / (t1 - t0) if t1 > t0 else 1.0
        return self._temp[i - 1] + w * (self._temp[i] - self._temp[i - 1])
