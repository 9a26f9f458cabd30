"""Settling dynamics and clocks of the converter model."""

from __future__ import annotations

import math

import pytest

from simulated_instruments.converter import (BUCK_12V_1V2, FLYBACK_48V_5V, ConverterModel, ManualClock,
                                             ModelClock, ScaledClock)


def _running(design, iout_a: float) -> tuple[ConverterModel, ManualClock]:
    clock = ManualClock()
    model = ConverterModel(design, clock=clock, seed=11)
    model.set_load("CC", iout_a, True)
    model.set_source(design.vin_nom_v, 10.0, True)
    clock.advance(80 * model.soft_start_time_constant_s)
    return model, clock


@pytest.mark.parametrize("design", [FLYBACK_48V_5V, BUCK_12V_1V2])
def test_step_deviation_decays_exponentially(design) -> None:
    # First-order settling x(t) = x∞ + (x0 − x∞)·exp(−t/τ) (common practice for a settled bench).
    model, clock = _running(design, 0.3 * design.iout_rated_a)
    before = model.terminals()
    model.set_load("CC", 0.9 * design.iout_rated_a, True)
    op = model.operating_point()
    tau = model.time_constant_s
    assert model.active_time_constant_s == tau
    for t_over_tau in (0.25, 1.0, 2.0, 4.0):
        clock.advance(before.t_s + t_over_tau * tau - clock.now_s())
        t = model.terminals()
        w = math.exp(-(t.t_s - before.t_s) / tau)
        assert t.output_a == pytest.approx(op.iout_a + (before.output_a - op.iout_a) * w, rel=1e-12)
        assert t.output_v == pytest.approx(op.vout_v + (before.output_v - op.vout_v) * w, rel=1e-12)
        assert t.input_a == pytest.approx(op.iin_a + (before.input_a - op.iin_a) * w, rel=1e-12)
    # ratio of successive deviations over one τ is 1/e
    d1 = abs(model.terminals().output_a - op.iout_a)
    clock.advance(tau)
    d2 = abs(model.terminals().output_a - op.iout_a)
    assert d2 / d1 == pytest.approx(math.exp(-1.0), rel=1e-9)


def test_change_mid_transient_starts_from_present_value() -> None:
    # The new transient begins at the value reached by the old one (continuity of the state).
    d = FLYBACK_48V_5V
    model, clock = _running(d, 1.0)
    i_start = model.terminals().output_a
    model.set_load("CC", 4.0, True)
    clock.advance(0.5 * model.time_constant_s)
    mid = model.terminals()
    assert i_start < mid.output_a < 4.0
    model.set_load("CC", 2.0, True)
    assert model.terminals().output_a == pytest.approx(mid.output_a, rel=1e-12)
    clock.advance(model.time_constant_s)
    expected = 2.0 + (mid.output_a - 2.0) * math.exp(-1.0)
    assert model.terminals().output_a == pytest.approx(expected, rel=1e-9)


@pytest.mark.parametrize(("step", "tol"), [(0.5, 1e-3), (1.0, 1e-4), (0.2, 0.05)])
def test_settling_time_matches_tau_ln_step_over_tol(step: float, tol: float) -> None:
    # For exp(−t/τ) decay, the time to stay within tol of a step 'step' is τ·ln(step/tol) (common practice).
    d = BUCK_12V_1V2
    model, clock = _running(d, 2.0)
    i0 = model.terminals().output_a
    i1 = i0 * (1 + step)
    model.set_load("CC", i1, True)
    ts = model.settling_time_s(step, tol)
    assert ts == pytest.approx(model.time_constant_s * math.log(step / tol), rel=1e-12)
    clock.advance(0.999 * ts)
    assert abs(model.terminals().output_a - i1) / i0 > tol
    clock.advance(0.002 * ts)
    assert abs(model.terminals().output_a - i1) / i0 < tol
    assert model.settling_time_s(tol / 2, tol) == 0.0


def test_start_uses_soft_start_time_constant() -> None:
    # Soft start: from off, the output rises as 1 − exp(−t/τ_ss) with the slower soft-start constant.
    d = FLYBACK_48V_5V
    clock = ManualClock()
    model = ConverterModel(d, clock=clock)
    model.set_load("CR", 5.0, True)
    model.set_source(48.0, 5.0, True)
    tau_ss = model.soft_start_time_constant_s
    assert model.active_time_constant_s == tau_ss > model.time_constant_s
    clock.advance(tau_ss)
    v_final = model.operating_point().vout_v
    assert model.terminals().output_v == pytest.approx(v_final * (1 - math.exp(-1.0)), rel=1e-12)


@pytest.mark.parametrize("what", ["source", "load"])
def test_disabled_source_or_load_gives_zero_current(what: str) -> None:
    d = BUCK_12V_1V2
    model, clock = _running(d, 5.0)
    v_before = model.terminals().output_v
    if what == "load":
        model.set_load("CC", 5.0, False)
    else:
        model.set_source(d.vin_nom_v, 10.0, False)
    clock.advance(model.time_constant_s)
    t = model.terminals()
    assert t.output_a == pytest.approx(5.0 * math.exp(-1.0), rel=1e-9)
    clock.advance(60 * model.time_constant_s)
    t = model.terminals()
    assert t.load_a == pytest.approx(0.0, abs=1e-12) and t.output_a == pytest.approx(0.0, abs=1e-12)
    if what == "source":
        assert t.input_a == pytest.approx(0.0, abs=1e-12) and t.output_v == pytest.approx(0.0, abs=1e-12)
        assert model.operating_point().state == "off"
    else:
        assert t.output_v == pytest.approx(v_before, rel=5e-3)   # still regulating at no load


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
