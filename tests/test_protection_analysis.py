"""benchctl.analysis.protection against hand calculations on synthetic waveforms."""

from __future__ import annotations

import numpy as np
import pytest

from benchctl.analysis.protection import hiccup_metrics, ovp_peak, recovery_s
from benchctl.errors import AnalysisInputError


def _hiccup(t: np.ndarray, on_a: float, period_s: float, on_s: float, start_s: float = 0.0) -> np.ndarray:
    x = np.mod(t - start_s, period_s)
    return np.where((t >= start_s) & (x < on_s), on_a, 0.0)


def test_rectangle_wave_period_duty_and_mean():
    # A rectangle wave of level A, period T, on-time τ: mean = A·τ/T, duty = τ/T (hand calculation,
    # any signals text; edges at the 50 % reference level, IEEE 181-2011 §5.3 mid-reference, from memory)
    dt = 1e-6
    t = np.arange(0.0, 0.2, dt)
    i = _hiccup(t, 6.0, 30e-3, 3e-3, start_s=1e-3)
    m = hiccup_metrics(t, i)
    assert m.period_s == pytest.approx(30e-3, abs=2 * dt)
    assert m.duty == pytest.approx(0.1, abs=2 * dt / 30e-3)
    assert m.average_a == pytest.approx(6.0 * 0.1, rel=1e-3)
    assert m.peak_a == pytest.approx(6.0)
    assert m.on_level_a == pytest.approx(6.0)
    assert m.cycles == 6 and m.reason == ""


def test_first_discharge_peak_kept_and_skipped_from_the_cycle_figures():
    # A 9 A first discharge pulse (the output capacitance into a CC load) before the hiccup: the peak is
    # the record's maximum; skip_s leaves the pulse out of period/duty/average (hand calculation)
    dt = 1e-6
    t = np.arange(0.0, 0.2, dt)
    i = _hiccup(t, 6.0, 25e-3, 5e-3, start_s=10e-3)
    i[(t >= 0.0) & (t < 1e-3)] = 9.0
    m = hiccup_metrics(t, i, skip_s=5e-3)
    assert m.peak_a == pytest.approx(9.0)
    assert m.period_s == pytest.approx(25e-3, abs=2 * dt)
    assert m.duty == pytest.approx(0.2, abs=1e-4)
    assert m.average_a == pytest.approx(6.0 * 0.2, rel=1e-3)


def test_noise_does_not_move_the_mid_reference_edges():
    # ±1 % noise on a 6 A level crosses nowhere near the 3 A reference: figures as without noise
    rng = np.random.default_rng(3)
    dt = 2e-6
    t = np.arange(0.0, 0.15, dt)
    i = _hiccup(t, 6.0, 30e-3, 3e-3) + rng.normal(0.0, 0.02, t.size)
    m = hiccup_metrics(t, i)
    assert m.period_s == pytest.approx(30e-3, abs=2 * dt)
    assert m.duty == pytest.approx(0.1, abs=3 * dt / 30e-3)
    assert m.average_a == pytest.approx(0.6, rel=0.01)


def test_fewer_than_two_cycles_says_so():
    # one rising edge only (5 ms; the next would be at 35 ms): no period can be measured
    t = np.arange(0.0, 0.03, 1e-6)
    m = hiccup_metrics(t, _hiccup(t, 6.0, 30e-3, 3e-3, start_s=5e-3))
    assert m.period_s is None and m.duty is None and m.average_a is None and "fewer than two" in m.reason
    with pytest.raises(AnalysisInputError):
        hiccup_metrics([0.0, 1.0], [0.0, 1.0])


def test_recovery_of_a_linear_soft_start():
    # Output 0 V until the retry at t_r, then a linear soft start to 5 V over T_ss: it enters 5 V ± 0.25 V
    # at t_r + T_ss·(4.75/5) (hand calculation: the ramp's crossing), counted from the release
    dt = 1e-6
    t = np.arange(-2e-3, 0.06, dt)
    t_release, t_retry, t_ss = 0.0, 15e-3, 8e-3
    v = np.clip((t - t_retry) / t_ss, 0.0, 1.0) * 5.0
    rec = recovery_s(t, v, t_release_s=t_release, level_v=5.0, band_v=0.25)
    assert rec == pytest.approx(t_retry + t_ss * 4.75 / 5.0 - t_release, abs=2 * dt)
    # an overshoot that leaves the band again counts: "for good" is after the last excursion
    v2 = v.copy()
    v2[(t > 30e-3) & (t < 31e-3)] = 5.4
    assert recovery_s(t, v2, t_release_s=0.0, level_v=5.0, band_v=0.25) == pytest.approx(31e-3, abs=2 * dt)
    # never back in band within the record: None (not a number that looks good)
    assert recovery_s(t, 0.5 * v, t_release_s=0.0, level_v=5.0, band_v=0.25) is None
    # already in band from the release: 0
    assert recovery_s(t, np.full_like(t, 5.0), t_release_s=0.0, level_v=5.0, band_v=0.25) == 0.0


def test_ovp_peak_of_a_ramp_then_exponential_fall():
    # Rise at slope S to V_trip, S·d more during the delay d, then an RC fall: the peak is V_trip + S·d at
    # t_trip + d (the capacitor law i = C·dv/dt, constant current, handbook)
    dt = 1e-7
    t = np.arange(0.0, 1e-3, dt)
    s, v0, v_trip, d = 7575.0, 5.0, 6.25, 20e-6
    t_trip = (v_trip - v0) / s
    t_pk = t_trip + d
    v = np.where(t < t_pk, v0 + s * t, (v0 + s * t_pk) * np.exp(-(t - t_pk) / 1e-4))
    peak, when = ovp_peak(t, v)
    assert peak == pytest.approx(v_trip + s * d, abs=s * dt)
    assert when == pytest.approx(t_pk, abs=dt)
    with pytest.raises(AnalysisInputError):
        ovp_peak([], [])
