"""What a change of the input line does to the regulated output: line steps and line injection.

The line-to-output transfer (audio susceptibility) of the averaged converter, open loop
(Erickson & Maksimović, *Fundamentals of Power Electronics*, 2nd ed., ch. 8 Table 8.2 for
CCM, ch. 11 Table 11.3 for DCM; the ESR zero of the output capacitor as in ``small_signal``):

* buck CCM     Gvg(s) = D·(1 + s·rc·C)/(1 + s(L/R + rc·C) + s²LC(1 + rc/R))   = (D/Vg)·Gvd(s)
* flyback CCM  Gvg(s) = Gg0·(1 + s·rc·C)/(1 + s/(Q·ω0) + s²/ω0²),  Gg0 = n·D/D′
  (the same ω0 and Q as its Gvd; the line path has no right-half-plane zero)
* DCM (both)   Gvg(s) = M·(1 + s·rc·C)/(1 + s/ωp),  M = V/Vg, ωp as in its Gvd

and closed loop (ch. 9): Gvg_cl(s) = Gvg(s)/(1 + T(s)), T the loop gain. The rejection a
bench measures is 20·log10|Gvg_cl(j2πf)| (negative dB: the output ripple is smaller).

Time domain, linearised at the operating point after the change:

* a line step ΔVg at t0 moves the output by ΔVg·(g(t − t0) − Gvg_cl(0)) beyond the new
  static value, g the step response of Gvg_cl (partial fractions, as for the load step in
  ``load_response``); ``LineStep`` has the interface of ``load_response.LoadRamp`` so the
  model's regulated transient carries it with the load ramps;
* a sine injected on the line, v(t) = A·sin(2πf(t − t_on)), moves the output by
  |Gvg_cl(j2πf)|·A·sin(2πf(t − t_on) + ∠Gvg_cl) once its start has died away (the steady
  sinusoidal response; the start transient is left out: it decays with the loop, within a
  few ms, and a bench waits longer than that).

The input current's answer to the injected voltage (the converter's input admittance) is
left out: a second-order effect on every figure measured here.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike, NDArray

from .design import ConverterDesign
from .load_response import ImpedanceExcess
from .small_signal import RationalTF


def line_to_output_open(design: ConverterDesign, mode: str, vin_v: float, v_v: float, duty: float,
                        r_load_ohm: float) -> RationalTF:
    """Open-loop line-to-output Gvg(s) at an operating point, V/V (module docstring)."""
    st = design.stage
    esr = (st.esr_ohm * st.c_out_f, 1.0)
    if mode == "CCM":
        if design.topology == "buck":
            den = (st.inductance_h * st.c_out_f * (1.0 + st.esr_ohm / r_load_ohm),
                   st.inductance_h / r_load_ohm + st.esr_ohm * st.c_out_f, 1.0)
            return RationalTF(tuple(np.asarray(esr) * duty), den)
        dp = 1.0 - duty
        lp = st.turns_ratio ** 2 * st.inductance_h
        w0 = dp / math.sqrt(lp * st.c_out_f)
        q = dp * r_load_ohm * math.sqrt(st.c_out_f / lp)
        gg0 = st.turns_ratio * duty / dp
        return RationalTF(tuple(np.asarray(esr) * gg0), (1.0 / (w0 * w0), 1.0 / (q * w0), 1.0))
    m = v_v / vin_v
    if design.topology == "buck":
        wp = (2.0 - m) / ((1.0 - m) * r_load_ohm * st.c_out_f)
    else:
        wp = 2.0 / (r_load_ohm * st.c_out_f)
    return RationalTF(tuple(np.asarray(esr) * m), (1.0 / wp, 1.0))


def closed_loop_line_to_output(gvg_open: RationalTF, loop: RationalTF) -> RationalTF:
    """Gvg_cl(s) = Gvg(s)/(1 + T(s)) as one rational function, V/V (Erickson 2nd ed., ch. 9)."""
    num = np.polymul(gvg_open.num, loop.den)
    den = np.polymul(gvg_open.den, np.polyadd(loop.den, loop.num))
    return RationalTF(tuple(num), tuple(den))


def rejection_db(tf: RationalTF, freq_hz: ArrayLike) -> NDArray[np.float64]:
    """20·log10|Gvg_cl(j2πf)| at ``freq_hz``, dB (negative: the output ripple is the smaller)."""
    return 20.0 * np.log10(np.abs(tf.response(freq_hz)))


@dataclass(frozen=True, eq=False)
class LineStep:
    """A step of ``dv_v`` volts at the DUT input at model time ``t_s``; ``response``: the decaying part
    of Gvg_cl's step response. ``t_start_s``/``t_end_s``/``zout``/``cut_at``/``faded`` make it look
    like a ``LoadRamp`` to the regulated transient (a step has no duration)."""

    t_s: float
    dv_v: float
    response: ImpedanceExcess

    @property
    def t_start_s(self) -> float:
        return self.t_s

    @property
    def t_end_s(self) -> float:
        return self.t_s

    @property
    def zout(self) -> ImpedanceExcess:
        """The decaying response (named as a load ramp's, for ``RegulatedTransient.slowest_tau_s``)."""
        return self.response

    def output_excess_v(self, t_s: ArrayLike) -> NDArray[np.float64]:
        """Output voltage beyond the new static value at times ``t_s``: ΔVg·(g − G(0)); from t0 on
        (at t0 itself the limit from the right, −ΔVg·G(0): the output has not moved yet)."""
        t = np.atleast_1d(np.asarray(t_s, dtype=float))
        tt = np.minimum(np.maximum(t - self.t_s, 0.0), self.response.memory_s)
        y = (np.exp(np.outer(tt, self.response.poles)) @ self.response.residues).real
        y = np.where(t - self.t_s > self.response.memory_s, 0.0, y)
        return np.where(t >= self.t_s, self.dv_v * y, 0.0)

    def cut_at(self, t_s: float) -> "LineStep":
        """A step is whole at once: a later setting does not cut it."""
        return self

    def faded(self, t_s: float) -> bool:
        return t_s > self.t_s + self.response.memory_s


@dataclass(frozen=True)
class LineInjection:
    """A sine on the input line at the DUT input: ``amplitude_v`` (V peak), ``frequency_hz``, from
    ``t_on_s`` (model s); ``response``: Gvg_cl(j2πf) at the operating point (0 when not regulating)."""

    t_on_s: float
    amplitude_v: float
    frequency_hz: float
    response: complex

    def _phase(self, t: NDArray[np.float64]) -> NDArray[np.float64]:
        return 2.0 * math.pi * self.frequency_hz * (t - self.t_on_s)

    def input_v(self, t_s: ArrayLike) -> NDArray[np.float64]:
        """The injected voltage at the DUT input at times ``t_s``, V."""
        t = np.atleast_1d(np.asarray(t_s, dtype=float))
        return np.where(t >= self.t_on_s, self.amplitude_v * np.sin(self._phase(t)), 0.0)

    def output_v(self, t_s: ArrayLike) -> NDArray[np.float64]:
        """The output's steady answer to it at times ``t_s``, V."""
        t = np.atleast_1d(np.asarray(t_s, dtype=float))
        g = self.response
        y = self.amplitude_v * abs(g) * np.sin(self._phase(t) + math.atan2(g.imag, g.real))
        return np.where(t >= self.t_on_s, y, 0.0)

    def mean_input_v(self, t0_s: float, t1_s: float) -> float:
        """Mean of :meth:`input_v` over [t0_s, t1_s] (analytic), V."""
        return self._mean(t0_s, t1_s, 0.0, self.amplitude_v)

    def mean_output_v(self, t0_s: float, t1_s: float) -> float:
        """Mean of :meth:`output_v` over [t0_s, t1_s] (analytic), V."""
        g = self.response
        return self._mean(t0_s, t1_s, math.atan2(g.imag, g.real), self.amplitude_v * abs(g))

    def _mean(self, t0_s: float, t1_s: float, phi: float, amp: float) -> float:
        a, b = max(t0_s, self.t_on_s), t1_s
        if b <= a or amp == 0.0:
            return 0.0
        w = 2.0 * math.pi * self.frequency_hz
        if b - t0_s <= 0.0:
            return 0.0
        integral = amp * (math.cos(w * (a - self.t_on_s) + phi) - math.cos(w * (b - self.t_on_s) + phi)) / w
        return integral / (t1_s - t0_s) if t1_s > t0_s else float(self.output_v(np.array([t0_s]))[0])
