"""Static (cycle-averaged) power-stage models with resistive drops.

Given the duty D, the input voltage and the load line I(V) = i0_a + g_s·V seen by
the power stage, return the output voltage at the sense point and the current
waveform parameters (peaks, rms, averages) the loss model needs.

Method: volt-second balance on the inductor with conduction drops evaluated at the
interval-average current (the averaged equivalent circuit of Erickson &
Maksimović, *Fundamentals of Power Electronics*, 2nd ed., ch. 3); DCM from the
three-interval waveforms (ibid. ch. 5).  With all resistances and drops zero the
models reduce exactly to M = D and M = 2/(1+√(1+4K/D²)) (buck), M = n·D/(1−D) and
M = n·D/√K′ = D/√(2Lm/(R·Ts)) (flyback).  The conduction mode is read from the
waveform: CCM while the inductor (magnetizing) current valley stays above zero.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Literal

from scipy.optimize import brentq

from .design import ConverterDesign

ConductionMode = Literal["CCM", "DCM", "none"]


@dataclass(frozen=True)
class LoadLine:
    """Current the power stage must deliver at sense voltage V: I = i0_a + g_s·V (A, S)."""

    i0_a: float
    g_s: float

    def current_a(self, v_v: float) -> float:
        """Stage output current at ``v_v`` volts, A."""
        return self.i0_a + self.g_s * v_v


@dataclass(frozen=True)
class StagePoint:
    """One cycle-averaged operating point of the power stage.

    Currents of the flyback primary side (``sw_*``, ``l_*``) are primary quantities;
    ``rect_*`` are secondary (rectifier) quantities.  For the buck ``rect_*`` is the
    low-side switch.  d2 is the freewheeling interval as a fraction of Ts.
    """

    duty: float
    d2: float
    mode: ConductionMode
    vin_v: float
    v_v: float
    i_a: float
    l_peak_a: float
    l_valley_a: float
    l_ripple_pp_a: float
    sw_rms_a: float
    sw_avg_a: float
    rect_rms_a: float
    rect_avg_a: float
    l_rms_a: float
    cap_rms_a: float
    volt_seconds_vs: float


def _trapezoid_rms2(i_avg: float, ripple_pp: float, fraction: float) -> float:
    """Mean square over a cycle of a ramp centred on i_avg, ripple_pp wide, conducting ``fraction``."""
    return fraction * (i_avg * i_avg + ripple_pp * ripple_pp / 12.0)


def _flyback(design: ConverterDesign, duty: float, vin_v: float, load: LoadLine) -> StagePoint:
    st, ls = design.stage, design.losses
    n, lm, ts = st.turns_ratio, st.inductance_h, design.ts_s
    d = duty
    dp = 1.0 - d
    rp = ls.r_switch_ohm + ls.r_primary_ohm
    rs = ls.r_secondary_ohm + ls.rect_r_ohm
    vf = ls.rect_vf_v
    # --- CCM candidate: V = A - B·I (affine in the stage current) ---
    a = n * d * vin_v / dp - vf
    b = n * n * d * rp / (dp * dp) + rs / dp
    v = (a - b * load.i0_a) / (1.0 + b * load.g_s)
    i = load.current_a(v)
    i_m = n * i / dp                                  # primary-referred magnetizing current, A
    ripple = (vin_v - i_m * rp) * d * ts / lm
    valley = i_m - ripple / 2.0
    if valley >= 0.0 or d <= 0.0:
        peak = i_m + ripple / 2.0
        sw2 = _trapezoid_rms2(i_m, ripple, d)
        rect2 = _trapezoid_rms2(i_m / n, ripple / n, dp)
        l2 = _trapezoid_rms2(i_m, ripple, 1.0)
        return StagePoint(d, dp, "CCM", vin_v, v, i, peak, valley, ripple, math.sqrt(sw2), d * i_m,
                          math.sqrt(rect2), i, math.sqrt(l2), math.sqrt(max(rect2 - i * i, 0.0)),
                          vin_v * d * ts)
    # --- DCM: energy ½·Lm·Ipk² per cycle feeds the secondary ---
    i_pk = vin_v * d * ts / (lm + rp * d * ts / 2.0)
    vx = vf + (i_pk / (2.0 * n)) * rs
    e_w = 0.5 * lm * i_pk * i_pk / ts
    g, i0 = load.g_s, load.i0_a
    bq = g * vx + i0
    cq = i0 * vx - e_w
    if g > 0.0:
        v = (-bq + math.sqrt(bq * bq - 4.0 * g * cq)) / (2.0 * g)
    else:
        v = -cq / bq
    i = load.current_a(v)
    d2 = 2.0 * n * i / i_pk if i_pk > 0.0 else 0.0
    sw2 = d * i_pk * i_pk / 3.0
    rect2 = d2 * (i_pk / n) ** 2 / 3.0
    return StagePoint(d, d2, "DCM", vin_v, v, i, i_pk, 0.0, i_pk, math.sqrt(sw2), d * i_pk / 2.0,
                      math.sqrt(rect2), i, math.sqrt(sw2 + d2 * i_pk * i_pk / 3.0),
                      math.sqrt(max(rect2 - i * i, 0.0)), vin_v * d * ts)


def _buck(design: ConverterDesign, duty: float, vin_v: float, load: LoadLine) -> StagePoint:
    st, ls = design.stage, design.losses
    lo, ts = st.inductance_h, design.ts_s
    d = duty
    dp = 1.0 - d
    rh = ls.r_switch_ohm + ls.r_primary_ohm        # on-interval series resistance
    rl = ls.r_sync_ohm + ls.r_primary_ohm          # freewheel-interval series resistance
    a = d * vin_v
    b = d * ls.r_switch_ohm + dp * ls.r_sync_ohm + ls.r_primary_ohm
    v = (a - b * load.i0_a) / (1.0 + b * load.g_s)
    i = load.current_a(v)
    ripple = (vin_v - v - i * rh) * d * ts / lo
    valley = i - ripple / 2.0
    if valley >= 0.0 or d <= 0.0:
        l2 = _trapezoid_rms2(i, ripple, 1.0)
        sw2 = _trapezoid_rms2(i, ripple, d)
        rect2 = _trapezoid_rms2(i, ripple, dp)
        return StagePoint(d, dp, "CCM", vin_v, v, i, i + ripple / 2.0, valley, ripple, math.sqrt(sw2),
                          d * i, math.sqrt(rect2), dp * i, math.sqrt(l2),
                          math.sqrt(max(l2 - i * i, 0.0)), (vin_v - v) * d * ts)
    # --- DCM with diode emulation: low-side switch opens at zero current ---

    def peak(vo: float) -> float:
        return max(vin_v - vo, 0.0) * d * ts / (lo + rh * d * ts / 2.0)

    def d2_of(vo: float, ipk: float) -> float:
        return lo * ipk / (ts * (vo + ipk * rl / 2.0)) if ipk > 0.0 else 0.0

    def residual(vo: float) -> float:
        ipk = peak(vo)
        return ipk * (d + d2_of(vo, ipk)) / 2.0 - load.current_a(vo)

    lo_v = 1e-12 * max(vin_v, 1.0)
    v = lo_v if residual(lo_v) <= 0.0 else brentq(residual, lo_v, vin_v, xtol=1e-12, rtol=1e-12)
    ipk = peak(v)
    d2 = min(d2_of(v, ipk), dp)
    i = load.current_a(v)
    sw2 = d * ipk * ipk / 3.0
    rect2 = d2 * ipk * ipk / 3.0
    l2 = sw2 + rect2
    return StagePoint(d, d2, "DCM", vin_v, v, i, ipk, 0.0, ipk, math.sqrt(sw2), d * ipk / 2.0,
                      math.sqrt(rect2), d2 * ipk / 2.0, math.sqrt(l2), math.sqrt(max(l2 - i * i, 0.0)),
                      (vin_v - v) * d * ts)


def stage_point(design: ConverterDesign, duty: float, vin_v: float, load: LoadLine) -> StagePoint:
    """Power-stage operating point at duty ``duty`` (0..1), input ``vin_v`` (V), load line ``load``."""
    if design.topology == "buck":
        return _buck(design, duty, vin_v, load)
    return _flyback(design, duty, vin_v, load)


def duty_for_output(design: ConverterDesign, v_target_v: float, vin_v: float, load: LoadLine) -> StagePoint:
    """Stage point whose sense voltage equals ``v_target_v`` (used in current limit).

    Solved with scipy.optimize.brentq on D ∈ [0, max_duty]; clamps at the ends.
    """
    dmax = design.stage.max_duty

    def f(d: float) -> float:
        return stage_point(design, d, vin_v, load).v_v - v_target_v

    if f(dmax) <= 0.0:
        return stage_point(design, dmax, vin_v, load)
    if f(0.0) >= 0.0:
        return stage_point(design, 0.0, vin_v, load)
    return stage_point(design, brentq(f, 0.0, dmax, xtol=1e-14, rtol=1e-13), vin_v, load)
