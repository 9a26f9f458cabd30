"""How the terminal quantities move between steady states.

The seven terminal quantities (``QUANTITIES``) are kept as one vector.  Two kinds of
transient follow a setting:

``RegulatedTransient`` — a change while the converter regulates before and after
(a load or line step).  Each quantity has its own dynamics:

* load current: a linear ramp at the electronic load's slew rate (A/s); the output
  current follows it (the output is the load's input);
* output voltage: the static (regulated) value at the present load current plus the
  closed loop's answer to the load ramp, −s·[E(t − t_a) − E(t − t_b)] with E the
  integral of the closed-loop output impedance's decaying step response
  (``load_response``); any remaining jump of its target (a line step) decays with
  τ_loop = 1/(2π·f_c), f_c the loop crossover (a first-order closed loop, common
  practice);
* input and source current: a first-order lag τ_in (the bench's input filter) behind
  the DUT's demand; the input voltage is the source voltage less the cable drop of that
  current;
* source voltage: the programmed value at once.

Between the samples of the ramp the targets are taken as linear, and a first-order lag
of a linear target x_k + s·(t − t_k) from y_k is exact:
y(t) = x(t) − s·τ + (y_k − x_k + s·τ)·exp(−(t − t_k)/τ).

``Relaxation`` — any other change (a start, a stop, a lock-out, a fault, protection):
every quantity relaxes as x(t) = x_target(t) + (x(t0) − x_target(t0))·exp(−(t − t0)/τ)
from its value at the event.

Both start from the values at the moment of the event, so a change in the middle of a
transient continues from where it is.  A slowly moving target (the parts warming, an
overheat fault) is added on top without lag: it moves four or more orders of magnitude
slower than any electrical time constant here.  The time to stay within ``rel_tol`` of
a step of relative size ``step_fraction`` of a first-order lag is τ·ln(step_fraction/rel_tol)
(exponential decay, common practice).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
from numpy.typing import ArrayLike, NDArray

from .load_response import LoadRamp

#: Names of the terminal quantities, in the order of the state vector.
QUANTITIES = ("source_v", "source_a", "input_v", "input_a", "output_v", "output_a", "load_a")
SOURCE_V, SOURCE_A, INPUT_V, INPUT_A, OUTPUT_V, OUTPUT_A, LOAD_A = range(7)


def _times(t_s: ArrayLike) -> NDArray[np.float64]:
    return np.atleast_1d(np.asarray(t_s, dtype=float))


def _column(target: ArrayLike) -> NDArray[np.float64]:
    v = np.asarray(target, dtype=float)
    return v.reshape(-1, 1) if v.ndim == 1 else v


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

    def values_at(self, t_s: ArrayLike, target: ArrayLike) -> NDArray[np.float64]:
        """Quantities (7 × n) at model times ``t_s`` given the target (7, or 7 × n)."""
        t = _times(t_s)
        dt = np.maximum(t - self.t0_s, 0.0)
        w = np.exp(-dt / self.tau_s) if self.tau_s > 0.0 else np.zeros(t.shape)
        d0 = (np.asarray(self.start) - np.asarray(self.target_at_t0)).reshape(-1, 1)
        return _column(target) + d0 * w

    @property
    def slowest_tau_s(self) -> float:
        """The longest time constant of this transient, s."""
        return self.tau_s

    @property
    def end_of_drive_s(self) -> float:
        """When its targets stop moving (the event itself), model s."""
        return self.t0_s


@dataclass(frozen=True)
class RegulatedTransient:
    """A load or line change while the converter regulates (see module docstring).

    sample_times_s / samples: the quasi-static terminal vector (7 × K+1) along the load
    ramp, at the temperature of the event; the last sample is the final steady state.
    start: the terminal vector at the event.  input_tau_s: τ_in of the input side;
    loop_tau_s: τ_loop of the output.  cable_r_ohm: source-to-input cable.
    ramps: load ramps whose output excess is still decaying (this one's last).
    """

    t0_s: float
    sample_times_s: tuple[float, ...]
    samples: tuple[tuple[float, ...], ...]
    start: tuple[float, ...]
    input_tau_s: float
    loop_tau_s: float
    cable_r_ohm: float
    ramps: tuple[LoadRamp, ...] = ()
    _lag: dict = field(default_factory=dict, init=False, repr=False, compare=False)

    def __post_init__(self) -> None:
        times = np.asarray(self.sample_times_s, dtype=float)
        x = np.asarray(self.samples, dtype=float).T          # 7 × (K+1)
        if times.ndim != 1 or x.shape != (7, times.size) or np.any(np.diff(times) <= 0.0):
            raise ValueError("RegulatedTransient: need increasing sample times and a 7-vector per sample")
        slopes = np.zeros_like(x)
        if times.size > 1:
            slopes[:, :-1] = np.diff(x, axis=1) / np.diff(times)
        y = np.empty_like(x)
        y[:, 0] = self.start
        tau = self.input_tau_s
        for k in range(times.size - 1):
            h = times[k + 1] - times[k]
            w = math.exp(-h / tau) if tau > 0.0 else 0.0
            s = slopes[:, k]
            y[:, k + 1] = x[:, k + 1] - s * tau + (y[:, k] - x[:, k] + s * tau) * w
        excess0 = sum((float(r.output_excess_v(self.t0_s)[0]) for r in self.ramps), 0.0)
        self._lag.update(times=times, x=x, slopes=slopes, y=y,
                         out_jump=self.start[OUTPUT_V] - x[OUTPUT_V, 0] - excess0)

    @property
    def final(self) -> tuple[float, ...]:
        """The steady state it heads to, at the temperature of the event."""
        return self.samples[-1]

    @property
    def slowest_tau_s(self) -> float:
        """The longest time constant of this transient, s."""
        memory = max((r.zout.memory_s / math.log(1e9) for r in self.ramps), default=0.0)
        return max(self.input_tau_s, self.loop_tau_s, memory)

    @property
    def end_of_drive_s(self) -> float:
        """When the load ramp ends and the targets stop moving, model s."""
        return self.sample_times_s[-1]

    def values_at(self, t_s: ArrayLike, target: ArrayLike) -> NDArray[np.float64]:
        """Quantities (7 × n) at model times ``t_s``; ``target`` is the final state now (7,).

        The difference between ``target`` and :attr:`final` (the parts have warmed since
        the event) is added to every quantity.
        """
        t = _times(t_s)
        lag = self._lag
        times, x, slopes, y = lag["times"], lag["x"], lag["slopes"], lag["y"]
        tq = np.maximum(t, self.t0_s)
        k = np.clip(np.searchsorted(times, tq, side="right") - 1, 0, times.size - 1)
        xt = x[:, k] + slopes[:, k] * (tq - times[k])
        out = xt.copy()
        tau = self.input_tau_s
        w = np.exp(-(tq - times[k]) / tau) if tau > 0.0 else np.zeros(t.shape)
        for q in (SOURCE_A, INPUT_A):
            s = slopes[q, k]
            out[q] = xt[q] - s * tau + (y[q, k] - x[q, k] + s * tau) * w
        out[INPUT_V] = xt[INPUT_V] - self.cable_r_ohm * (out[INPUT_A] - xt[INPUT_A])
        jump_w = np.exp(-(tq - self.t0_s) / self.loop_tau_s) if self.loop_tau_s > 0.0 else np.zeros(t.shape)
        out[OUTPUT_V] = xt[OUTPUT_V] + lag["out_jump"] * jump_w
        for ramp in self.ramps:
            out[OUTPUT_V] += ramp.output_excess_v(tq)
        shift = np.asarray(target, dtype=float) - x[:, -1]
        return out + shift.reshape(-1, 1)


Transient = Relaxation | RegulatedTransient


def settling_time(tau_s: float, step_fraction: float, rel_tol: float) -> float:
    """Time (s) for exp(−t/τ)·step_fraction to fall to rel_tol; 0 when already within tolerance."""
    if not (tau_s > 0.0 and step_fraction >= 0.0 and rel_tol > 0.0):
        raise ValueError(f"settling_time: need tau_s > 0, step_fraction >= 0, rel_tol > 0; got "
                         f"{tau_s!r}, {step_fraction!r}, {rel_tol!r}")
    if step_fraction <= rel_tol:
        return 0.0
    return tau_s * math.log(step_fraction / rel_tol)
