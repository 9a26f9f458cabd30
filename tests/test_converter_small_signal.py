"""Small-signal models of the converter model against textbook values and reference libraries."""

from __future__ import annotations

import math
from dataclasses import replace

import control
import numpy as np
import pytest
from scipy import signal

from benchctl.simulated_instruments.converter import (BUCK_12V_1V2, FLYBACK_48V_5V, ConverterModel, ManualClock,
                                             NotRegulatingError, RationalTF, Type3Network, buck_ccm_gvd,
                                             closed_loop_output_impedance, flyback_ccm_gvd, flyback_ccm_parameters,
                                             flyback_dcm_gvd, loop_margins, output_impedance_open,
                                             type3_compensator)

TWO_PI = 2.0 * math.pi
FREQS_HZ = np.logspace(0, 6, 61)


def _pole_f0_q(tf: RationalTF) -> tuple[float, float]:
    """Natural frequency (Hz) and Q of the complex pole pair found by numpy.roots."""
    p = [r for r in tf.poles() if abs(r.imag) > 0]
    assert len(p) == 2, f"expected one complex pole pair, got {tf.poles()}"
    w0 = abs(p[0])
    return w0 / TWO_PI, w0 / (2.0 * abs(p[0].real))


def test_buck_28v_to_15v_f0_q_gd0() -> None:
    # Erickson & Maksimović, Fundamentals of Power Electronics 2nd ed., §9.5.4 ([calc] from its formulas):
    # f0 = 1/(2π√(LC)), Q = R√(C/L), Gd0 = Vg — re-derived here, then read from the model's poles.
    vg, l, c, r = 28.0, 50e-6, 500e-6, 3.0
    tf = buck_ccm_gvd(vg, l, c, r)
    f0, q = _pole_f0_q(tf)
    assert f0 == pytest.approx(1.0 / (TWO_PI * math.sqrt(l * c)), rel=1e-9)
    assert q == pytest.approx(r * math.sqrt(c / l), rel=1e-9)
    assert f0 == pytest.approx(1006.58, abs=0.01)      # worked value [calc]
    assert q == pytest.approx(9.487, abs=0.001)
    assert tf.dc_gain() == pytest.approx(vg)


def test_buck_12v_to_5v_esr_zero_exact_poles_and_boundary() -> None:
    # Erickson 2nd ed. ch. 8 (buck with ESR, exact denominator 1 + s(L/R + rc·C) + s²LC(1 + rc/R));
    # K = 2L/(R·Ts) vs K_crit = 1 − D and I_crit = (1 − D)·V·Ts/(2L), ch. 5 ([calc] from its formulas).
    vg, v, l, c, rc, r, fs = 12.0, 5.0, 10e-6, 100e-6, 0.010, 1.0, 500e3
    tf = buck_ccm_gvd(vg, l, c, r, rc)
    z = tf.zeros()
    assert abs(z[0]) / TWO_PI == pytest.approx(1.0 / (TWO_PI * rc * c), rel=1e-9)
    assert abs(z[0]) / TWO_PI == pytest.approx(159.15e3, rel=1e-4)
    a2, a1 = l * c * (1.0 + rc / r), l / r + rc * c
    f0, q = _pole_f0_q(tf)
    assert f0 == pytest.approx(1.0 / (TWO_PI * math.sqrt(a2)), rel=1e-9)
    assert q == pytest.approx(math.sqrt(a2) / a1, rel=1e-9)
    assert f0 == pytest.approx(5007.94, abs=0.01)
    assert q == pytest.approx(2.889, abs=0.001)
    assert tf.dc_gain() == pytest.approx(vg)
    # the design helpers on a design carrying these values
    d = replace(BUCK_12V_1V2, vin_nom_v=vg, vout_nom_v=v, fsw_hz=fs,
                stage=replace(BUCK_12V_1V2.stage, inductance_h=l, c_out_f=c, esr_ohm=rc))
    duty = v / vg
    assert d.k_value(r) == pytest.approx(2 * l * fs / r)
    assert d.k_value(r) == pytest.approx(10.0)
    assert d.k_crit(duty) == pytest.approx(1 - duty)
    assert d.k_crit(duty) == pytest.approx(0.5833, abs=1e-4)
    assert d.boundary_current_a(vg, v) == pytest.approx((1 - duty) * v / (2 * l * fs))
    assert d.boundary_current_a(vg, v) == pytest.approx(0.2917, abs=1e-4)


def test_flyback_ccm_worked_example() -> None:
    # ERICKSON-2E ch. 7–8 averaged small-signal models (formulas from memory) [calc]:
    # Vg 48 V, n 0.25, Lm 200 µH, C 470 µF, R 6 Ω, D 0.5 ⇒ V = 12 V.
    vg, n, lm, c, r, d, fs = 48.0, 0.25, 200e-6, 470e-6, 6.0, 0.5, 100e3
    v = n * vg * d / (1 - d)
    lp = n * n * lm
    gd0, w0, q, wz = flyback_ccm_parameters(v, d, n, lm, c, r)
    # Self-check Gd0 = dV/dD by a central difference of V(D) = n·Vg·D/(1 − D)
    h = 1e-6
    dv_dd = (n * vg * (d + h) / (1 - d - h) - n * vg * (d - h) / (1 - d + h)) / (2 * h)
    assert gd0 == pytest.approx(dv_dd, rel=1e-8)
    assert gd0 == pytest.approx(48.0)
    assert w0 / TWO_PI == pytest.approx((1 - d) / math.sqrt(lp * c) / TWO_PI, rel=1e-12)
    assert w0 / TWO_PI == pytest.approx(1038.21, abs=0.01)
    assert q == pytest.approx(18.40, abs=0.01)
    assert wz / TWO_PI == pytest.approx(38.197e3, rel=1e-4)
    tf = flyback_ccm_gvd(v, d, n, lm, c, r)
    f0, q_roots = _pole_f0_q(tf)
    assert f0 == pytest.approx(w0 / TWO_PI, rel=1e-9) and q_roots == pytest.approx(q, rel=1e-9)
    (zero,) = tf.zeros()
    assert zero.real > 0 and abs(zero) == pytest.approx(wz, rel=1e-9)      # right-half-plane zero
    k = 2 * lp * fs / r
    assert k == pytest.approx(0.417, abs=1e-3) and (1 - d) ** 2 == 0.25 and k > (1 - d) ** 2  # CCM


def test_flyback_dcm_worked_example() -> None:
    # DCM flyback, ERICKSON-2E ch. 11 (from memory) [calc]: Lm 20 µH, R 12 Ω, V 12 V:
    # M = V/Vg = n·D/√K′ ⇒ D = 0.14434; Gd0 = V/D = 83.14 V; fp = 2/(2π·R·C) = 56.44 Hz.
    vg, v, n, lm, c, r, fs = 48.0, 12.0, 0.25, 20e-6, 470e-6, 12.0, 100e3
    k = 2 * n * n * lm * fs / r
    d = (v / vg) * math.sqrt(k) / n
    assert k == pytest.approx(0.0208, abs=1e-4)
    assert d == pytest.approx(0.14434, abs=1e-5)
    assert (1 - d) ** 2 == pytest.approx(0.732, abs=1e-3) and k < (1 - d) ** 2      # DCM
    tf = flyback_dcm_gvd(v, d, c, r)
    assert tf.dc_gain() == pytest.approx(83.14, abs=0.01)
    (pole,) = tf.poles()
    assert abs(pole) / TWO_PI == pytest.approx(2 / (TWO_PI * r * c), rel=1e-12)
    assert abs(pole) / TWO_PI == pytest.approx(56.44, abs=0.01)


def test_gvd_responses_match_scipy_freqs_and_closed_forms() -> None:
    # scipy.signal.freqs on the same polynomials, and the textbook closed forms evaluated directly
    # (ERICKSON-2E ch. 8, averaged small-signal models).
    w = TWO_PI * FREQS_HZ
    s = 1j * w
    vg, l, c, rc, r = 12.0, 0.68e-6, 600e-6, 0.003, 0.12
    buck = buck_ccm_gvd(vg, l, c, r, rc)
    _, h_ref = signal.freqs(buck.num, buck.den, worN=w)
    np.testing.assert_allclose(buck.response(FREQS_HZ), h_ref, rtol=1e-10)
    z = r * (1 + s * rc * c) / (1 + s * (r + rc) * c)             # R ∥ (rc + 1/sC)
    np.testing.assert_allclose(buck.response(FREQS_HZ), vg * z / (z + s * l), rtol=1e-10)

    v, d, n, lm, c2, r2, rc2 = 5.0, 0.36, 0.2, 170e-6, 660e-6, 1.0, 0.01
    fly = flyback_ccm_gvd(v, d, n, lm, c2, r2, rc2)
    _, h_ref = signal.freqs(fly.num, fly.den, worN=w)
    np.testing.assert_allclose(fly.response(FREQS_HZ), h_ref, rtol=1e-10)
    gd0, w0, q, wz = flyback_ccm_parameters(v, d, n, lm, c2, r2)
    closed = gd0 * (1 - s / wz) * (1 + s * rc2 * c2) / (1 + s / (q * w0) + (s / w0) ** 2)
    np.testing.assert_allclose(fly.response(FREQS_HZ), closed, rtol=1e-10)


def test_type3_compensator_matches_op_amp_algebra() -> None:
    # Inverting amplifier with finite open-loop gain A: G = (Zf/Zi)/(1 + (1 + Zf/Zi)/A)
    # (common practice, op-amp feedback algebra); with A → ∞ it is Zf/Zi.
    net = Type3Network(10e3, 16.2e3, 1e3, 2.4e-9, 39e-12, 1.8e-9)
    s = 1j * TWO_PI * FREQS_HZ
    zi = 1 / (1 / net.r1_ohm + 1 / (net.r3_ohm + 1 / (s * net.c3_f)))
    zf = 1 / (1 / (net.r2_ohm + 1 / (s * net.c1_f)) + s * net.c2_f)
    a0, gbw = 316.0, 10e6
    a = a0 / (1 + s / (TWO_PI * gbw / a0))
    expected = (zf / zi) / (1 + (1 + zf / zi) / a)
    np.testing.assert_allclose(type3_compensator(net, a0, gbw).response(FREQS_HZ), expected, rtol=1e-9)
    ideal = type3_compensator(net, 1e12, 1e18)
    np.testing.assert_allclose(ideal.response(FREQS_HZ), zf / zi, rtol=1e-6)
    assert type3_compensator(net, a0, gbw).dc_gain() == pytest.approx(a0)   # origin pole limited by A0


@pytest.mark.parametrize(("num", "den", "gm", "pm_deg", "w_pc", "w_gc"), [
    ([1.0], [1.0, 2.0, 1.0, 0.0], 2.0, 21.386, 1.0, 0.6823),          # python-control cross-check [calc]
    ([25.0], [1.0, 10.0, 10.0, 10.0], 3.6, 29.110, 3.1623, 1.7844),   # python-control cross-check [calc]
])
def test_loop_margins_on_reference_systems(num, den, gm, pm_deg, w_pc, w_gc) -> None:
    # python-control control.margin → (gm ratio, pm deg, w phase crossover, w gain crossover), rad/s
    gm_ref, pm_ref, wpc_ref, wgc_ref = control.margin(control.tf(num, den))
    assert (gm_ref, pm_ref, wpc_ref, wgc_ref) == pytest.approx((gm, pm_deg, w_pc, w_gc), abs=2e-3)
    lt = loop_margins(RationalTF(tuple(num), tuple(den)), 1e-4, 1e3)
    assert lt.crossover_hz * TWO_PI == pytest.approx(wgc_ref, rel=1e-7)
    assert lt.phase_margin_deg == pytest.approx(pm_ref, abs=1e-6)
    assert lt.phase_crossover_hz * TWO_PI == pytest.approx(wpc_ref, rel=1e-7)
    assert lt.gain_margin_db == pytest.approx(20 * math.log10(gm_ref), abs=1e-6)


def test_loop_margins_report_missing_crossings() -> None:
    # A first-order loop 10/(1 + s) never reaches −180° (Erickson 2nd ed. ch. 9): no gain margin.
    lt = loop_margins(RationalTF((10.0,), (1.0, 1.0)), 1e-3, 1e3)
    assert lt.gain_margin_db is None and lt.phase_crossover_hz is None and "−180" in lt.gain_margin_reason
    assert lt.phase_margin_deg == pytest.approx(180 - math.degrees(math.atan(math.sqrt(99))), abs=1e-6)
    low = loop_margins(RationalTF((0.5,), (1.0, 1.0)), 1e-3, 1e3)
    assert low.crossover_hz is None and low.phase_margin_deg is None and "below" in low.crossover_reason


OPERATING_POINTS = [
    (FLYBACK_48V_5V, 36.0, 5.0), (FLYBACK_48V_5V, 48.0, 2.5), (FLYBACK_48V_5V, 75.0, 0.3),
    (BUCK_12V_1V2, 10.8, 10.0), (BUCK_12V_1V2, 12.0, 0.5), (BUCK_12V_1V2, 13.2, 4.0),
]


def _running_model(design, vin_v: float, iout_a: float) -> ConverterModel:
    clock = ManualClock()
    model = ConverterModel(design, clock=clock, seed=3)
    model.set_load("CC", iout_a, True)
    model.set_source(vin_v, 10.0, True)
    clock.advance(1.0)
    return model


@pytest.mark.parametrize(("design", "vin_v", "iout_a"), OPERATING_POINTS)
def test_model_loop_truth_matches_python_control(design, vin_v: float, iout_a: float) -> None:
    # python-control control.margin on the identical loop polynomials (reference library)
    model = _running_model(design, vin_v, iout_a)
    tf = model.loop_transfer()
    gm, pm, w_pc, w_gc = control.margin(control.tf(list(tf.num), list(tf.den)))
    lt = model.loop_truth()
    assert lt.crossover_hz == pytest.approx(w_gc / TWO_PI, rel=1e-6)
    assert lt.phase_margin_deg == pytest.approx(pm, abs=1e-5)
    if math.isinf(gm):
        assert lt.gain_margin_db is None and lt.gain_margin_reason
    else:
        assert lt.gain_margin_db == pytest.approx(20 * math.log10(gm), abs=1e-5)
        assert lt.phase_crossover_hz == pytest.approx(w_pc / TWO_PI, rel=1e-6)
    # T(0) is the DC loop gain the DC regulation used
    op = model.operating_point()
    assert abs(model.loop_gain(np.array([0.0]))[0]) == pytest.approx(op.loop_gain_dc, rel=1e-12)


def test_dc_loop_gain_formula_buck_ccm() -> None:
    # Voltage mode: T0 = H·A0·Gd0/Vm with Gd0 = Vg for the CCM buck (Erickson 2nd ed. ch. 8–9)
    model = _running_model(BUCK_12V_1V2, 12.0, 8.0)
    op = model.operating_point()
    c = BUCK_12V_1V2.control
    assert op.conduction_mode == "CCM"
    assert op.loop_gain_dc == pytest.approx(c.divider_h * c.opamp_gain * op.vin_v / c.ramp_vm_v, rel=1e-12)


def test_stability_across_envelope() -> None:
    # Rules of thumb (common practice): PM ≥ 45°, GM ≥ 6 dB, CCM crossover ≤ fsw/5 and ≤ f_RHPz/3;
    # margins must differ between corners (the loop gain moves with line and load).
    # The flyback's 5 % load point sits deep in DCM, where the voltage-mode plant is one pole at
    # 2/(RC) ≈ 25 Hz below the crossover (Erickson 2nd ed. ch. 11): its compensator is designed for
    # ample mid-band gain at 10–100 % load (see designs.py), which leaves ≈ 37° there; it is checked
    # against 35° so that a regression still shows.
    for design in (FLYBACK_48V_5V, BUCK_12V_1V2):
        pms = []
        for vin in (design.vin_min_v, design.vin_nom_v, design.vin_max_v):
            for frac in (0.05, 0.1, 0.2, 0.5, 1.0):
                model = _running_model(design, vin, frac * design.iout_rated_a)
                lt, op = model.loop_truth(), model.operating_point()
                pm_min = 35.0 if design.topology == "flyback" and frac < 0.1 else 45.0
                assert lt.phase_margin_deg is not None and lt.phase_margin_deg >= pm_min, (design.name, vin, frac)
                assert lt.gain_margin_db is None or lt.gain_margin_db >= 6.0
                assert lt.crossover_hz <= design.fsw_hz / 5
                if design.topology == "flyback" and op.conduction_mode == "CCM":
                    st = design.stage
                    *_, wz = flyback_ccm_parameters(op.vsense_v, op.duty, st.turns_ratio, st.inductance_h,
                                                    st.c_out_f, op.r_load_eff_ohm)
                    assert lt.crossover_hz <= wz / TWO_PI / 3
                pms.append(lt.phase_margin_deg)
        assert max(pms) - min(pms) > 5.0


def test_closed_loop_output_impedance_matches_python_control() -> None:
    # Zout_closed = Zout_open/(1 + T) (Erickson 2nd ed. ch. 9); python-control feedback(1, T) is 1/(1 + T).
    model = _running_model(BUCK_12V_1V2, 12.0, 6.0)
    op = model.operating_point()
    st, ls = BUCK_12V_1V2.stage, BUCK_12V_1V2.losses
    r_s = op.duty * ls.r_switch_ohm + (1 - op.duty) * ls.r_sync_ohm + ls.r_primary_ohm
    zo = output_impedance_open(r_s, st.inductance_h, st.c_out_f, st.esr_ohm, op.r_load_eff_ohm)
    t = model.loop_transfer()
    ref = control.tf(list(zo.num), list(zo.den)) * control.feedback(1, control.tf(list(t.num), list(t.den)))
    ref_h = np.array([complex(ref(1j * TWO_PI * f)) for f in FREQS_HZ])
    np.testing.assert_allclose(model.output_impedance(FREQS_HZ), ref_h, rtol=1e-8)
    # DC value: (r_s ∥ R)/(1 + T0)
    r_par = r_s * op.r_load_eff_ohm / (r_s + op.r_load_eff_ohm)
    assert abs(model.output_impedance(np.array([0.0]))[0]) == pytest.approx(r_par / (1 + op.loop_gain_dc),
                                                                             rel=1e-9)
    assert closed_loop_output_impedance(zo, t).dc_gain() == pytest.approx(r_par / (1 + op.loop_gain_dc))


def test_no_loop_gain_when_not_regulating() -> None:
    model = ConverterModel(FLYBACK_48V_5V, clock=ManualClock())
    with pytest.raises(NotRegulatingError, match="set the source"):
        model.loop_gain(np.array([1e3]))
