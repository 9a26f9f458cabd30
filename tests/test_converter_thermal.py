"""Thermal drift of the converter model: the parts warm with their loss, the losses rise with them.

References: a first-order thermal network C·dT/dt = P(T) − (T − T_amb)/R (common practice), solved
independently with scipy.integrate.solve_ivp; the temperature coefficient of annealed copper,
0.00393 /K at 20 °C (IEC 60028); MOSFET Rds(on) tempco ≈ +0.6 %/K (common practice, from memory).
"""

from __future__ import annotations

import math

import pytest
from scipy.integrate import solve_ivp

from benchctl.simulated_instruments.converter import (BUCK_12V_1V2, FLYBACK_48V_5V, ConverterModel, LoadSetting, ManualClock,
                                             ScaledClock, solve_dut)


def _warming(design, frac: float = 1.0, *, drift: bool = True, clock=None):
    clock = ManualClock() if clock is None else clock
    model = ConverterModel(design, clock=clock, thermal_drift=drift)
    model.set_load("CC", frac * design.iout_rated_a, True)
    model.set_source(design.vin_nom_v, 10.0, True)
    return model, clock


def test_resistances_follow_their_temperature_coefficients() -> None:
    d = FLYBACK_48V_5V
    warm = d.at_temperature(d.thermal.ambient_c + 50.0)
    assert d.thermal.copper_tempco_per_k == 0.00393                       # IEC 60028
    assert warm.losses.r_primary_ohm == pytest.approx(d.losses.r_primary_ohm * (1 + 0.00393 * 50), rel=1e-12)
    assert warm.losses.r_secondary_ohm == pytest.approx(d.losses.r_secondary_ohm * (1 + 0.00393 * 50), rel=1e-12)
    assert warm.losses.r_switch_ohm == pytest.approx(d.losses.r_switch_ohm * (1 + 0.006 * 50), rel=1e-12)
    assert warm.bench.cable_r_ohm == d.bench.cable_r_ohm                    # the bench cable stays cool
    assert d.at_temperature(d.thermal.ambient_c) is d
    assert d.thermal.tau_s == pytest.approx(180.0) and BUCK_12V_1V2.thermal.tau_s == pytest.approx(100.0)


@pytest.mark.parametrize("design", [FLYBACK_48V_5V, BUCK_12V_1V2])
def test_drift_is_off_by_default(design) -> None:
    model, clock = _warming(design, drift=False)
    clock.advance(1.0)
    eff = model.operating_point().efficiency
    clock.advance(20 * design.thermal.tau_s)
    model.terminals()
    assert not model.thermal_drift
    assert model.temperature_c() == design.thermal.ambient_c
    assert model.operating_point().efficiency == eff


@pytest.mark.parametrize("design", [FLYBACK_48V_5V, BUCK_12V_1V2])
def test_temperature_follows_the_thermal_network(design) -> None:
    model, clock = _warming(design)
    clock.advance(1.0)
    th = design.thermal
    vin = model.terminals().input_v
    load = LoadSetting("CC", design.iout_rated_a, True)

    def loss_w(temp_c: float) -> float:
        return solve_dut(design.at_temperature(temp_c), vin, load, was_running=True).loss_w

    def rhs(_t, y):
        return [(loss_w(y[0]) - (y[0] - th.ambient_c) / th.r_th_k_per_w) / th.c_th_j_per_k]

    t_end = 2.0 * th.tau_s
    ref = solve_ivp(rhs, (1.0, 1.0 + t_end), [model.temperature_c()], dense_output=True, rtol=1e-8, atol=1e-8)
    for frac in (0.25, 0.5, 1.0):
        clock.advance(1.0 + frac * t_end - clock.now_s())
        assert model.temperature_c() == pytest.approx(float(ref.sol(clock.now_s())[0]), abs=0.05)
    clock.advance(12 * th.tau_s)
    t_eq = model.temperature_c()
    # equilibrium: all the loss flows through R (energy balance)
    assert t_eq - th.ambient_c == pytest.approx(th.r_th_k_per_w * model.operating_point().loss_w, rel=1e-4)


@pytest.mark.parametrize("design", [FLYBACK_48V_5V, BUCK_12V_1V2])
def test_efficiency_falls_a_little_as_the_parts_warm(design) -> None:
    model, clock = _warming(design)
    clock.advance(1.0)
    cold = model.operating_point()
    clock.advance(6 * design.thermal.tau_s)
    warm = model.operating_point()
    assert warm.loss_w > cold.loss_w
    assert 0.001 < cold.efficiency - warm.efficiency < 0.01          # a fraction of a %-point
    # the truth for tests is the steady state at the present temperature
    truth = model.steady_state(warm.vin_v, "CC", design.iout_rated_a, was_running=True)
    ref = solve_dut(design.at_temperature(model.temperature_c()), warm.vin_v,
                    LoadSetting("CC", design.iout_rated_a, True), was_running=True)
    assert truth.efficiency == pytest.approx(ref.efficiency, rel=1e-12)
    assert model.terminals().input_a == pytest.approx(warm.iin_a, rel=1e-6)   # the input follows the drift


def test_drift_runs_in_model_time_so_a_larger_time_scale_is_faster() -> None:
    d = FLYBACK_48V_5V
    now = [0.0]

    def real() -> float:
        return now[0]

    slow, _ = _warming(d, clock=ScaledClock(1.0, real_time=real))
    fast, _ = _warming(d, clock=ScaledClock(10.0, real_time=real))
    now[0] = 18.0                     # 18 s of wall time
    assert fast.temperature_c() > slow.temperature_c() + 1.0
    reference, clock = _warming(d)
    clock.advance(180.0)              # the same 180 s of model time as the fast bench
    assert fast.temperature_c() == pytest.approx(reference.temperature_c(), abs=1e-6)


def test_settling_times_exclude_the_slow_drift() -> None:
    d = FLYBACK_48V_5V
    model, clock = _warming(d, 0.5)
    clock.advance(60.0)
    model.set_load("CC", 4.5, True)
    ts = model.true_settling_time_s("input_w", rel_tol=1e-3)
    assert 0.0 < ts < 0.5
    assert math.isfinite(model.temperature_c())
