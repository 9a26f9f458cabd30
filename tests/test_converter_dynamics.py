"""Dynamics and clocks of the converter model: load slew, closed-loop recovery, input filter, starts and stops."""

from __future__ import annotations

import math

import control
import numpy as np
import pytest
import scipy.integrate
import scipy.signal

from benchctl.simulated_instruments.converter import (BUCK_12V_1V2, DEFAULT_LOAD_SLEW_A_PER_S, FLYBACK_48V_5V,
                                             ConverterModel, ManualClock, ModelClock, ScaledClock)

DESIGNS = [FLYBACK_48V_5V, BUCK_12V_1V2]


def _running(design, iout_a: float, *, slew_a_per_s: float | None = None) -> tuple[ConverterModel, ManualClock]:
    clock = ManualClock()
    model = ConverterModel(design, clock=clock, seed=11)
    model.set_load("CC", iout_a, True, slew_a_per_s=slew_a_per_s)
    model.set_source(design.vin_nom_v, 10.0, True)
    clock.advance(40 * model.soft_start_time_constant_s)
    return model, clock


def _at(model: ConverterModel, clock: ManualClock, t_s: float):
    clock.advance(t_s - clock.now_s())
    return model.terminals()


@pytest.mark.parametrize("design", DESIGNS)
def test_load_current_ramps_at_the_slew_rate(design) -> None:
    # Slew rate is the rate of change of the load's current, A/s (its definition); a CC load then
    # holds its setting exactly.
    i0, i1 = 0.3 * design.iout_rated_a, 0.9 * design.iout_rated_a
    model, clock = _running(design, i0)
    assert model.load_slew_a_per_s == DEFAULT_LOAD_SLEW_A_PER_S == 1e3
    t0 = clock.now_s()
    model.set_load("CC", i1, True)
    ramp_s = (i1 - i0) / DEFAULT_LOAD_SLEW_A_PER_S
    for frac in (0.1, 0.5, 0.9):
        t = _at(model, clock, t0 + frac * ramp_s)
        assert t.load_a == pytest.approx(i0 + DEFAULT_LOAD_SLEW_A_PER_S * (t.t_s - t0), rel=1e-9)
        assert t.output_a == pytest.approx(t.load_a, rel=1e-12)
    assert _at(model, clock, t0 + 1.01 * ramp_s).load_a == pytest.approx(i1, rel=1e-12)
    assert model.true_settling_time_s("load_a", abs_tol=1e-9) == pytest.approx(ramp_s, rel=1e-6)


def test_a_change_mid_ramp_continues_from_the_present_current() -> None:
    # Continuity of the state: the new ramp starts where the old one stood.
    d = FLYBACK_48V_5V
    model, clock = _running(d, 1.0, slew_a_per_s=500.0)
    t0 = clock.now_s()
    model.set_load("CC", 4.0, True)
    mid = _at(model, clock, t0 + 2e-3)                         # 1 A + 500 A/s · 2 ms = 2 A
    assert mid.load_a == pytest.approx(2.0, rel=1e-9)
    model.set_load("CC", 1.5, True)
    assert model.terminals().load_a == pytest.approx(2.0, rel=1e-9)
    assert model.terminals().input_a == pytest.approx(mid.input_a, rel=1e-9)
    assert _at(model, clock, t0 + 2.5e-3).load_a == pytest.approx(1.75, rel=1e-9)


@pytest.mark.parametrize("design", DESIGNS)
def test_input_current_is_a_first_order_lag_of_the_demand(design) -> None:
    # After the ramp the targets stand still and a first-order lag decays by 1/e per τ
    # (exponential decay, common practice); τ is the bench's input-filter time constant.
    model, clock = _running(design, 0.3 * design.iout_rated_a)
    t0 = clock.now_s()
    model.set_load("CC", 0.8 * design.iout_rated_a, True)
    tau = design.bench.input_filter_tau_s
    assert model.time_constant_s == tau
    ramp_s = 0.5 * design.iout_rated_a / model.load_slew_a_per_s
    final = model.operating_point().iin_a
    d1 = _at(model, clock, t0 + ramp_s + 0.5 * tau).input_a - final
    d2 = _at(model, clock, t0 + ramp_s + 1.5 * tau).input_a - final
    assert d1 < 0.0 and d2 / d1 == pytest.approx(math.exp(-1.0), rel=1e-9)
    t = _at(model, clock, t0 + ramp_s + 2.0 * tau)
    assert t.source_a == pytest.approx(t.input_a, rel=1e-12)
    assert t.input_v == pytest.approx(t.source_v - design.bench.cable_r_ohm * t.input_a, rel=1e-12)


def test_input_current_lags_a_slow_ramp_by_tau() -> None:
    # A first-order system follows a ramp of slope s with a steady lag s·τ (Ogata, Modern Control
    # Engineering, ramp response of first-order systems).  The demand is the steady state at each
    # load current, taken here from the model's own truth function.
    d = FLYBACK_48V_5V
    slew = 10.0                                                  # A/s: a 3 A ramp lasts 300 ms = 15 τ
    model, clock = _running(d, 1.0, slew_a_per_s=slew)
    t0 = clock.now_s()
    model.set_load("CC", 4.0, True)
    tau = d.bench.input_filter_tau_s
    t_probe = t0 + 8 * tau                                       # long after the start of the ramp
    i_load = 1.0 + slew * (t_probe - t0)
    t = _at(model, clock, t_probe)
    vin = t.input_v
    demand = model.steady_state(vin, "CC", i_load, was_running=True).iin_a
    slope = (model.steady_state(vin, "CC", i_load + 0.05, was_running=True).iin_a
             - model.steady_state(vin, "CC", i_load - 0.05, was_running=True).iin_a) / 0.1 * slew
    assert demand - t.input_a == pytest.approx(slope * tau, rel=0.02)


@pytest.mark.parametrize("design", DESIGNS)
def test_output_recovers_through_the_closed_loop_output_impedance(design) -> None:
    # The output after a load ramp: static regulation at the present current, less the decaying part of
    # the closed-loop output impedance's response to the ramp, computed here independently with
    # scipy.signal.lsim on Zout_closed(s) (Erickson & Maksimović 2nd ed. ch. 9).
    i0, i1 = 0.5 * design.iout_rated_a, 1.0 * design.iout_rated_a
    model, clock = _running(design, i1)
    zcl = model.output_impedance_transfer()                      # linearised at the heavier end
    model.set_load("CC", i0, True)
    clock.advance(1.0)
    v_before = model.terminals().output_v
    t0 = clock.now_s()
    model.set_load("CC", i1, True)
    ramp_s = (i1 - i0) / model.load_slew_a_per_s
    times = np.linspace(0.0, 4 * ramp_s, 4001)
    di = np.clip(times / ramp_s, 0.0, 1.0) * (i1 - i0)
    _, dv_lin, _ = scipy.signal.lsim((list(zcl.num), list(zcl.den)), di, times)
    excess = -(dv_lin - zcl.dc_gain() * di)
    vin = model.terminals().input_v
    probes = [200, 700, 1000, 1500, 2500, 4000]
    for k in probes:
        t = model.terminals_at(t0 + times[k])
        static = model.steady_state(vin, "CC", i0 + di[k], was_running=True).vout_v
        assert t.output_v == pytest.approx(static + excess[k], abs=2e-5 * design.vout_nom_v), times[k]
    # a load increase pulls the output below both steady states before the loop recovers
    dip = min(model.terminals_at(t0 + x).output_v for x in times[::40])
    assert dip < min(v_before, model.operating_point().vout_v) - 1e-5 * design.vout_nom_v


@pytest.mark.parametrize("design", DESIGNS)
def test_line_step_recovers_with_the_crossover_time_constant(design) -> None:
    # τ_loop = 1/(2π·f_c) of the loop at the new line, f_c from python-control's control.margin
    # (wgc, rad/s).
    model, clock = _running(design, 0.6 * design.iout_rated_a)
    v_before = model.terminals().output_v
    t0 = clock.now_s()
    model.set_source(design.vin_max_v, 10.0, True)
    v_after = model.operating_point().vout_v
    loop = model.loop_transfer()
    _, _, _, wgc = control.margin(control.tf(list(loop.num), list(loop.den)))
    tau_loop = 1.0 / wgc
    assert model.loop_time_constant_s() == pytest.approx(tau_loop, rel=1e-3)
    assert v_after != v_before
    # The output follows the closed-loop line-to-output step response Gvg/(1+T) (Erickson & Maksimović,
    # 2nd ed., ch. 9; converter.line_disturbance), from scipy.signal.step of that rational function;
    # the small residual of the static shift (large-signal minus G(0)·ΔV) decays with τ_loop.
    gvg = model.line_to_output_transfer()
    dv = design.vin_max_v - design.vin_nom_v
    times = np.array([0.0, 0.3, 1.0, 3.0]) * tau_loop
    _, g = scipy.signal.step((list(gvg.num), list(gvg.den)), T=np.linspace(0.0, times[-1], 3001))
    g_at = np.interp(times, np.linspace(0.0, times[-1], 3001), g)
    for x, gx in zip(times[1:], g_at[1:]):
        t = _at(model, clock, t0 + x)
        expected = v_after + dv * (gx - gvg.dc_gain())
        residual = abs(v_after - v_before - dv * gvg.dc_gain())
        assert t.output_v == pytest.approx(expected, abs=residual + 2e-6 * design.vout_nom_v), x


@pytest.mark.parametrize("design", DESIGNS)
def test_input_power_settles_after_the_output_voltage(design) -> None:
    model, clock = _running(design, 0.2 * design.iout_rated_a)
    model.set_load("CC", 0.9 * design.iout_rated_a, True)
    t_out = model.true_settling_time_s("output_v", rel_tol=1e-4)
    t_in = model.true_settling_time_s("input_w", rel_tol=1e-4)
    t_load = model.true_settling_time_s("load_a", rel_tol=1e-4)
    assert t_load < t_in and t_out < t_in
    assert t_in > 3 * design.bench.input_filter_tau_s


def test_true_settling_time_is_where_the_quantity_stays_inside() -> None:
    # Checked by sampling the model forward (the definition of a settling time within a band).
    d = FLYBACK_48V_5V
    model, clock = _running(d, 0.5)
    t0 = clock.now_s()
    model.set_load("CC", 4.5, True)
    final = model.operating_point().pin_w
    tol = 1e-3 * final
    ts = model.true_settling_time_s("input_w", abs_tol=tol)
    assert ts == pytest.approx(model.true_settling_time_s("input_w", rel_tol=1e-3), rel=1e-9)

    def pin(t_s: float) -> float:
        t = model.terminals_at(t_s)
        return t.input_v * t.input_a

    assert abs(pin(t0 + ts * 0.999) - final) > tol
    later = t0 + ts + np.geomspace(1e-6, 20 * model.time_constant_s, 200)
    assert all(abs(pin(x) - final) <= tol * (1 + 1e-9) for x in later)


def test_line_step_input_settling_matches_the_first_order_formula() -> None:
    # No load ramp: the input current is a pure first-order lag, settling τ·ln(step/tol) (common practice).
    d = BUCK_12V_1V2
    model, clock = _running(d, 6.0)
    i_before = model.terminals().input_a
    model.set_source(d.vin_min_v, 10.0, True)
    i_after = model.operating_point().iin_a
    step = abs(i_after - i_before)
    tol = step / 200.0
    assert model.true_settling_time_s("input_a", abs_tol=tol) == pytest.approx(
        d.bench.input_filter_tau_s * math.log(200.0), rel=1e-6)
    assert model.settling_time_s(200.0, 1.0) == pytest.approx(model.active_time_constant_s * math.log(200.0))


def test_start_follows_the_soft_start_ramp() -> None:
    # Soft start: from off, switching begins start_delay_s after the input crosses UVLO on and
    # the output follows a linear reference ramp over soft_start_s (start_up.py); the input
    # capacitance charges at the source's current limit, dv/dt = I/C (capacitor law).
    d = FLYBACK_48V_5V
    clock = ManualClock()
    model = ConverterModel(d, clock=clock)
    model.set_load("CR", 5.0, True)
    t0 = clock.now_s()
    model.set_source(48.0, 5.0, True)
    start = model.start_up_truth()
    assert start is not None
    assert start.uvlo_crossing_s - t0 == pytest.approx(
        d.start_up.input_capacitance_f * d.protection.uvlo_on_v / 5.0, rel=1e-9)
    t_on = start.switching_start_s
    assert t_on - start.uvlo_crossing_s == pytest.approx(d.start_up.start_delay_s, rel=1e-12)
    clock.advance(t_on + 0.5 * d.start_up.soft_start_s - clock.now_s())
    v_final = model.operating_point().vout_v
    assert model.terminals().output_v == pytest.approx(0.5 * v_final, rel=2e-3)
    # a load change during the start continues the start as one relaxation from where it stands
    model.set_load("CR", 4.0, True)
    assert model.active_time_constant_s == pytest.approx(start.tau_s)
    clock.advance(40 * model.soft_start_time_constant_s)
    assert model.terminals().output_v == pytest.approx(model.operating_point().vout_v, rel=1e-9)


def test_disabled_load_ramps_down_and_the_output_stays_regulated() -> None:
    d = BUCK_12V_1V2
    model, clock = _running(d, 5.0)
    v_before = model.terminals().output_v
    t0 = clock.now_s()
    model.set_load("CC", 5.0, False)
    ramp_s = 5.0 / model.load_slew_a_per_s
    assert _at(model, clock, t0 + 0.5 * ramp_s).load_a == pytest.approx(2.5, rel=1e-9)
    t = _at(model, clock, t0 + ramp_s + 60 * model.time_constant_s)
    assert t.load_a == pytest.approx(0.0, abs=1e-12) and t.output_a == pytest.approx(0.0, abs=1e-12)
    assert t.output_v == pytest.approx(v_before, rel=5e-3)   # still regulating at no load
    assert model.operating_point().state == "regulating"


def test_disabled_source_stops_with_the_settle_time_constant() -> None:
    d = BUCK_12V_1V2
    model, clock = _running(d, 5.0)
    model.set_source(d.vin_nom_v, 10.0, False)
    tau = d.bench.settle_tau_s
    clock.advance(tau)
    assert model.terminals().output_a == pytest.approx(5.0 * math.exp(-1.0), rel=1e-6)
    clock.advance(60 * tau)
    t = model.terminals()
    assert t.input_a == pytest.approx(0.0, abs=1e-12) and t.output_v == pytest.approx(0.0, abs=1e-12)
    assert model.operating_point().state == "off"


def test_mean_terminals_is_the_time_average() -> None:
    # Mean over an interval that spans a setting, against scipy.integrate.quad of the instantaneous
    # values (powers: the mean of v·i, what an integrating meter reads).
    d = FLYBACK_48V_5V
    model, clock = _running(d, 1.0)
    t_a = clock.now_s()
    clock.advance(3e-3)
    model.set_load("CC", 3.0, True)
    t_b = clock.now_s() + 0.025
    clock.advance(0.03)
    m = model.mean_terminals(t_a, t_b)
    span = t_b - t_a
    edges = [t_a, t_a + 3e-3, t_a + 5e-3, t_b]

    def avg(f) -> float:
        return sum(scipy.integrate.quad(f, a, b, limit=400, epsabs=1e-12)[0] for a, b in zip(edges, edges[1:])) / span

    assert m.input_a == pytest.approx(avg(lambda x: model.terminals_at(x).input_a), rel=1e-7)
    assert m.output_v == pytest.approx(avg(lambda x: model.terminals_at(x).output_v), rel=1e-9)
    assert m.load_a == pytest.approx(avg(lambda x: model.terminals_at(x).load_a), rel=1e-7)
    assert m.input_w == pytest.approx(avg(lambda x: model.terminals_at(x).input_v * model.terminals_at(x).input_a),
                                      rel=1e-7)
    point = model.mean_terminals(t_b, t_b)
    assert point.output_v == model.terminals_at(t_b).output_v


def test_scaled_clock_scales_real_time() -> None:
    now = [100.0]
    clock = ScaledClock(20.0, real_time=lambda: now[0])
    assert isinstance(clock, ModelClock) and isinstance(ManualClock(), ModelClock)
    assert clock.now_s() == 0.0 and clock.scale == 20.0
    now[0] += 0.05
    assert clock.now_s() == pytest.approx(1.0)
    with pytest.raises(ValueError, match="scale"):
        ScaledClock(0.0)
    manual = ManualClock()
    assert manual.advance(0.25) == 0.25 and manual.now_s() == 0.25
    with pytest.raises(ValueError, match="backwards"):
        manual.advance(-1.0)


def test_model_rng_is_seeded() -> None:
    a = ConverterModel(BUCK_12V_1V2, clock=ManualClock(), seed=5).rng.normal(size=4)
    b = ConverterModel(BUCK_12V_1V2, clock=ManualClock(), seed=5).rng.normal(size=4)
    assert (a == b).all()
