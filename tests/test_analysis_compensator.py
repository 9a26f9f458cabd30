"""K-factor compensator design checked against its formulas and python-control margins.

K factor: H. D. Venable, "The K Factor: A New Mathematical Tool for Stability Analysis and
Synthesis," Proc. Powercon 10, 1983 (formulas from memory; VENABLE-1983 in benchctl.references, "Compensators:
K-factor"); margins: python-control ``control.margin`` -> (gm ratio, pm deg, wpc, wgc) rad/s.
"""

from __future__ import annotations

import math

import control
import numpy as np
import pytest
import scipy.signal

from benchctl.analysis.compensator import (
    CompensatorDesign,
    CompensatorParts,
    MeasuredPlant,
    compensator_response,
    design_type2,
    design_type3,
)
from benchctl.analysis.eseries import SERIES
from benchctl.analysis.plant_fit import fit_plant
from benchctl.errors import AnalysisInputError

S = control.tf("s")
TWO_PI = 2.0 * math.pi


def _tf_callable(sys: control.TransferFunction):
    num = np.asarray(sys.num[0][0], dtype=float)
    den = np.asarray(sys.den[0][0], dtype=float)

    def response(freq_hz: np.ndarray) -> np.ndarray:
        _, h = scipy.signal.freqs(num, den, worN=TWO_PI * np.atleast_1d(freq_hz))
        return h

    return response


def _gc_tf(p: CompensatorParts) -> control.TransferFunction:
    """Loop factor Z_f/Z_in built independently from impedances in python-control algebra."""
    z_f_branch = p.r2_ohm + 1 / (S * p.c1_f)
    z_c2 = 1 / (S * p.c2_f)
    z_f = z_f_branch * z_c2 / (z_f_branch + z_c2)
    if p.kind == 2:
        return control.minreal(z_f / p.r1_ohm, verbose=False)
    z_b = p.r3_ohm + 1 / (S * p.c3_f)
    z_in = p.r1_ohm * z_b / (p.r1_ohm + z_b)
    return control.minreal(z_f / z_in, verbose=False)


def _in_series(value: float, series: str) -> bool:
    m = value / 10 ** math.floor(math.log10(value))
    return any(abs(m - x) < 1e-9 for x in SERIES[series] + (10.0,))


PLANT_RC = 10 / (1 + S / (TWO_PI * 500))  # worked-example plant [calc]


def test_type2_worked_example() -> None:
    fc, pm, r1 = 10e3, 60.0, 10e3
    d = design_type2(_tf_callable(PLANT_RC), crossover_hz=fc, phase_margin_deg=pm, r1_ohm=r1)
    # Re-derived from Venable's formulas (VENABLE-1983, from memory):
    p_deg = -math.degrees(math.atan(fc / 500))
    g = math.sqrt(1 + (fc / 500) ** 2) / 10
    boost = pm - p_deg - 90
    k = math.tan(math.radians(boost / 2 + 45))
    c2 = 1 / (TWO_PI * fc * g * k * r1)
    c1 = c2 * (k * k - 1)
    r2 = k / (TWO_PI * fc * c1)
    assert d.plant_phase_deg == pytest.approx(p_deg, abs=1e-9)
    assert d.boost_deg == pytest.approx(boost, abs=1e-9)
    assert d.k_factor == pytest.approx(k, rel=1e-12)
    assert d.zero_hz == pytest.approx(fc / k, rel=1e-12)
    assert d.pole_hz == pytest.approx(fc * k, rel=1e-12)
    assert d.ideal_parts.c2_f == pytest.approx(c2, rel=1e-9)
    assert d.ideal_parts.c1_f == pytest.approx(c1, rel=1e-9)
    assert d.ideal_parts.r2_ohm == pytest.approx(r2, rel=1e-9)
    # worked example [calc]: P -87.14 deg, boost 57.14, K 3.3909, fz 2.949 kHz,
    # fp 33.91 kHz, C2 234.4 pF, C1 2.461 nF, R2 21.93 kOhm.
    assert d.plant_phase_deg == pytest.approx(-87.14, abs=0.005)
    assert d.k_factor == pytest.approx(3.3909, abs=5e-5)
    assert d.zero_hz == pytest.approx(2949, rel=5e-4)
    assert d.pole_hz == pytest.approx(33910, rel=5e-4)
    assert d.ideal_parts.c2_f == pytest.approx(234.4e-12, rel=5e-4)
    assert d.ideal_parts.c1_f == pytest.approx(2.461e-9, rel=5e-4)
    assert d.ideal_parts.r2_ohm == pytest.approx(21.93e3, rel=5e-4)
    assert d.warnings == ()


def test_type2_predicted_margins_match_python_control() -> None:
    d = design_type2(_tf_callable(PLANT_RC), crossover_hz=10e3, phase_margin_deg=60.0)
    # [calc] python-control control.margin -> PM 60.00 deg at 10 kHz with the ideal parts.
    _gm, pm, _wpc, wgc = control.margin(_gc_tf(d.ideal_parts) * PLANT_RC)
    assert pm == pytest.approx(60.0, abs=0.01)
    assert wgc / TWO_PI == pytest.approx(10e3, rel=1e-4)
    assert d.predicted_ideal.worst_phase_margin_deg == pytest.approx(pm, abs=0.02)
    assert d.predicted_ideal.crossover_hz == pytest.approx(wgc / TWO_PI, rel=2e-4)
    # rounded parts: E96 resistors, E12 capacitors; margins agree with python-control
    for v in (d.rounded_parts.r2_ohm,):
        assert _in_series(v, "E96")
    for v in (d.rounded_parts.c1_f, d.rounded_parts.c2_f):
        assert _in_series(v, "E12")
    _gm, pm_r, _wpc, wgc_r = control.margin(_gc_tf(d.rounded_parts) * PLANT_RC)
    assert d.predicted_phase_margin_deg == pytest.approx(pm_r, abs=0.02)
    assert d.predicted_crossover_hz == pytest.approx(wgc_r / TWO_PI, rel=2e-4)
    assert d.predicted_gain_margin_db is None  # one-pole plant x type 2 never reaches -180 deg


def _pol_buck_plant() -> control.TransferFunction:
    """12 V -> 1.2 V point-of-load buck, CCM Gvd (Erickson & Maksimovic 2nd ed. ch. 8, from
    memory), times a 1 V PWM ramp: L 2.2 uH, C 200 uF, ESR 2 mOhm, R 0.12 Ohm (10 A)."""
    vg, l_h, c_f, rc, r = 12.0, 2.2e-6, 200e-6, 2e-3, 0.12
    return vg * (1 + S * rc * c_f) / (1 + S * (l_h / r + rc * c_f) + S**2 * l_h * c_f * (1 + rc / r))


def test_type3_on_double_pole_plant_reaches_target() -> None:
    plant = _pol_buck_plant()
    fc, pm = 40e3, 60.0
    d = design_type3(_tf_callable(plant), crossover_hz=fc, phase_margin_deg=pm, fsw_hz=500e3)
    # Venable type 3 formulas (from memory), re-derived:
    _, h_fc = scipy.signal.freqs(plant.num[0][0], plant.den[0][0], worN=[TWO_PI * fc])
    p_deg = math.degrees(np.angle(h_fc[0]))
    boost = pm - p_deg - 90
    k = math.tan(math.radians(boost / 4 + 45)) ** 2
    assert d.boost_deg == pytest.approx(boost, abs=1e-6)
    assert d.k_factor == pytest.approx(k, rel=1e-9)
    assert d.zero_hz == pytest.approx(fc / math.sqrt(k), rel=1e-9)
    assert d.pole_hz == pytest.approx(fc * math.sqrt(k), rel=1e-9)
    r1 = 10e3
    assert d.ideal_parts.r3_ohm == pytest.approx(r1 / (k - 1), rel=1e-9)
    assert d.ideal_parts.c3_f == pytest.approx(1 / (TWO_PI * fc * math.sqrt(k) * r1 / (k - 1)), rel=1e-9)
    # python-control control.margin on Gc * plant: ideal parts hit the target (tolerance
    # 0.05 deg, 0.1 % in fc); rounded E96/E12 parts within 5 deg and 10 % (stated).
    _gm, pm_i, _wpc, wgc_i = control.margin(_gc_tf(d.ideal_parts) * plant)
    assert pm_i == pytest.approx(pm, abs=0.05)
    assert wgc_i / TWO_PI == pytest.approx(fc, rel=1e-3)
    assert d.predicted_ideal.worst_phase_margin_deg == pytest.approx(pm_i, abs=0.05)
    gm_r, pm_r, _wpc, wgc_r = control.margin(_gc_tf(d.rounded_parts) * plant)
    assert pm_r == pytest.approx(pm, abs=5.0)
    assert wgc_r / TWO_PI == pytest.approx(fc, rel=0.10)
    assert d.predicted_phase_margin_deg == pytest.approx(pm_r, abs=0.05)
    assert d.predicted_crossover_hz == pytest.approx(wgc_r / TWO_PI, rel=1e-3)
    assert d.predicted_gain_margin_db == pytest.approx(20 * math.log10(gm_r), abs=0.05)
    assert d.warnings == ()


def test_compensator_response_matches_impedance_network() -> None:
    # Inverting op-amp: V_out/V_in = -Z_f/Z_in (common practice); the loop factor is Z_f/Z_in.
    parts3 = CompensatorParts(kind=3, r1_ohm=10e3, r2_ohm=4.7e3, c1_f=10e-9, c2_f=220e-12, r3_ohm=330.0, c3_f=2.2e-9)
    parts2 = CompensatorParts(kind=2, r1_ohm=10e3, r2_ohm=22e3, c1_f=2.7e-9, c2_f=220e-12)
    f = np.logspace(1, 6, 101)
    for parts in (parts2, parts3):
        ref = _tf_callable(_gc_tf(parts))(f)
        np.testing.assert_allclose(compensator_response(f, parts), ref, rtol=1e-9)
        np.testing.assert_allclose(compensator_response(f, parts, inverting=True), -ref, rtol=1e-9)


def test_phase_boost_at_crossover_is_the_designed_boost() -> None:
    # Venable: the loop factor has phase -90 + boost at fc (geometric mean of zero and pole).
    d = design_type3(_tf_callable(_pol_buck_plant()), crossover_hz=40e3, phase_margin_deg=55.0)
    ph = math.degrees(np.angle(compensator_response(np.array([40e3]), d.ideal_parts)[0]))
    assert ph == pytest.approx(-90 + d.boost_deg, abs=1e-6)
    d2 = design_type2(_tf_callable(PLANT_RC), crossover_hz=10e3, phase_margin_deg=60.0)
    ph2 = math.degrees(np.angle(compensator_response(np.array([10e3]), d2.ideal_parts)[0]))
    assert ph2 == pytest.approx(-90 + d2.boost_deg, abs=1e-6)
    # and |Gc(fc)| = 1/|plant(fc)| (Venable's G)
    g = abs(compensator_response(np.array([10e3]), d2.ideal_parts)[0])
    assert g == pytest.approx(10 ** (-d2.plant_gain_db / 20), rel=1e-9)


def test_type2_impossible_boost_warns() -> None:
    # Double-pole plant near -180 deg at fc: boost = 60 + ~170 - 90 > 90 deg (type 2 limit,
    # VENABLE-1983).
    d = design_type2(_tf_callable(_pol_buck_plant()), crossover_hz=40e3, phase_margin_deg=60.0)
    assert d.boost_required_deg > 90.0
    assert d.boost_deg == pytest.approx(85.0)
    assert any("impossible for a type 2" in w for w in d.warnings)
    # the predicted margin says the truth: well short of 60 deg (python-control check)
    _gm, pm_r, _wpc, _wgc = control.margin(_gc_tf(d.rounded_parts) * _pol_buck_plant())
    assert pm_r < 30.0
    assert d.predicted_phase_margin_deg == pytest.approx(pm_r, abs=0.1)


def test_fsw_and_rhp_zero_rules_of_thumb_warn() -> None:
    # Common practice: fc <= fsw/5 and fc <= f_RHPz/3.
    plant = _tf_callable(_pol_buck_plant())
    d = design_type3(plant, crossover_hz=150e3, phase_margin_deg=60.0, fsw_hz=500e3)
    assert any("fsw/5" in w for w in d.warnings)
    d = design_type3(plant, crossover_hz=40e3, phase_margin_deg=60.0, fsw_hz=500e3, rhp_zero_hz=90e3)
    assert any("f_RHPz/3" in w for w in d.warnings)
    assert not any("fsw/5" in w for w in d.warnings)


def test_rhp_zero_taken_from_a_fitted_flyback_plant() -> None:
    # Flyback CCM Gvd at Vg 48 V (worked example [calc]): f0 1038.21 Hz,
    # Q 18.40, RHP zero 38.197 kHz, Gd0 48 V; 30 mOhm ESR on 470 uF.
    w0, q, wz, wesr = TWO_PI * 1038.21, 18.40, TWO_PI * 38197.0, 1 / (0.03 * 470e-6)
    gvd = 48 * (1 - S / wz) * (1 + S / wesr) / (1 + S / (q * w0) + S**2 / w0**2) / 2.5  # 2.5 V ramp
    f = np.logspace(1, 5.5, 271)
    fit = fit_plant(f, _tf_callable(gvd)(f), num_order=2, den_order=2)
    assert fit.rhp_zero_freqs_hz[0] == pytest.approx(38197.0, rel=1e-6)
    high = design_type3(fit, crossover_hz=20e3, phase_margin_deg=60.0, fsw_hz=200e3)
    assert any("f_RHPz/3" in w for w in high.warnings)
    low = design_type3(fit, crossover_hz=5e3, phase_margin_deg=60.0, fsw_hz=200e3)
    assert not any("f_RHPz/3" in w for w in low.warnings)
    # the RHP zero's lag is included in P (unwrapped from low frequency), so the target holds:
    _gm, pm, _wpc, _wgc = control.margin(_gc_tf(low.ideal_parts) * gvd)
    assert pm == pytest.approx(60.0, abs=0.1)


def test_measured_plant_arrays_give_the_same_design() -> None:
    # A plant given as 50 points/decade arrays, interpolated at fc, matches the exact design
    # within 0.1 % in K (interpolation tolerance stated).
    f = np.logspace(1, 6, 251)
    measured = MeasuredPlant(f, _tf_callable(PLANT_RC)(f))
    d_meas = design_type2(measured, crossover_hz=10e3, phase_margin_deg=60.0)
    d_exact = design_type2(_tf_callable(PLANT_RC), crossover_hz=10e3, phase_margin_deg=60.0)
    assert d_meas.k_factor == pytest.approx(d_exact.k_factor, rel=1e-3)
    assert d_meas.ideal_parts.r2_ohm == pytest.approx(d_exact.ideal_parts.r2_ohm, rel=2e-3)
    # python-control control.margin on the exact plant with the measured-data design's parts
    _gm, pm, _wpc, _wgc = control.margin(_gc_tf(d_meas.ideal_parts) * PLANT_RC)
    assert pm == pytest.approx(60.0, abs=0.2)
    assert d_meas.predicted_ideal.worst_phase_margin_deg == pytest.approx(pm, abs=0.2)
    with pytest.raises(AnalysisInputError, match="outside the measured plant band"):
        design_type2(measured, crossover_hz=5e6, phase_margin_deg=60.0)


def test_design_is_frozen_and_refuses_bad_input() -> None:
    d = design_type2(_tf_callable(PLANT_RC), crossover_hz=10e3, phase_margin_deg=60.0)
    assert isinstance(d, CompensatorDesign)
    with pytest.raises(AttributeError):
        d.k_factor = 2.0  # type: ignore[misc]
    with pytest.raises(AnalysisInputError, match="phase_margin_deg"):
        design_type2(_tf_callable(PLANT_RC), crossover_hz=10e3, phase_margin_deg=190.0)
    with pytest.raises(AnalysisInputError, match="crossover_hz"):
        design_type3(_tf_callable(PLANT_RC), crossover_hz=-1.0, phase_margin_deg=60.0)
    with pytest.raises(AnalysisInputError, match="plant must be"):
        design_type2("not a plant", crossover_hz=10e3, phase_margin_deg=60.0)  # type: ignore[arg-type]
    with pytest.raises(AnalysisInputError, match="r3_ohm and c3_f"):
        CompensatorParts(kind=3, r1_ohm=1e4, r2_ohm=1e4, c1_f=1e-9, c2_f=1e-10)
    with pytest.raises(AnalysisInputError, match="unknown preferred-number series"):
        design_type2(_tf_callable(PLANT_RC), crossover_hz=10e3, phase_margin_deg=60.0, resistor_series="E7")
