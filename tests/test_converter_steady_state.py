"""Steady-state physics of the converter model: energy, efficiency, conversion ratios, CCM/DCM, regulation."""

from __future__ import annotations

import math

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from benchctl.simulated_instruments.converter import (BUCK_12V_1V2, DESIGNS, FLYBACK_48V_5V, ConverterModel,
                                             LoadSetting, ManualClock, solve_dut)

DESIGN_LIST = [FLYBACK_48V_5V, BUCK_12V_1V2]


def _op(design, vin_v: float, iout_a: float, mode: str = "CC"):
    setting = iout_a if mode == "CC" else design.vout_nom_v / iout_a
    return solve_dut(design, vin_v, LoadSetting(mode, setting, True))


@settings(max_examples=40, deadline=None)
@given(name=st.sampled_from(sorted(DESIGNS)), line=st.floats(0.0, 1.0), load=st.floats(0.0, 1.05),
       mode=st.sampled_from(["CC", "CR"]))
def test_energy_balance_is_exact(name: str, line: float, load: float, mode: str) -> None:
    # First law: Pin = Pout + Ploss, Iin = Pin/Vin at the DUT input (common practice / definition).
    d = DESIGNS[name]
    vin = d.vin_min_v + line * (d.vin_max_v - d.vin_min_v)
    iout = max(load, 1e-3) * d.iout_rated_a
    op = _op(d, vin, iout, mode)
    assert op.state == "regulating"
    lb = op.losses
    parts = (lb.fixed_w + lb.conduction_w + lb.switching_w + lb.snubber_w + lb.magnetic_w + lb.rectifier_w
             + lb.fault_w + lb.restart_w)
    assert op.loss_w == pytest.approx(parts, rel=1e-14)
    assert op.pin_w == pytest.approx(op.pout_w + op.loss_w, rel=1e-14)
    assert op.iin_a == pytest.approx(op.pin_w / op.vin_v, rel=1e-14)
    assert op.pout_w == pytest.approx(op.vout_v * op.iout_a, rel=1e-14)
    assert op.efficiency == pytest.approx(op.pout_w / op.pin_w, rel=1e-14)
    assert all(getattr(lb, f) >= 0.0 for f in ("fixed_w", "conduction_w", "switching_w", "snubber_w",
                                                  "magnetic_w", "rectifier_w"))


@pytest.mark.parametrize(("design", "peak_lo", "peak_hi"), [(FLYBACK_48V_5V, 0.86, 0.90),
                                                            (BUCK_12V_1V2, 0.88, 0.92)])
def test_efficiency_curve_shape(design, peak_lo: float, peak_hi: float) -> None:
    # Common practice: low at light load, peak around 40–70 % load, lower again at full load.
    fracs = [k / 10 for k in range(1, 11)]
    eff = [_op(design, design.vin_nom_v, f * design.iout_rated_a).efficiency for f in fracs]
    peak = max(eff)
    peak_frac = fracs[eff.index(peak)]
    assert peak_lo <= peak <= peak_hi
    assert 0.4 <= peak_frac <= 0.7
    assert eff[0] < peak - 0.03          # 10 % load clearly lower
    assert eff[-1] < peak                # falling at full load


def test_flyback_efficiency_lower_at_high_line() -> None:
    # Common practice for flybacks: switching and clamp losses grow with Vin, so light/mid-load
    # efficiency at high line is below that at nominal line.
    d = FLYBACK_48V_5V
    for frac in (0.1, 0.3, 0.5):
        nominal = _op(d, d.vin_nom_v, frac * d.iout_rated_a).efficiency
        high = _op(d, d.vin_max_v, frac * d.iout_rated_a).efficiency
        assert high < nominal


@pytest.mark.parametrize("design", DESIGN_LIST)
@pytest.mark.parametrize("line", [0.0, 0.5, 1.0])
@pytest.mark.parametrize("load", [0.02, 0.08, 0.5, 1.0])
def test_conversion_ratio_lossless(design, line: float, load: float) -> None:
    # Erickson & Maksimović 2nd ed., ch. 5/6 (from memory): CCM buck M = D, flyback M = n·D/(1 − D);
    # DCM buck M = 2/(1 + √(1 + 4K/D²)), flyback M = n·D/√K′ with K′ = 2n²Lm/(R·Ts).
    d = design.lossless()
    vin = d.vin_min_v + line * (d.vin_max_v - d.vin_min_v)
    op = _op(d, vin, load * d.iout_rated_a)
    assert op.loss_w == pytest.approx(op.vsense_v ** 2 / d.losses.sense_divider_ohm, rel=1e-9)  # divider only
    m = op.vsense_v / op.vin_v
    D = op.duty
    K = 2 * d.l_output_h * d.fsw_hz / op.r_load_eff_ohm
    n = d.stage.turns_ratio
    if op.conduction_mode == "CCM":
        expected = D if d.topology == "buck" else n * D / (1 - D)
        assert K >= d.k_crit(D)
    else:
        expected = 2 / (1 + math.sqrt(1 + 4 * K / D ** 2)) if d.topology == "buck" else n * D / math.sqrt(K)
        assert K < d.k_crit(D)
    assert m == pytest.approx(expected, rel=1e-9)
    assert op.k == pytest.approx(K, rel=1e-12)


@pytest.mark.parametrize("design", DESIGN_LIST)
@pytest.mark.parametrize("line", [0.0, 0.5, 1.0])
def test_ccm_dcm_boundary_load(design, line: float) -> None:
    # Boundary K = K_crit (Erickson 2nd ed. ch. 5, derived): buck I_crit = (1 − D)·V·Ts/(2L) with D = V/Vg;
    # flyback I_crit = (1 − D)²·V·Ts/(2L′), L′ = n²·Lm, D = V/(V + n·Vg).  The stage current includes the
    # sense-divider current V/R_div.
    d = design.lossless()
    vin = d.vin_min_v + line * (d.vin_max_v - d.vin_min_v)
    lo, hi = 0.0, d.iout_rated_a
    assert _op(d, vin, lo + 1e-4).conduction_mode == "DCM" and _op(d, vin, hi).conduction_mode == "CCM"
    for _ in range(60):
        mid = 0.5 * (lo + hi)
        if _op(d, vin, mid).conduction_mode == "CCM":
            hi = mid
        else:
            lo = mid
    op = _op(d, vin, hi)
    v = op.vsense_v
    ts = 1 / d.fsw_hz
    if d.topology == "buck":
        duty = v / vin
        i_crit = (1 - duty) * v * ts / (2 * d.stage.inductance_h)
    else:
        n = d.stage.turns_ratio
        duty = v / (v + n * vin)
        i_crit = (1 - duty) ** 2 * v * ts / (2 * n * n * d.stage.inductance_h)
    assert hi + v / d.losses.sense_divider_ohm == pytest.approx(i_crit, rel=1e-6)
    # the boundary sits inside the envelope, around 15–30 % load for the flyback (design intent)
    if d.topology == "flyback":
        assert 0.15 <= hi / d.iout_rated_a <= 0.30


@pytest.mark.parametrize("design", DESIGN_LIST)
def test_line_and_load_regulation_in_range(design) -> None:
    # Definitions (common practice): line reg % = (Vo@Vin,max − Vo@Vin,min)/Vo,nom × 100 at full load;
    # load reg % = (V_NL − V_FL)/V_FL × 100 (textbook convention).  Targets: line 0.01–0.2 %,
    # load 0.05–0.5 % (design intent).
    d = design
    full = d.iout_rated_a
    line_reg = abs(_op(d, d.vin_max_v, full).vout_v - _op(d, d.vin_min_v, full).vout_v) / d.vout_nom_v * 100
    v_nl = _op(d, d.vin_nom_v, 0.0).vout_v
    v_fl = _op(d, d.vin_nom_v, full).vout_v
    load_reg = (v_nl - v_fl) / v_fl * 100
    assert 0.01 <= line_reg <= 0.2
    assert 0.05 <= load_reg <= 0.5


@pytest.mark.parametrize("design", DESIGN_LIST)
def test_static_error_follows_amplifier_equation(design) -> None:
    # Finite-gain amplifier: D·Vm = A0·(Vref − H·V_sense) ⇒ V_sense = Vref/H − D·Vm/(A0·H) (common practice).
    c = design.control
    for vin in (design.vin_min_v, design.vin_max_v):
        for frac in (0.05, 1.0):
            op = _op(design, vin, frac * design.iout_rated_a)
            expected = c.vref_v / c.divider_h - op.duty * c.ramp_vm_v / (c.opamp_gain * c.divider_h)
            assert op.vsense_v == pytest.approx(expected, rel=1e-11)
            assert op.vout_target_v == pytest.approx(c.vref_v / c.divider_h)


def test_closed_loop_line_and_load_sensitivity_buck() -> None:
    # Erickson 2nd ed. ch. 9: closed-loop line-to-output Gvg/(1 + T) with Gvg(0) = D (buck CCM), and
    # closed-loop output resistance R_o/(1 + T0) with R_o = D·R_hs + (1 − D)·R_ls + R_L (ch. 3 averaged model).
    d = BUCK_12V_1V2
    dl = d.lossless()
    op = _op(dl, 12.0, 6.0)
    h = 1e-3
    dv_dvg = (_op(dl, 12.0 + h, 6.0).vsense_v - _op(dl, 12.0 - h, 6.0).vsense_v) / (2 * h)
    assert dv_dvg == pytest.approx(op.duty / (1 + op.loop_gain_dc), rel=1e-5)
    op = _op(d, 12.0, 6.0)
    ls = d.losses
    r_o = op.duty * ls.r_switch_ohm + (1 - op.duty) * ls.r_sync_ohm + ls.r_primary_ohm
    di = 1e-2
    dv_di = (_op(d, 12.0, 6.0 + di).vsense_v - _op(d, 12.0, 6.0 - di).vsense_v) / (2 * di)
    assert -dv_di == pytest.approx(r_o / (1 + op.loop_gain_dc), rel=0.05)


def test_model_steady_state_matches_its_settled_terminals() -> None:
    # After many time constants the terminals equal the steady state (exponential settling, common practice).
    clock = ManualClock()
    model = ConverterModel(FLYBACK_48V_5V, clock=clock, seed=1)
    model.set_load("CR", 2.0, True)
    model.set_source(48.0, 5.0, True)
    clock.advance(50 * model.soft_start_time_constant_s)
    t = model.terminals()
    op = model.operating_point()
    assert t.output_v == pytest.approx(op.vout_v, rel=1e-12)
    assert t.output_a == pytest.approx(op.vout_v / 2.0, rel=1e-12)
    assert t.input_a == pytest.approx(op.iin_a, rel=1e-12)
    ref = model.steady_state(t.input_v, "CR", 2.0)
    assert ref.vout_v == pytest.approx(op.vout_v, rel=1e-12)
