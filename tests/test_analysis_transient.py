"""Load-step metrics against the analytic first-order recovery.

A first-order recovery v(t) = V_final - D·e^(-t/τ) is inside a band b around V_final
from t = τ·ln(D/b) on (solve D·e^(-t/τ) = b; first-order step response, any circuits
or control text — from memory). With a static shift s toward the droop, the band b
around the pre-step value is reached at τ·ln(D/(b - s)).
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from benchctl.analysis.transient import LOAD_DECREASE, LOAD_INCREASE, find_step_time, load_step_metrics
from benchctl.errors import AnalysisInputError

# Scenario: 12 V -> 1.2 V point-of-load buck, 0 -> 10 A load step.
V_PRE = 1.2
TAU_S = 20e-6
DT_S = 20e-9
T_STEP_S = 100e-6


def _first_order(droop_v: float, shift_v: float, tau_s: float = TAU_S, t_end_s: float = 1.5e-3):
    """Output that drops by droop_v at the step and recovers exponentially to V_PRE - shift_v."""
    t = np.arange(0.0, t_end_s, DT_S)
    v = np.full_like(t, V_PRE)
    after = t >= T_STEP_S
    v_final = V_PRE - shift_v
    v[after] = v_final - (droop_v - shift_v) * np.exp(-(t[after] - T_STEP_S) / tau_s)
    return t, v


def test_recovery_and_settling_times_match_first_order_formula():
    droop, shift, band = 0.060, 0.004, 0.012
    t, v = _first_order(droop, shift)
    m = load_step_metrics(t, v, step_time_s=T_STEP_S, band_v=band)
    d = droop - shift  # deviation beyond the final value at the edge
    # analytic: first-order response enters the band at tau*ln(D/b) (see module docstring)
    expected_settle = TAU_S * math.log(d / band)
    expected_recover = TAU_S * math.log(d / (band - shift))
    assert m.recovered and m.settled
    assert m.settling_after_step_s == pytest.approx(expected_settle, abs=DT_S)
    assert m.recovery_after_step_s == pytest.approx(expected_recover, abs=DT_S)
    # peak deviation is the droop at the edge; final and static shift as constructed
    assert m.load_step == LOAD_INCREASE
    assert m.peak_deviation_v == pytest.approx(-droop, rel=1e-9)
    assert m.peak_deviation_abs_v == pytest.approx(droop, rel=1e-9)
    assert m.peak_after_step_s == pytest.approx(0.0, abs=DT_S)
    assert m.pre_step_v == pytest.approx(V_PRE, rel=1e-12)
    assert m.final_v == pytest.approx(V_PRE - shift, abs=1e-9)
    assert m.static_shift_v == pytest.approx(-shift, abs=1e-9)


def test_relative_band_uses_final_value():
    droop, shift = 0.050, 0.0
    t, v = _first_order(droop, shift)
    m = load_step_metrics(t, v, step_time_s=T_STEP_S, band_rel=0.01)
    # band = 1 % of 1.2 V = 12 mV; analytic entry tau*ln(D/b) (first-order response, from memory)
    assert m.band_v == pytest.approx(0.012, rel=1e-9)
    assert m.recovery_after_step_s == pytest.approx(TAU_S * math.log(droop / 0.012), abs=DT_S)


def test_step_found_from_load_current_channel():
    droop, shift, band = 0.060, 0.0, 0.010
    t, v = _first_order(droop, shift)
    # load current 0 -> 10 A with a 1 us linear edge centred on T_STEP_S
    i = np.clip((t - (T_STEP_S - 0.5e-6)) / 1e-6, 0.0, 1.0) * 10.0
    t_found, direction = find_step_time(t, i)
    assert direction == LOAD_INCREASE
    assert t_found == pytest.approx(T_STEP_S, abs=DT_S)  # midpoint of the constructed edge
    m = load_step_metrics(t, v, iout_a=i, band_v=band)
    assert m.step_time_s == pytest.approx(T_STEP_S, abs=DT_S)
    # analytic first-order entry time (module docstring)
    assert m.recovery_after_step_s == pytest.approx(TAU_S * math.log(droop / band), abs=2 * DT_S)


def test_load_decrease_reports_overshoot_with_seeded_noise():
    rng = np.random.default_rng(1234)
    t = np.arange(0.0, 1.5e-3, DT_S)
    over = 0.045
    v = np.full_like(t, V_PRE)
    after = t >= T_STEP_S
    v[after] = V_PRE + over * np.exp(-(t[after] - T_STEP_S) / TAU_S)
    sigma = 0.1e-3
    v_noisy = v + rng.normal(0.0, sigma, t.size)  # 0.1 mV rms noise
    i = np.where(t < T_STEP_S, 10.0, 0.0)
    m = load_step_metrics(t, v_noisy, iout_a=i, band_v=0.012)
    assert m.load_step == LOAD_DECREASE
    assert m.peak_deviation_v > 0
    assert m.peak_deviation_v == pytest.approx(over, abs=3e-3)
    # analytic tau*ln(D/b) (first-order response); noise peaks (< 5 sigma here) can only move the
    # last band exit to where the clean deviation is b -/+ 5 sigma
    earliest = TAU_S * math.log(over / (0.012 + 5 * sigma))
    latest = TAU_S * math.log(over / (0.012 - 5 * sigma))
    assert earliest <= m.recovery_after_step_s <= latest


def test_static_shift_larger_than_band_does_not_recover():
    t, v = _first_order(droop_v=0.060, shift_v=0.020)
    m = load_step_metrics(t, v, step_time_s=T_STEP_S, band_v=0.010)
    assert not m.recovered
    assert m.recovery_after_step_s is None
    assert "static shift" in m.recovery_reason
    # it still settles to its own final value: analytic tau*ln(D/b)
    assert m.settled
    assert m.settling_after_step_s == pytest.approx(TAU_S * math.log(0.040 / 0.010), abs=DT_S)


def test_record_too_short_to_recover():
    # tau of 1 ms in a 0.3 ms record: still far outside the band at the end
    t, v = _first_order(droop_v=0.060, shift_v=0.0, tau_s=1e-3, t_end_s=0.3e-3)
    m = load_step_metrics(t, v, step_time_s=T_STEP_S, band_v=0.005, final_window_s=1e-6)
    assert not m.recovered
    assert m.recovery_after_step_s is None
    assert "end of the record" in m.recovery_reason


def test_min_in_band_hold_time_is_enforced():
    t, v = _first_order(droop_v=0.060, shift_v=0.0, tau_s=TAU_S, t_end_s=T_STEP_S + 60e-6)
    # enters the 10 mV band at tau*ln(6) = 35.8 us, leaving ~24 us in the record
    ok = load_step_metrics(t, v, step_time_s=T_STEP_S, band_v=0.010, min_in_band_s=10e-6)
    short = load_step_metrics(t, v, step_time_s=T_STEP_S, band_v=0.010, min_in_band_s=40e-6)
    assert ok.recovered
    assert not short.recovered and "min_in_band_s" in short.recovery_reason


def test_input_errors_say_what_to_do():
    t, v = _first_order(0.05, 0.0)
    with pytest.raises(AnalysisInputError, match="same capture"):
        load_step_metrics(t, v[:-1], step_time_s=T_STEP_S, band_v=0.01)
    v_nan = v.copy()
    v_nan[500] = np.nan
    with pytest.raises(AnalysisInputError, match="NaN"):
        load_step_metrics(t, v_nan, step_time_s=T_STEP_S, band_v=0.01)
    t_bad = t.copy()
    t_bad[10] = t_bad[9]
    with pytest.raises(AnalysisInputError, match="strictly increasing"):
        load_step_metrics(t_bad, v, step_time_s=T_STEP_S, band_v=0.01)
    with pytest.raises(AnalysisInputError, match="step_time_s or an iout_a"):
        load_step_metrics(t, v, band_v=0.01)
    with pytest.raises(AnalysisInputError, match="exactly one"):
        load_step_metrics(t, v, step_time_s=T_STEP_S)
    with pytest.raises(AnalysisInputError, match="outside the record"):
        load_step_metrics(t, v, step_time_s=1.0, band_v=0.01)
    with pytest.raises(AnalysisInputError, match="no load step found"):
        find_step_time(t, np.full_like(t, 5.0))
    with pytest.raises(AnalysisInputError, match="at least"):
        load_step_metrics(t[:5], v[:5], step_time_s=t[2], band_v=0.01)


def test_switching_period_average_removes_the_ripple():
    """A boxcar one switching period long has nulls at fsw and its harmonics (moving-average
    frequency response sin(pi f T)/(pi f T), signal-processing handbook formula)."""
    import numpy as np

    from benchctl.analysis.transient import switching_period_average

    fsw = 100e3
    t = np.arange(0, 2e-3, 1e-7)  # 100 samples per period
    step = np.where(t > 1e-3, -0.1, 0.0)
    ripple = 0.03 * np.sin(2 * np.pi * fsw * t) + 0.01 * np.sign(np.sin(2 * np.pi * 3 * fsw * t))
    avg = switching_period_average(t, step + ripple, fsw)
    away = (np.abs(t - 1e-3) > 2e-5) & (t > 2e-5) & (t < t[-1] - 2e-5)
    assert np.max(np.abs(avg[away] - step[away])) < 1e-3
