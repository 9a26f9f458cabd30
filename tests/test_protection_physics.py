"""The protected converter model: hiccup OCP, latching OVP and hold-up against hand calculations."""

from __future__ import annotations

import numpy as np
import pytest

from benchctl.simulated_instruments.converter import FLYBACK_48V_5V, ConverterModel, ManualClock
from benchctl.simulated_instruments.converter.protection import ProtectionFeatures


def _model(load_a: float) -> tuple[ConverterModel, ManualClock]:
    clock = ManualClock()
    d = FLYBACK_48V_5V
    model = ConverterModel(d, clock=clock, protection=ProtectionFeatures.for_design(d))
    model.set_load("CC", load_a, True)
    model.set_source(48.0, 3.0, True)
    clock.advance(1.0)
    return model, clock


def test_hiccup_period_duty_and_recovery() -> None:
    model, clock = _model(2.0)
    f, d = model.protection, model.design
    model.set_load("CC", 7.5, True)          # above the 6 A limit: the output collapses
    t0 = clock.now_s()
    t = t0 + np.arange(0.0, 0.12, 1e-6)
    s = model.terminal_series(t)
    # Peak into the overload: the CC load draws its setting while the output capacitance discharges
    assert s[6].max() == pytest.approx(7.5, rel=1e-9)
    # Later cycles: I_lim for fault_blank_s of every period, 0 between: mean = I_lim·duty (rectangle wave)
    later = t > t0 + f.hiccup_period_s
    mean = s[5][later][: int(2 * f.hiccup_period_s / 1e-6)].mean()
    assert mean == pytest.approx(d.protection.current_limit_a * f.hiccup_duty, rel=0.02)
    clock.advance(f.hiccup_period_s * 1.5)     # in the off part of the second cycle
    model.set_load("CC", 2.0, True)
    start = model.start_up_truth()
    assert start.switching_start_s == pytest.approx(t0 + 2 * f.hiccup_period_s, abs=1e-9)
    clock.advance(0.3)
    assert model.terminals().output_v == pytest.approx(model.operating_point().vout_v, abs=1e-6)


def test_ovp_latches_and_a_power_cycle_restarts() -> None:
    model, clock = _model(1.0)
    f, d = model.protection, model.design
    v0 = model.terminals().output_v
    model.inject_fault("feedback_open")
    trip = model.protection_truth()
    # Charge at the limit: C·dv/dt = I_lim − I_load (capacitor law): time to the threshold and the peak
    slope = (d.protection.current_limit_a - 1.0) / model.output_capacitance_f
    assert trip.trip_s - clock.now_s() == pytest.approx((f.ovp_v - v0) / slope, rel=1e-3)
    assert trip.peak_v == pytest.approx(f.ovp_v + slope * f.ovp_delay_s, rel=1e-3)
    clock.advance(1.0)
    model.clear_faults()
    clock.advance(1.0)
    assert model.ovp_latched and model.terminals().output_v < 0.01
    model.set_source(48.0, 3.0, False)
    clock.advance(1.0)
    model.set_source(48.0, 3.0, True)
    clock.advance(1.0)
    assert not model.ovp_latched and model.operating_point().state == "regulating"


@pytest.mark.parametrize("load_a", [1.0, 3.0, 5.0])
def test_hold_up_time_follows_the_energy_in_the_bulk_capacitance(load_a) -> None:
    model, clock = _model(load_a)
    model.set_input_capacitance(470e-6)
    d = model.design
    t = model.terminals()
    p_in = t.input_v * t.input_a
    model.set_input_connected(False)
    hold = model.protection_truth()
    # ½·C·(V1² − V2²) = P·t (energy balance, common practice); the model's P_in varies a little with the
    # line (efficiency), hence 2 %
    c = model.input_capacitance_f
    expect = 0.5 * c * (t.input_v ** 2 - d.protection.uvlo_off_v ** 2) / p_in
    assert hold.stop_s - clock.now_s() == pytest.approx(expect, rel=0.02)
    clock.advance(0.5 * (hold.stop_s - clock.now_s()))
    assert model.terminals().output_v == pytest.approx(t.output_v, abs=0.01)    # still regulating
