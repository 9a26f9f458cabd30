"""CCM/DCM classification on textbook buck waveforms, and the boundary helpers.

Waveforms follow Erickson & Maksimović, Fundamentals of Power Electronics, 2nd ed.
(from memory): ch. 2 for CCM (switch current ramps from I - ΔI/2 to I + ΔI/2 during
D·Ts, ΔI = (Vg - V)·D·Ts/L), ch. 5 for DCM (current ramps from zero; M = 2/(1 + √(1 + 4K/D²)),
second subinterval D2 = D·(Vg - V)/V, idle subinterval D3 = 1 - D - D2).
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from benchctl.analysis.conduction_mode import (
    CCM,
    DCM,
    buck_boundary_load_current_a,
    classify_conduction_mode,
    conduction_mode_from_idle_interval,
    find_boundary,
    flyback_boundary_load_current_a,
    k_crit_buck,
    k_crit_flyback,
    k_parameter,
)
from benchctl.errors import AnalysisInputError

VG, V, L_H, FS = 12.0, 5.0, 10e-6, 500e3  # buck example computed from ERICKSON-2E ch. 2 and 5 formulas [calc]
TS = 1.0 / FS
N_PER = 200
PERIODS = 10


def _buck(i_load_a: float, *, spike_a: float = 0.0, noise_a: float = 0.0, seed: int = 7):
    """Switch current, inductor current and gate drive of an ideal buck at i_load_a (textbook)."""
    m = V / VG
    r = V / i_load_a
    k = 2 * L_H / (r * TS)
    if k >= 1 - m:  # CCM (Erickson ch. 2)
        d = m
        di = (VG - V) * d * TS / L_H
        i_start = i_load_a - di / 2
        d2 = 1 - d
    else:  # DCM (Erickson ch. 5): invert M = 2/(1 + sqrt(1 + 4K/D^2)) for D
        d = 2 * math.sqrt(k) / math.sqrt((2 / m - 1) ** 2 - 1)
        i_start = 0.0
        d2 = d * (VG - V) / V
    up = (VG - V) / L_H
    down = V / L_H
    t = np.arange(PERIODS * N_PER) * (TS / N_PER)
    ph = (t % TS) / TS
    on = ph < d
    i_pk = i_start + up * d * TS
    i_l = np.where(on, i_start + up * ph * TS, np.maximum(i_pk - down * (ph - d) * TS, 0.0))
    i_sw = np.where(on, i_l, 0.0)
    if spike_a:
        i_sw = i_sw + np.where(on, spike_a * np.exp(-(ph * TS) / 10e-9), 0.0)
    if noise_a:
        i_sw = i_sw + np.random.default_rng(seed).normal(0.0, noise_a, t.size)
    gate = np.where(on, 10.0, 0.0)
    return t, i_sw, i_l, gate, d, d2, i_start, i_pk


def test_ccm_start_current_is_valley_with_gate_and_spike():
    t, i_sw, _, gate, d, _, i_start, i_pk = _buck(1.0, spike_a=1.5, noise_a=0.005)
    res = classify_conduction_mode(t, i_sw, v_gate_v=gate)
    # Erickson 2nd ed. ch. 2: start = I - dI/2 = 1 - 0.5833/2 = 0.7083 A, peak = 1.2917 A
    assert i_start == pytest.approx(1.0 - 0.58333 / 2, abs=1e-4)
    assert res.mode == CCM
    assert res.start_current_a == pytest.approx(i_start, abs=0.01)
    assert res.peak_current_a == pytest.approx(i_pk, abs=0.03)
    assert res.ratio == pytest.approx(res.start_current_a / res.peak_current_a)
    # the record starts inside the first on-time, which therefore has no turn-on edge
    assert res.cycles_used == PERIODS - 1
    assert "detection limit" in res.reason and res.rule == "detection" and res.threshold_ratio is None


def test_ccm_found_from_current_edges_only():
    t, i_sw, _, _, _, _, i_start, _ = _buck(1.0, spike_a=1.5)
    res = classify_conduction_mode(t, i_sw, fsw_hz=FS)
    assert res.mode == CCM
    assert res.start_current_a == pytest.approx(i_start, abs=0.01)  # Erickson ch. 2, I - dI/2


def test_dcm_triangle_starts_from_zero():
    t, i_sw, _, gate, d, _, _, i_pk = _buck(0.1, spike_a=0.3)
    # DCM peak = (Vg - V)*D*Ts/L (Erickson ch. 5)
    assert i_pk == pytest.approx((VG - V) * d * TS / L_H)
    res = classify_conduction_mode(t, i_sw, v_gate_v=gate)
    assert res.mode == DCM
    assert abs(res.start_current_a) < 0.01 * i_pk + 2e-3
    assert res.peak_current_a == pytest.approx(i_pk, rel=0.03)
    res_no_gate = classify_conduction_mode(t, i_sw)
    assert res_no_gate.mode == DCM
    assert res_no_gate.ratio <= 0.06  # reads at most the 5 % zero band


def test_idle_interval_method_on_inductor_current():
    t, _, i_l, _, d, d2, _, _ = _buck(0.1)
    res = conduction_mode_from_idle_interval(t, i_l)
    assert res.mode == DCM
    # idle fraction D3 = 1 - D - D2 (Erickson 2nd ed. ch. 5, from memory); zero band is 2 % of peak
    assert res.idle_fraction == pytest.approx(1 - d - d2, abs=0.02)
    assert res.cycles_used == PERIODS - 1
    t, _, i_l, _, _, _, i_start, _ = _buck(1.0)
    res = conduction_mode_from_idle_interval(t, i_l)
    assert res.mode == CCM
    assert res.start_current_a == pytest.approx(i_start, abs=0.01)  # valley I - dI/2 (ch. 2)


def test_k_and_boundary_currents_match_reference_values():
    # [calc] from ERICKSON-2E ch. 5 (from memory): buck 12 -> 5 V, 10 uH, R 1 Ohm, 500 kHz
    assert k_parameter(L_H, 1.0, FS) == pytest.approx(10.0)
    assert k_crit_buck(V / VG) == pytest.approx(0.5833, abs=1e-4)
    i_crit = buck_boundary_load_current_a(VG, V, L_H, FS)
    assert i_crit == pytest.approx(0.2917, abs=1e-4)
    # at the boundary load K equals K_crit (definition of the boundary)
    assert k_parameter(L_H, V / i_crit, FS) == pytest.approx(k_crit_buck(V / VG), rel=1e-12)

    # flyback Vg 48 V, n = Ns/Np = 0.25, Lm 200 uH, R 6 Ohm, D 0.5, 100 kHz: K 0.417 vs 0.25 -> CCM
    n, lm, fs_fb = 0.25, 200e-6, 100e3
    assert k_parameter(n**2 * lm, 6.0, fs_fb) == pytest.approx(0.4167, abs=1e-4)
    assert k_crit_flyback(0.5) == pytest.approx(0.25)
    # Lm 20 uH, R 12 Ohm, D = 0.14434: K 0.0208 vs 0.732 -> DCM
    assert k_parameter(n**2 * 20e-6, 12.0, fs_fb) == pytest.approx(0.0208, abs=1e-4)
    assert k_crit_flyback(0.14434) == pytest.approx(0.732, abs=1e-3)

    # flyback boundary current re-derived from the secondary (diode) current: at the boundary it
    # falls from I_pk = V*D'*Ts/L' to zero during D'*Ts, so I_out = I_pk*D'/2 (Erickson ch. 6, mem)
    v_out = 12.0
    i_fb = flyback_boundary_load_current_a(48.0, v_out, lm, fs_fb, n)
    d = v_out / (v_out + n * 48.0)  # CCM flyback M = n*D/(1-D)
    l_sec = n**2 * lm
    i_pk_sec = v_out * (1 - d) / (fs_fb * l_sec)
    assert i_fb == pytest.approx(i_pk_sec * (1 - d) / 2, rel=1e-12)
    assert i_fb < v_out / 6.0  # R = 6 Ohm draws 2 A, above the boundary: CCM (K vs K_crit, ERICKSON-2E ch. 5)


def test_find_boundary_with_textbook_classifier():
    i_crit = buck_boundary_load_current_a(VG, V, L_H, FS)

    def classify(i_load_a: float) -> str:
        # Erickson ch. 5: DCM when K < K_crit
        return CCM if k_parameter(L_H, V / i_load_a, FS) > k_crit_buck(V / VG) else DCM

    res = find_boundary(classify, 0.01, 2.0, 1e-4)
    assert res.found
    assert res.lo_mode == DCM and res.hi_mode == CCM
    assert res.boundary == pytest.approx(i_crit, abs=1e-4)
    assert res.hi_value - res.lo_value <= 1e-4
    # bisection count: 2 end points + ceil(log2(range/tol)) midpoints (numerical-methods texts)
    assert len(res.evaluations) == 2 + math.ceil(math.log2((2.0 - 0.01) / 1e-4))


def test_find_boundary_driven_by_waveform_measurements():
    th = 0.1
    di = (VG - V) * (V / VG) * TS / L_H

    def classify(i_load_a: float) -> str:
        t, i_sw, _, gate, *_ = _buck(i_load_a, spike_a=1.0)
        return classify_conduction_mode(t, i_sw, v_gate_v=gate, threshold_ratio=th).mode

    res = find_boundary(classify, 0.05, 1.0, 2e-3)
    # CCM start/peak = (I - dI/2)/(I + dI/2) (Erickson ch. 2) reaches th at I = dI/2*(1+th)/(1-th)
    assert res.found
    assert res.boundary == pytest.approx(di / 2 * (1 + th) / (1 - th), abs=5e-3)


def test_find_boundary_not_found_is_explicit():
    res = find_boundary(lambda x: CCM, 1.0, 2.0, 0.1)
    assert not res.found and res.boundary is None
    assert "widen the range" in res.reason
    with pytest.raises(AnalysisInputError, match="lo < hi"):
        find_boundary(lambda x: CCM, 2.0, 1.0, 0.1)


def test_input_errors():
    t, i_sw, _, gate, *_ = _buck(1.0)
    with pytest.raises(AnalysisInputError, match="never rises above zero"):
        classify_conduction_mode(t, np.zeros_like(t))
    with pytest.raises(AnalysisInputError, match="does not switch"):
        classify_conduction_mode(t, i_sw, v_gate_v=np.ones_like(t))
    with pytest.raises(AnalysisInputError, match="pass arrays from the same capture"):
        classify_conduction_mode(t, i_sw[:-1])
    with pytest.raises(AnalysisInputError, match="no complete on-time"):
        classify_conduction_mode(t, i_sw, v_gate_v=gate, blanking_s=TS)
    with pytest.raises(AnalysisInputError, match="duty"):
        k_crit_buck(1.5)
    with pytest.raises(AnalysisInputError, match="vout_v < vin_v"):
        buck_boundary_load_current_a(5.0, 12.0, L_H, FS)


@pytest.mark.parametrize("with_gate", [True, False])
def test_light_load_ccm_is_ccm_without_a_threshold(with_gate):
    # CCM start/peak = (I - dI/2)/(I + dI/2) (Erickson 2nd ed. ch. 2): 6 % at I = dI/2 * 1.06/0.94
    di = (VG - V) * (V / VG) * TS / L_H
    i_load = di / 2 * 1.06 / 0.94
    t, i_sw, _, gate, _, _, i_start, i_pk = _buck(i_load, spike_a=1.0, noise_a=0.005)
    assert i_start / i_pk == pytest.approx(0.06, abs=1e-9)
    res = classify_conduction_mode(t, i_sw, v_gate_v=gate if with_gate else None, fsw_hz=FS)
    assert res.mode == CCM and res.rule == "detection"
    # the start current is the valley I - dI/2, read within one sample's worth of ramp
    # (dI/(D*N_PER) = 7 mA here) and the noise
    ramp_per_sample = (VG - V) / L_H * TS / N_PER
    assert i_start - ramp_per_sample - 0.003 <= res.start_current_a <= i_start + 0.003
    assert res.detection_limit_a < 0.3 * i_start
    # the start/peak threshold of 0.1 calls the same cycles DCM: the bias the default rule avoids
    assert classify_conduction_mode(t, i_sw, v_gate_v=gate if with_gate else None, fsw_hz=FS,
                                    threshold_ratio=0.1).mode == DCM
    # just below the boundary I_crit = dI/2 (Erickson ch. 5) the current starts from zero: DCM
    t, i_sw, _, gate, *_ = _buck(0.95 * di / 2, spike_a=1.0, noise_a=0.005)
    below = classify_conduction_mode(t, i_sw, v_gate_v=gate if with_gate else None, fsw_hz=FS)
    assert below.mode == DCM and abs(below.start_current_a) <= below.detection_limit_a + ramp_per_sample


@pytest.mark.parametrize("with_gate", [True, False])
def test_boundary_with_the_detection_rule_is_the_textbook_one(with_gate):
    # the buck boundary is I_crit = dI/2 (Erickson 2nd ed. ch. 5); the detection rule finds it within
    # its own limit plus one sample's worth of ramp (2-4 % here), where r = 0.1 lands at +22 %
    i_crit = buck_boundary_load_current_a(VG, V, L_H, FS)

    def classify(i_load_a: float) -> str:
        t, i_sw, _, gate, *_ = _buck(i_load_a, spike_a=1.0, noise_a=0.002)
        return classify_conduction_mode(t, i_sw, v_gate_v=gate if with_gate else None, fsw_hz=FS).mode

    res = find_boundary(classify, 0.05, 1.0, 1e-3)
    assert res.found and res.lo_mode == DCM
    assert i_crit <= res.boundary <= 1.05 * i_crit


def test_threshold_ratio_none_or_inside_zero_one():
    t, i_sw, _, gate, *_ = _buck(1.0)
    with pytest.raises(AnalysisInputError, match="between 0 and 1"):
        classify_conduction_mode(t, i_sw, v_gate_v=gate, threshold_ratio=0.0)
    res = classify_conduction_mode(t, i_sw, v_gate_v=gate, threshold_ratio=0.2)
    assert res.rule == "threshold" and res.threshold_ratio == 0.2 and res.detection_limit_a is None
