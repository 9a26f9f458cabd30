"""The model's chamber air and the parts' thermal nodes against closed-form first-order responses."""

from __future__ import annotations

import math

import pytest

from benchctl.simulated_instruments.converter import DESIGNS, ConverterModel, ManualClock
from benchctl.simulated_instruments.converter.component_thermal import component_losses, network_for
from benchctl.simulated_instruments.converter.thermal import ChamberAir


def test_chamber_air_ramp_then_lag_matches_the_closed_form():
    # First-order lag τ·da/dt = c − a driven by a ramp of slope s then a hold (textbook ramp and step
    # responses). From rest at 25 °C, ramp 3 K/min to 55 °C takes 600 s; during the ramp
    # a(t) = c(t) − s·τ·(1 − e^(−t/τ)).
    air = ChamberAir(0.0, room_c=25.0, tau_s=120.0, ramp_k_per_s=0.05)
    air.set_setpoint(0.0, 55.0)
    air.set_running(0.0, True)
    s, tau = 0.05, 120.0
    t = 300.0
    assert air.air_c(t) == pytest.approx(25.0 + s * t - s * tau * (1 - math.exp(-t / tau)), abs=1e-9)
    a_end = 55.0 - s * tau * (1 - math.exp(-600.0 / tau))
    assert air.air_c(600.0) == pytest.approx(a_end, abs=1e-9)
    assert air.air_c(900.0) == pytest.approx(55.0 + (a_end - 55.0) * math.exp(-300.0 / tau), abs=1e-9)
    # in band ±1 K from where 55 − a = 1 after the ramp: t = 600 + τ·ln((55 − a_end)/1)
    since = air.in_band_since_s(2000.0, 1.0)
    assert since == pytest.approx(600.0 + tau * math.log(55.0 - a_end), abs=1e-3)


@pytest.mark.parametrize("name", sorted(DESIGNS))
def test_each_part_follows_its_loss_with_its_own_time_constant(name):
    d = DESIGNS[name]
    clock = ManualClock()
    model = ConverterModel(d, clock=clock)          # no drift: the losses are the design's, constant
    model.set_load("CC", d.iout_rated_a * 0.8, True)
    model.set_source(d.vin_nom_v * 1.01, 10.0, True)      # the parts start warming at t = 0
    p = component_losses(d, model.operating_point())
    assert 0.0 < sum(p.values()) < model.operating_point().loss_w    # the rest heats the board
    for t in (30.0, 120.0, 600.0):
        clock.advance(t - clock.now_s())
        temps = model.component_temperatures_c()
        for node in network_for(d):
            # C·dT/dt = P − (T − Tamb)/R from Tamb: T = Tamb + R·P·(1 − e^(−t/τ)) (first-order step
            # response). Tolerance: the start-up (soft start, a few tens of ms, at most 0.25 s) runs
            # at less than the final loss, which delays the curve by at most 0.25 s: R·P·0.25/τ.
            expect = d.thermal.ambient_c + node.r_th_k_per_w * p[node.name] * (1 - math.exp(-t / node.tau_s))
            tol = node.r_th_k_per_w * p[node.name] * 0.25 / node.tau_s + 1e-6
            assert temps[node.name] == pytest.approx(expect, abs=tol), (node.name, t)
            assert temps[node.name] < expect + 1e-9       # and never ahead of the step response


def test_the_parts_follow_the_chamber_air():
    d = DESIGNS["buck-12v-1v2"]
    clock = ManualClock()
    model = ConverterModel(d, clock=clock, thermal_drift=True)
    air = ChamberAir(0.0, room_c=25.0)
    model.attach_chamber(air)
    air.set_setpoint(0.0, -10.0)
    air.set_running(0.0, True)
    clock.advance(7200.0)
    assert model.ambient_c == pytest.approx(-10.0, abs=1e-6)
    # off and unloaded: every part and the lumped mass sit at the air
    assert all(t == pytest.approx(-10.0, abs=1e-3) for t in model.component_temperatures_c().values())
    assert model.temperature_c() == pytest.approx(-10.0, abs=1e-3)
