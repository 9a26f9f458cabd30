"""Turn-on / turn-off metrics, inrush I²t and the UVLO bisection against textbook results."""

from __future__ import annotations

import math

import numpy as np
import pytest
import scipy.signal

from benchctl.analysis.inrush import inrush_metrics
from benchctl.analysis.thresholds import Bracket, bisect_threshold, ramp_bracket, trials_needed
from benchctl.analysis.turn_on import input_edge_s, turn_off_metrics, turn_on_metrics


def test_linear_ramp_rise_time_is_eight_tenths_of_the_ramp() -> None:
    # A linear ramp 0 -> V over T crosses 10 % at 0.1 T and 90 % at 0.9 T: t_r = 0.8 T
    # (IEEE 181-2011 reference levels, from memory).
    t = np.linspace(-1e-3, 20e-3, 21001)
    t0, ramp = 2e-3, 8e-3
    v = 5.0 * np.clip((t - t0) / ramp, 0.0, 1.0)
    m = turn_on_metrics(t, v, t_input_s=0.0)
    assert m.rise_time_s == pytest.approx(0.8 * ramp, rel=1e-6)
    assert m.delay_s == pytest.approx(t0 + 0.1 * ramp, rel=1e-6)
    assert m.monotonic and m.overshoot_pct == pytest.approx(0.0, abs=1e-9)
    # the output is within 1 % of 5 V from 0.99 of the ramp on
    assert m.time_to_regulation_s == pytest.approx(t0 + 0.99 * ramp, rel=1e-6)


def test_first_order_rise_time_is_tau_ln9_and_regulation_tau_ln_amplitude_over_band() -> None:
    # 1 - exp(-t/tau): t10 = tau ln(10/9), t90 = tau ln 10, t_r = tau ln 9 ≈ 2.2 tau (common practice).
    tau = 1e-3
    t = np.linspace(-1e-3, 15e-3, 160001)
    v = np.where(t > 0, 12.0 * -np.expm1(-t / tau), 0.0)
    m = turn_on_metrics(t, v, t_input_s=0.0, final_v=12.0, band_v=0.12)
    assert m.rise_time_s == pytest.approx(tau * math.log(9.0), rel=1e-4)
    assert m.time_to_regulation_s == pytest.approx(tau * math.log(12.0 / 0.12), rel=1e-4)


def test_second_order_overshoot_matches_the_damping_formula() -> None:
    # Percent overshoot of a second-order step response: 100·exp(-ζπ/sqrt(1-ζ²))
    # (Ogata, Modern Control Engineering, 5th ed., §5-3); response from scipy.signal.step.
    zeta, wn = 0.4, 2 * math.pi * 500.0
    t = np.linspace(0.0, 20e-3, 40001)
    _, y = scipy.signal.step(([wn * wn], [1.0, 2 * zeta * wn, wn * wn]), T=t)
    m = turn_on_metrics(t, 3.3 * y, t_input_s=0.0, final_v=3.3)
    assert m.overshoot_pct == pytest.approx(100 * math.exp(-zeta * math.pi / math.sqrt(1 - zeta ** 2)), rel=1e-3)


def test_a_dip_during_the_rise_is_not_monotonic() -> None:
    t = np.linspace(0.0, 10e-3, 10001)
    v = 5.0 * np.clip(t / 8e-3, 0.0, 1.0)
    v[(t > 4e-3) & (t < 4.5e-3)] -= 0.3
    m = turn_on_metrics(t, v, t_input_s=0.0, dip_tol_v=0.05)
    assert not m.monotonic and m.largest_dip_v == pytest.approx(0.3, rel=0.05)


def test_input_edge_and_turn_off_fall_time_of_an_rc_discharge() -> None:
    # RC discharge: 90 % -> 10 % takes RC·ln 9 (the exponential's own levels, common practice).
    rc = 0.66e-3
    t = np.linspace(-1e-3, 10e-3, 110001)
    vin = np.where(t < 0, 48.0, 0.0)
    vout = np.where(t < 0, 5.0, 5.0 * np.exp(-np.maximum(t, 0) / rc))
    t_in = input_edge_s(t, vin, 24.0, rising=False)
    assert t_in == pytest.approx(0.0, abs=2e-7)
    m = turn_off_metrics(t, vout, t_input_s=t_in, final_v=0.0)
    assert m.fall_time_s == pytest.approx(rc * math.log(9.0), rel=1e-3)
    assert m.delay_s == pytest.approx(rc * math.log(1 / 0.9), rel=1e-2)
    assert m.undershoot_v == pytest.approx(0.0, abs=1e-12)


def test_rc_charge_i2t_is_cv2_over_2r() -> None:
    # Charging C through R from a step V: i = V/R·exp(-t/RC); ∫i² dt = C·V²/(2R)
    # (the energy ½CV² burnt in R; any circuits text).
    c, r, vs = 10e-6, 2.0, 48.0
    t = np.arange(-10_000, 400_001) * 1e-9          # 1 ns steps, t = 0 on the grid
    i = np.where(t >= 0, vs / r * np.exp(-np.maximum(t, 0) / (r * c)), 0.0)
    m = inrush_metrics(t, i, end_fraction=1e-6, start_fraction=0.5, source_limit_a=30.0)
    assert m.peak_a == pytest.approx(vs / r, rel=1e-9)
    assert m.i2t_a2s == pytest.approx(c * vs * vs / (2 * r), rel=1e-3)
    assert m.charge_c == pytest.approx(c * vs, rel=1e-3)   # Q = C·V
    assert m.peak_to_limit == pytest.approx(24.0 / 30.0)


def test_current_limited_charge_i2t_is_i_squared_t() -> None:
    # A source at its current limit I charges C to V in C·V/I: I²t = I²·C·V/I = I·C·V.
    c, vs, ilim = 10e-6, 48.0, 2.0
    t = np.linspace(-50e-6, 500e-6, 55001)
    t_end = c * vs / ilim
    i = np.where((t >= 0) & (t < t_end), ilim, 0.0)
    m = inrush_metrics(t, i, source_limit_a=ilim)
    assert m.i2t_a2s == pytest.approx(ilim * c * vs, rel=2e-3)
    assert m.peak_to_limit == pytest.approx(1.0)
    assert m.details["flags"] == []


def test_bisection_lands_within_the_resolution_in_the_textbook_number_of_trials() -> None:
    # Bisection: ceil(log2(width/resolution)) halvings (Burden & Faires, Numerical Analysis, §2.1).
    truth = 33.9271
    vin = np.arange(30.0, 36.01, 0.5)
    bracket = ramp_bracket(vin, vin >= truth)
    assert bracket == Bracket(33.5, 34.0)
    th = bisect_threshold(lambda v: v >= truth, bracket, 0.01)
    assert th.trials == trials_needed(0.5, 0.01) == 6
    assert abs(th.value_v - truth) <= th.half_width_v <= 0.005
