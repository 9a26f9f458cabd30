"""How the regulated output answers a change of load current: the closed-loop output impedance in time.

A load current i(t) drawn from a regulated output moves the output voltage by
−(z ∗ di/dt)(t), z the step response of the closed-loop output impedance
Zcl(s) = Zout_open(s)/(1 + T(s)) (Erickson & Maksimović, *Fundamentals of Power
Electronics*, 2nd ed., ch. 9).  Its final value Zcl(0) is the static load regulation,
which the model's steady states already hold; this module gives the *excess* over it,
the part that decays as the loop recovers:

    g(t) − Zcl(0) = Σ r_i·e^(p_i·t),   ∫₀ᵗ (g − Zcl(0)) = Σ (r_i/p_i)(e^(p_i·t) − 1),

r_i the residues of Zcl(s)/s at its poles p_i (partial fractions; distinct poles).  A
linear ramp of slope s from t_a to t_b therefore moves the output by
−s·[E(t − t_a) − E(t − t_b)] beyond the static change, E the integral above (0 for
negative arguments).  Poles in the left half-plane only: the model's loops are stable.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike, NDArray

from .small_signal import RationalTF


def step_partial_fractions(tf: RationalTF) -> tuple[float, NDArray[np.complex128], NDArray[np.complex128]]:
    """(Z(0) in Ω, poles in rad/s, residues of Z(s)/s at the poles in Ω) of an impedance ``tf``,
    distinct poles assumed: the step response is Z(0) + Σ r_i·e^(p_i·t). Empty for Z = 0."""
    num = np.trim_zeros(np.asarray(tf.num, float), "f")
    den = np.trim_zeros(np.asarray(tf.den, float), "f")
    if num.size == 0:
        return 0.0, np.zeros(0, complex), np.zeros(0, complex)
    k = num[0] / den[0]
    zeros = np.roots(num)
    poles = np.roots(den)
    res = np.empty(poles.size, complex)
    for i, p in enumerate(poles):
        others = np.delete(poles, i)
        res[i] = k * np.prod(p - zeros) / (p * np.prod(p - others))
    return float(num[-1] / den[-1]), poles, res


@dataclass(frozen=True, eq=False)
class ImpedanceExcess:
    """The decaying part of an impedance's step and ramp responses (see module docstring).

    dc_ohm: Z(0), Ω.  poles: rad/s.  residues: of Z(s)/s at the poles, Ω.
    memory_s: after this long every term has fallen below 1e-9 of the largest term's start (s).
    """

    dc_ohm: float
    poles: NDArray[np.complex128]
    residues: NDArray[np.complex128]
    memory_s: float

    @classmethod
    def from_tf(cls, tf: RationalTF) -> "ImpedanceExcess":
        """Partial fractions of ``tf`` (an impedance in Ω with all poles in the left half-plane)."""
        dc, poles, res = step_partial_fractions(tf)
        if np.any(poles.real >= 0.0):
            raise ValueError(f"ImpedanceExcess: poles {poles[poles.real >= 0.0]} rad/s are not in the left "
                             "half-plane; the loop is unstable or marginal and has no decaying response")
        amp = np.abs(res)
        floor = 1e-9 * float(amp.max()) if amp.size else 0.0
        memory = max((math.log(a / floor) / -p.real for a, p in zip(amp, poles) if a > floor), default=0.0)
        return cls(dc, poles, res, float(memory))

    def step_excess_ohm(self, t_s: ArrayLike) -> NDArray[np.float64]:
        """g(t) − Z(0) at times ``t_s`` after a unit current step (Ω); 0 for t ≤ 0."""
        t = np.atleast_1d(np.asarray(t_s, dtype=float))
        tt = np.maximum(t, 0.0)
        y = (np.exp(np.outer(tt, self.poles)) @ self.residues).real
        return np.where(t > 0.0, y, 0.0)

    def ramp_excess_ohm_s(self, t_s: ArrayLike) -> NDArray[np.float64]:
        """∫₀ᵗ (g − Z(0)) at times ``t_s`` (Ω·s); 0 for t ≤ 0."""
        t = np.atleast_1d(np.asarray(t_s, dtype=float))
        tt = np.minimum(np.maximum(t, 0.0), self.memory_s)
        y = (np.expm1(np.outer(tt, self.poles)) @ (self.residues / self.poles)).real
        return np.where(t > 0.0, y, 0.0)


@dataclass(frozen=True, eq=False)
class LoadRamp:
    """A linear change of load current at ``slope_a_per_s`` from ``t_start_s`` to ``t_end_s`` (model s)."""

    t_start_s: float
    t_end_s: float
    slope_a_per_s: float
    zout: ImpedanceExcess

    def output_excess_v(self, t_s: ArrayLike) -> NDArray[np.float64]:
        """Output voltage beyond the static (regulated) change at times ``t_s``, V."""
        t = np.atleast_1d(np.asarray(t_s, dtype=float))
        if self.slope_a_per_s == 0.0 or self.t_end_s <= self.t_start_s:
            return np.zeros(t.shape)
        return -self.slope_a_per_s * (self.zout.ramp_excess_ohm_s(t - self.t_start_s)
                                      - self.zout.ramp_excess_ohm_s(t - self.t_end_s))

    def cut_at(self, t_s: float) -> "LoadRamp":
        """This ramp stopped at ``t_s`` (a new setting replaced it)."""
        return LoadRamp(self.t_start_s, min(self.t_end_s, max(t_s, self.t_start_s)), self.slope_a_per_s, self.zout)

    def faded(self, t_s: float) -> bool:
        """Whether its excess has decayed away by ``t_s``."""
        return t_s > self.t_end_s + self.zout.memory_s
