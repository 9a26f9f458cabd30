"""Averaged small-signal transfer functions of the converter loop.

Polynomials are coefficient tuples in s, highest power first (the scipy.signal
convention).  Formulas (Erickson & Maksimović, *Fundamentals of Power Electronics*,
2nd ed.: buck CCM ch. 8; flyback CCM ch. 7–8; DCM ch. 11; PWM modulator ch. 7):

* buck CCM   Gvd = Vg(1 + s·rc·C) / (1 + s(L/R + rc·C) + s²LC(1 + rc/R))   (exact with ESR)
* flyback CCM Gvd = Gd0(1 − s/ωz)(1 + s·rc·C)/(1 + s/(Qω0) + s²/ω0²),
  Gd0 = V/(D·D′), ω0 = D′/√(L′C), Q = D′R√(C/L′), ωz = D′²R/(D·L′), L′ = n²Lm
* DCM single pole (+ ESR zero): buck Gd0 = 2V(1−M)/(D(2−M)), ωp = (2−M)/((1−M)RC);
  flyback Gd0 = V/D, ωp = 2/(RC)
* PWM modulator 1/Vm, sense divider H, type-3 compensator with a single-pole op-amp
  A(s) = A0/(1 + s/ωa): Gc = Zf·A/(Zi·(1 + A) + Zf) (inverting-amplifier algebra).

The loop gain is T = H·Gc·Gvd/Vm, so T(0) = H·A0·Gd0/Vm exactly (the finite DC loop
gain used for DC regulation).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike, NDArray

from .design import ConverterDesign, Type3Network


@dataclass(frozen=True)
class RationalTF:
    """N(s)/D(s) with real coefficients, highest power first."""

    num: tuple[float, ...]
    den: tuple[float, ...]

    def __post_init__(self) -> None:
        num = tuple(float(c) for c in np.atleast_1d(np.asarray(self.num, dtype=float)))
        den = tuple(float(c) for c in np.atleast_1d(np.asarray(self.den, dtype=float)))
        if not any(den):
            raise ValueError("RationalTF: denominator is all zeros; give at least one non-zero coefficient")
        object.__setattr__(self, "num", num)
        object.__setattr__(self, "den", den)

    @classmethod
    def constant(cls, gain: float) -> "RationalTF":
        """A frequency-independent gain."""
        return cls((gain,), (1.0,))

    def response(self, freq_hz: ArrayLike) -> NDArray[np.complex128]:
        """Complex response at s = j·2π·freq_hz."""
        s = 2j * math.pi * np.asarray(freq_hz, dtype=float)
        return np.polyval(self.num, s) / np.polyval(self.den, s)

    def __mul__(self, other: "RationalTF") -> "RationalTF":
        return RationalTF(tuple(np.polymul(self.num, other.num)), tuple(np.polymul(self.den, other.den)))

    def dc_gain(self) -> float:
        """N(0)/D(0) (inf for a pole at the origin)."""
        d0 = self.den[-1]
        return math.inf if d0 == 0.0 else self.num[-1] / d0

    def poles(self) -> NDArray[np.complex128]:
        """Roots of the denominator, rad/s."""
        return np.roots(self.den)

    def zeros(self) -> NDArray[np.complex128]:
        """Roots of the numerator, rad/s."""
        return np.roots(self.num)


def _first_order(tau_s: float) -> tuple[float, float]:
    return (tau_s, 1.0)


def buck_ccm_gvd(vg_v: float, l_h: float, c_f: float, r_ohm: float, esr_ohm: float = 0.0) -> RationalTF:
    """Buck CCM control-to-output Gvd(s), V per unit duty (Erickson 2nd ed., ch. 8, with ESR)."""
    num = np.asarray(_first_order(esr_ohm * c_f)) * vg_v
    den = (l_h * c_f * (1.0 + esr_ohm / r_ohm), l_h / r_ohm + esr_ohm * c_f, 1.0)
    return RationalTF(tuple(num), den)


def flyback_ccm_parameters(v_v: float, duty: float, n: float, lm_h: float, c_f: float,
                           r_ohm: float) -> tuple[float, float, float, float]:
    """(Gd0 V, ω0 rad/s, Q, ωz rad/s) of the CCM flyback, L′ = n²·Lm (Erickson 2nd ed., ch. 7–8)."""
    dp = 1.0 - duty
    lp = n * n * lm_h
    gd0 = v_v / (duty * dp)
    w0 = dp / math.sqrt(lp * c_f)
    q = dp * r_ohm * math.sqrt(c_f / lp)
    wz = dp * dp * r_ohm / (duty * lp)
    return gd0, w0, q, wz


def flyback_ccm_gvd(v_v: float, duty: float, n: float, lm_h: float, c_f: float, r_ohm: float,
                    esr_ohm: float = 0.0) -> RationalTF:
    """Flyback CCM Gvd(s): double pole, RHP zero and ESR zero, V per unit duty."""
    gd0, w0, q, wz = flyback_ccm_parameters(v_v, duty, n, lm_h, c_f, r_ohm)
    num = np.polymul((-gd0 / wz, gd0), _first_order(esr_ohm * c_f))
    den = (1.0 / (w0 * w0), 1.0 / (q * w0), 1.0)
    return RationalTF(tuple(num), den)


def flyback_dcm_gvd(v_v: float, duty: float, c_f: float, r_ohm: float, esr_ohm: float = 0.0) -> RationalTF:
    """Flyback DCM Gvd(s) = (V/D)(1 + s·rc·C)/(1 + s/ωp), ωp = 2/(RC) (Erickson 2nd ed., ch. 11)."""
    gd0 = v_v / duty
    wp = 2.0 / (r_ohm * c_f)
    return RationalTF(tuple(np.asarray(_first_order(esr_ohm * c_f)) * gd0), (1.0 / wp, 1.0))


def buck_dcm_gvd(v_v: float, vg_v: float, duty: float, c_f: float, r_ohm: float,
                 esr_ohm: float = 0.0) -> RationalTF:
    """Buck DCM Gvd(s): Gd0 = 2V(1−M)/(D(2−M)), ωp = (2−M)/((1−M)RC) (Erickson 2nd ed., ch. 11)."""
    m = v_v / vg_v
    gd0 = 2.0 * v_v * (1.0 - m) / (duty * (2.0 - m))
    wp = (2.0 - m) / ((1.0 - m) * r_ohm * c_f)
    return RationalTF(tuple(np.asarray(_first_order(esr_ohm * c_f)) * gd0), (1.0 / wp, 1.0))


def _parallel(a: tuple[NDArray, NDArray], b: tuple[NDArray, NDArray]) -> tuple[NDArray, NDArray]:
    """Parallel combination of two impedances given as (num, den)."""
    num = np.polymul(a[0], b[0])
    den = np.polyadd(np.polymul(a[0], b[1]), np.polymul(b[0], a[1]))
    return num, den


def output_impedance_open(r_series_ohm: float, l_eff_h: float, c_f: float, esr_ohm: float,
                          r_load_ohm: float) -> RationalTF:
    """Open-loop output impedance (r + sL) ∥ R ∥ (rc + 1/(sC)), Ω.

    Pass l_eff_h = 0 and r_series_ohm = r2 for the DCM output port (Erickson 2nd ed., ch. 11:
    r2 = R for the flyback, so ωp = 2/(RC)).
    """
    z_l = (np.array([l_eff_h, r_series_ohm]), np.array([1.0]))
    z_r = (np.array([r_load_ohm]), np.array([1.0]))
    z_c = (np.array([esr_ohm * c_f, 1.0]), np.array([c_f, 0.0]))
    num, den = _parallel(_parallel(z_l, z_r), z_c)
    return RationalTF(tuple(np.trim_zeros(num, "f")) or (0.0,), tuple(np.trim_zeros(den, "f")))


def type3_compensator(net: Type3Network, opamp_gain: float, opamp_gbw_hz: float) -> RationalTF:
    """Magnitude of an inverting type-3 stage with a single-pole op-amp, V/V.

    Gc = Zf·A/(Zi·(1 + A) + Zf), A = A0/(1 + s/ωa), ωa = 2π·GBW/A0; with A → ∞ it is Zf/Zi.
    Gc(0) = A0 because Zf is open at DC (the origin pole is limited by the finite gain).
    """
    ni = np.polymul([net.r1_ohm], [net.r3_ohm * net.c3_f, 1.0])
    di = np.array([(net.r1_ohm + net.r3_ohm) * net.c3_f, 1.0])
    nf = np.array([net.r2_ohm * net.c1_f, 1.0])
    df = np.array([net.r2_ohm * net.c1_f * net.c2_f, net.c1_f + net.c2_f, 0.0])
    wa = 2.0 * math.pi * opamp_gbw_hz / opamp_gain
    an = np.array([opamp_gain])
    ad = np.array([1.0 / wa, 1.0])
    num = np.polymul(np.polymul(nf, an), di)
    den = np.polyadd(np.polymul(np.polymul(ni, np.polyadd(an, ad)), df), np.polymul(np.polymul(nf, ad), di))
    return RationalTF(tuple(num), tuple(den))


def control_chain(design: ConverterDesign) -> RationalTF:
    """H·Gc(s)/Vm: sense divider, compensator and PWM modulator in series."""
    c = design.control
    return type3_compensator(c.compensator, c.opamp_gain, c.opamp_gbw_hz) * RationalTF.constant(
        c.divider_h / c.ramp_vm_v)


def plant_gvd(design: ConverterDesign, mode: str, vin_v: float, v_v: float, duty: float,
              r_load_ohm: float) -> RationalTF:
    """Control-to-output Gvd at an operating point, choosing the CCM or DCM model."""
    st = design.stage
    if design.topology == "buck":
        if mode == "CCM":
            return buck_ccm_gvd(vin_v, st.inductance_h, st.c_out_f, r_load_ohm, st.esr_ohm)
        return buck_dcm_gvd(v_v, vin_v, duty, st.c_out_f, r_load_ohm, st.esr_ohm)
    if mode == "CCM":
        return flyback_ccm_gvd(v_v, duty, st.turns_ratio, st.inductance_h, st.c_out_f, r_load_ohm, st.esr_ohm)
    return flyback_dcm_gvd(v_v, duty, st.c_out_f, r_load_ohm, st.esr_ohm)


def plant_zout_open(design: ConverterDesign, mode: str, vin_v: float, v_v: float, duty: float,
                    r_load_ohm: float) -> RationalTF:
    """Open-loop output impedance at an operating point, Ω (same pole set as ``plant_gvd``)."""
    st, ls = design.stage, design.losses
    dp = 1.0 - duty
    if mode == "CCM":
        if design.topology == "buck":
            r_s = duty * ls.r_switch_ohm + dp * ls.r_sync_ohm + ls.r_primary_ohm
            return output_impedance_open(r_s, st.inductance_h, st.c_out_f, st.esr_ohm, r_load_ohm)
        l_eff = st.turns_ratio ** 2 * st.inductance_h / (dp * dp)
        r_s = (ls.r_secondary_ohm + ls.rect_r_ohm) / dp
        return output_impedance_open(r_s, l_eff, st.c_out_f, st.esr_ohm, r_load_ohm)
    if design.topology == "buck":
        m = v_v / vin_v
        r2 = r_load_ohm * (1.0 - m)          # R ∥ r2 = R(1−M)/(2−M) gives ωp above
    else:
        r2 = r_load_ohm
    return output_impedance_open(r2, 0.0, st.c_out_f, st.esr_ohm, r_load_ohm)


def closed_loop_output_impedance(zout_open: RationalTF, loop: RationalTF) -> RationalTF:
    """Zout_closed(s) = Zout_open(s)/(1 + T(s)) as one rational function, Ω (Erickson 2nd ed., ch. 9)."""
    num = np.polymul(zout_open.num, loop.den)
    den = np.polymul(zout_open.den, np.polyadd(loop.den, loop.num))
    return RationalTF(tuple(num), tuple(den))
