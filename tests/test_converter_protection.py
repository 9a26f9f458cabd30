"""UVLO, current limits, input cable and faults of the converter model."""

from __future__ import annotations

import math

import pytest

from benchctl.simulated_instruments.converter import (BUCK_12V_1V2, FLYBACK_48V_5V, ConverterModel, ManualClock,
                                             SettingError)


def _model(design, load=("CC", 1.0)) -> tuple[ConverterModel, ManualClock]:
    clock = ManualClock()
    model = ConverterModel(design, clock=clock, seed=7)
    model.set_load(load[0], load[1], True)
    return model, clock


def _settle(model: ConverterModel, clock: ManualClock) -> None:
    clock.advance(60 * max(model.time_constant_s, model.soft_start_time_constant_s))


@pytest.mark.parametrize("design", [FLYBACK_48V_5V, BUCK_12V_1V2])
def test_uvlo_hysteresis(design) -> None:
    # Under-voltage lockout with hysteresis (common practice): starts only above the on threshold,
    # stops only below the off threshold; in between it keeps its previous state.
    pr = design.protection
    model, clock = _model(design)
    between = 0.5 * (pr.uvlo_on_v + pr.uvlo_off_v)
    sequence = [(between, "uvlo"), (pr.uvlo_on_v + 0.2, "regulating"), (between, "regulating"),
                (pr.uvlo_off_v - 0.2, "uvlo"), (between, "uvlo"), (design.vin_nom_v, "regulating")]
    for vin, expected in sequence:
        model.set_source(vin, 10.0, True)
        _settle(model, clock)
        assert model.operating_point().state == expected, f"at {vin} V"
        if expected == "uvlo":
            assert model.terminals().output_v == pytest.approx(0.0, abs=1e-9)
    model.set_source(design.vin_nom_v, 10.0, False)
    assert model.operating_point().state == "off"
    # truth helper: same thresholds without history
    assert model.steady_state(between, "CC", 1.0).state == "uvlo"
    assert model.steady_state(between, "CC", 1.0, was_running=True).state == "regulating"


@pytest.mark.parametrize("design", [FLYBACK_48V_5V, BUCK_12V_1V2])
def test_output_current_limit(design) -> None:
    # Constant-current limit (common practice): a CC load above the limit collapses the output toward 0 V;
    # a CR load settles where V = I_lim·R (Ohm's law) while the current stays at the limit.
    ilim = design.protection.current_limit_a
    model, clock = _model(design, ("CC", ilim * 1.1))
    model.set_source(design.vin_nom_v, 10.0, True)
    _settle(model, clock)
    op = model.operating_point()
    assert op.state == "current_limit"
    assert op.vout_v == pytest.approx(0.0, abs=1e-9) and op.iout_a == pytest.approx(ilim)
    assert op.pin_w == pytest.approx(op.pout_w + op.loss_w, rel=1e-12)
    r = 0.5 * design.vout_nom_v / ilim
    model.set_load("CR", r, True)
    _settle(model, clock)
    op = model.operating_point()
    t = model.terminals()
    assert op.state == "current_limit"
    assert t.output_v == pytest.approx(ilim * r, rel=1e-9)
    assert t.output_a == pytest.approx(ilim, rel=1e-9)
    # just below the limit it regulates
    model.set_load("CC", 0.97 * ilim, True)
    _settle(model, clock)
    assert model.operating_point().state == "regulating"


@pytest.mark.parametrize("design", [FLYBACK_48V_5V, BUCK_12V_1V2])
def test_cable_drop(design) -> None:
    # Ohm's law across the input cable: V_in = V_source − I·R_cable; power at the DUT input = Pin (energy).
    model, clock = _model(design, ("CC", design.iout_rated_a))
    model.set_source(design.vin_min_v, 10.0, True)
    _settle(model, clock)
    t = model.terminals()
    op = model.operating_point()
    assert t.source_v == pytest.approx(design.vin_min_v)
    assert t.input_v == pytest.approx(t.source_v - t.input_a * design.bench.cable_r_ohm, rel=1e-12)
    assert t.input_v < t.source_v
    assert t.input_v * t.input_a == pytest.approx(op.pin_w, rel=1e-12)
    assert t.source_a == pytest.approx(t.input_a)
    # The DUT at the dropped voltage is exactly the truth steady state at that voltage
    assert model.steady_state(t.input_v, "CC", design.iout_rated_a).pin_w == pytest.approx(op.pin_w, rel=1e-9)


def test_cable_collapse_past_maximum_power() -> None:
    # A constant-power load behind R can draw at most Vs²/(4R) (maximum power transfer, common practice).
    from dataclasses import replace
    d = FLYBACK_48V_5V
    pin = d.iout_rated_a * d.vout_nom_v / 0.85
    weak = replace(d, bench=replace(d.bench, cable_r_ohm=1.2 * 40.0 ** 2 / (4 * pin)))
    model, clock = _model(weak, ("CC", weak.iout_rated_a))
    model.set_source(40.0, 10.0, True)
    _settle(model, clock)
    op = model.operating_point()
    assert op.state == "uvlo" and "cable" in op.reason
    assert op.vout_v == 0.0


def test_source_current_limit_collapses_input() -> None:
    # A source in current limit cannot hold up a constant-power load: the input collapses into UVLO
    # and the converter cycles (hiccup); the source stays in constant current (common practice).
    d = FLYBACK_48V_5V
    model, clock = _model(d, ("CC", d.iout_rated_a))
    model.set_source(48.0, 3.0, True)
    _settle(model, clock)
    need = model.terminals().input_a
    assert model.operating_point().state == "regulating" and not model.terminals().source_limited
    model.set_source(48.0, 0.8 * need, True)
    _settle(model, clock)
    t = model.terminals()
    op = model.operating_point()
    assert t.source_limited and t.source_a == pytest.approx(0.8 * need)
    assert op.state == "uvlo" and "current limit" in op.reason
    assert t.input_v < d.protection.uvlo_on_v
    assert t.output_v == pytest.approx(0.0, abs=1e-9)
    assert op.pin_w == pytest.approx(op.pout_w + op.loss_w, rel=1e-12)
    model.set_source(48.0, 3.0, True)
    _settle(model, clock)
    assert model.operating_point().state == "regulating"


def test_fault_feedback_open_goes_to_max_duty_voltage() -> None:
    # Open feedback: the amplifier rails, D = D_max, and the output goes to the open-loop value;
    # lossless CCM flyback M = n·D/(1 − D) (Erickson & Maksimović 2nd ed. ch. 6, from memory).
    d = FLYBACK_48V_5V.lossless()
    model, clock = _model(d, ("CR", 5.0))
    model.set_source(48.0, 10.0, True)
    _settle(model, clock)
    v_reg = model.terminals().output_v
    model.inject_fault("feedback_open")
    _settle(model, clock)
    op = model.operating_point()
    dmax = d.stage.max_duty
    assert op.state == "feedback_open" and op.duty == dmax and op.conduction_mode == "CCM"
    assert op.vsense_v == pytest.approx(d.stage.turns_ratio * 48.0 * dmax / (1 - dmax), rel=1e-9)
    assert model.terminals().output_v > 3 * v_reg
    model.clear_faults()
    _settle(model, clock)
    assert model.operating_point().state == "regulating"


def test_fault_output_short_and_overheat() -> None:
    # Short at the terminals: the converter sits in current limit at ≈ 0 V and the load sees nothing.
    d = BUCK_12V_1V2
    model, clock = _model(d, ("CC", 5.0))
    model.set_source(12.0, 10.0, True)
    _settle(model, clock)
    eff0 = model.operating_point().efficiency
    model.inject_fault("output_short")
    _settle(model, clock)
    t = model.terminals()
    assert model.operating_point().state == "current_limit"
    assert t.output_v == pytest.approx(d.protection.current_limit_a * d.faults.short_ohm, rel=1e-9)
    assert t.output_a == pytest.approx(d.protection.current_limit_a) and t.load_a == pytest.approx(0.0, abs=1e-12)
    model.clear_faults()
    _settle(model, clock)
    # Overheat: extra dissipation growing with time, so efficiency drifts down while energy still balances.
    model.inject_fault("overheat")
    effs = []
    for _ in range(4):
        clock.advance(5.0)
        op = model.operating_point()
        effs.append(op.efficiency)
        assert op.pin_w == pytest.approx(op.pout_w + op.loss_w, rel=1e-12)
        assert op.losses.fault_w > 0.0
    assert eff0 > effs[0] > effs[1] > effs[2] > effs[3]
    assert model.faults == ("overheat",)
    with pytest.raises(SettingError, match="known faults"):
        model.inject_fault("melted")


def test_setting_validation_messages() -> None:
    model, _ = _model(FLYBACK_48V_5V)
    with pytest.raises(SettingError, match="CC.*CR"):
        model.set_load("CP", 1.0, True)
    with pytest.raises(SettingError, match="current_limit_a"):
        model.set_source(48.0, -1.0, True)
    with pytest.raises(SettingError, match="must be > 0"):
        model.set_load("CR", 0.0, True)
    assert not math.isnan(model.terminals().output_v)
