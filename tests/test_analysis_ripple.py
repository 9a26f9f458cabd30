"""Ripple measurement and the buck handbook estimate against outside formulas."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import integrate, signal

from benchctl.analysis.ripple import SCOPE_BANDWIDTH_LIMIT_HZ, buck_ripple_estimate, output_ripple
from benchctl.errors import AnalysisInputError

FSW_HZ = 500e3
PERIOD_S = 1.0 / FSW_HZ
N_PER_PERIOD = 200


def _triangle(pk_pk_v: float, periods: float, offset_v: float = 1.2):
    dt = PERIOD_S / N_PER_PERIOD
    t = np.arange(int(round(periods * N_PER_PERIOD))) * dt
    # scipy.signal.sawtooth with width 0.5 is a symmetric triangle between -1 and +1
    v = offset_v + 0.5 * pk_pk_v * signal.sawtooth(2 * np.pi * FSW_HZ * t, width=0.5)
    return t, v


def test_triangle_ripple_pk_pk_and_rms_over_whole_periods():
    pk_pk = 0.020
    t, v = _triangle(pk_pk, periods=20.37)
    r = output_ripple(t, v, fsw_hz=FSW_HZ)
    assert r.periods_used == 20
    assert r.window_s == pytest.approx(20 * PERIOD_S, rel=1e-12)
    assert r.samples_used == 20 * N_PER_PERIOD
    assert r.pk_pk_v == pytest.approx(pk_pk, rel=1e-9)
    # RMS of a triangle wave = pk-pk / (2*sqrt(3)) (handbook formula, e.g. any EE handbook table of RMS values)
    assert r.rms_ac_v == pytest.approx(pk_pk / (2 * math.sqrt(3)), rel=1e-3)
    assert r.mean_v == pytest.approx(1.2, abs=1e-9)
    # the fundamental of a triangle is its repetition frequency (Fourier series, from memory)
    assert r.dominant_freq_hz == pytest.approx(FSW_HZ, rel=5e-3)
    assert r.bandwidth_limit_hz is None


def test_whole_record_used_without_fsw():
    t, v = _triangle(0.010, periods=8.0)
    r = output_ripple(t, v)
    assert r.periods_used is None
    assert r.samples_used == t.size
    # 8 whole periods: RMS of a triangle = pk-pk/(2*sqrt(3)) (handbook formula)
    assert r.rms_ac_v == pytest.approx(0.010 / (2 * math.sqrt(3)), rel=1e-3)


def test_bandwidth_limit_attenuates_like_first_order_low_pass():
    fs = 5e9
    t = np.arange(20000) / fs
    f_noise = 100e6
    amp = 0.010
    v = 1.2 + amp * np.sin(2 * np.pi * f_noise * t)
    r = output_ripple(t, v, fsw_hz=5e6, bandwidth_limit_hz=SCOPE_BANDWIDTH_LIMIT_HZ)
    # first-order RC low pass |H| = 1/sqrt(1 + (f/fc)^2) (handbook formula; the digital
    # bilinear version differs by ~0.1 % at f/fs = 0.02)
    h = 1.0 / math.sqrt(1.0 + (f_noise / SCOPE_BANDWIDTH_LIMIT_HZ) ** 2)
    assert r.pk_pk_v == pytest.approx(2 * amp * h, rel=0.02)
    assert r.bandwidth_limit_hz == SCOPE_BANDWIDTH_LIMIT_HZ
    assert "order 1" in r.bandwidth_filter
    assert r.window_start_s > 0  # filter settling skipped
    # a 1 MHz ripple passes almost untouched: |H(1 MHz)| = 0.99875 (same formula)
    v_slow = 1.2 + amp * np.sin(2 * np.pi * 1e6 * t)
    r_slow = output_ripple(t, v_slow, fsw_hz=1e6, bandwidth_limit_hz=SCOPE_BANDWIDTH_LIMIT_HZ)
    assert r_slow.pk_pk_v == pytest.approx(2 * amp / math.sqrt(1 + (1e6 / 20e6) ** 2), rel=2e-3)


def test_bandwidth_limit_above_nyquist_is_not_applied_and_says_so():
    t, v = _triangle(0.010, periods=4.0)  # 100 MS/s: Nyquist 50 MHz
    r = output_ripple(t, v, bandwidth_limit_hz=80e6)
    assert r.bandwidth_limit_hz is None
    assert "Nyquist" in r.bandwidth_filter


def test_flat_record_has_no_dominant_frequency():
    t = np.arange(1000) * 1e-8
    r = output_ripple(t, np.full(t.size, 1.2))
    assert r.pk_pk_v == 0.0 and r.rms_ac_v == 0.0
    assert r.dominant_freq_hz is None and "no AC" in r.dominant_freq_reason


def test_buck_worked_values_rederived():
    # 12 V -> 5 V, 10 uH, 500 kHz, 100 uF, 10 mOhm
    # [S: Erickson & Maksimovic, Fundamentals of Power Electronics, 2nd ed., ch. 2, from memory]
    vg, v, l_h, fs, c_f, esr = 12.0, 5.0, 10e-6, 500e3, 100e-6, 0.010
    est = buck_ripple_estimate(vg, v, l_h, fs, c_f, esr)
    d = v / vg
    di = (vg - v) * d / (fs * l_h)  # inductor volt-seconds over the on-time
    assert est.duty == pytest.approx(d)
    assert est.inductor_ripple_pk_pk_a == pytest.approx(di, rel=1e-12)
    assert est.inductor_ripple_pk_pk_a == pytest.approx(0.5833, abs=1e-4)  # [calc] from ERICKSON-2E ch. 2 formulas
    assert est.capacitor_ripple_pk_pk_v == pytest.approx(1.458e-3, abs=1e-6)  # [calc] from ERICKSON-2E ch. 2 formulas
    assert est.esr_ripple_pk_pk_v == pytest.approx(5.833e-3, abs=1e-6)  # [calc] from ERICKSON-2E ch. 2 formulas

    # Independent check of dV = dI/(8 fs C): integrate the AC inductor current into C over one
    # period (capacitor charge balance, Erickson ch. 2 argument) with scipy.integrate.
    n = 20000
    t = np.arange(n) * (1 / fs / n)
    rise = t < d / fs
    i_l = np.where(rise, -di / 2 + di * t * fs / d, di / 2 - di * (t * fs - d) / (1 - d))
    i_c = i_l - i_l.mean()
    v_c = integrate.cumulative_trapezoid(i_c, t, initial=0.0) / c_f
    assert est.capacitor_ripple_pk_pk_v == pytest.approx(float(np.ptp(v_c)), rel=2e-3)

    # The measured ripple of C plus ESR lies between the larger part and the in-phase sum.
    t4 = np.concatenate([t + k / fs for k in range(4)])
    v_out = 5.0 + np.tile(v_c - v_c.mean() + esr * i_c, 4)
    r = output_ripple(t4, v_out, fsw_hz=fs)
    assert max(est.esr_ripple_pk_pk_v, est.capacitor_ripple_pk_pk_v) <= r.pk_pk_v * (1 + 1e-3)
    assert r.pk_pk_v <= est.sum_upper_bound_pk_pk_v * (1 + 1e-3)


def test_input_errors():
    t, v = _triangle(0.01, periods=3.0)
    with pytest.raises(AnalysisInputError, match="shorter than one switching period"):
        output_ripple(t, v, fsw_hz=FSW_HZ / 10)
    t_bad = t.copy()
    t_bad[100:] += 3e-9
    with pytest.raises(AnalysisInputError, match="uniformly sampled"):
        output_ripple(t_bad, v)
    v_nan = v.copy()
    v_nan[3] = np.nan
    with pytest.raises(AnalysisInputError, match="NaN"):
        output_ripple(t, v_nan)
    with pytest.raises(AnalysisInputError, match="equal length"):
        output_ripple(t, v[:-3])
    with pytest.raises(AnalysisInputError, match="vout_v < vin_v"):
        buck_ripple_estimate(5.0, 12.0, 10e-6, 500e3, 100e-6)
    with pytest.raises(AnalysisInputError, match="inductance_h"):
        buck_ripple_estimate(12.0, 5.0, 0.0, 500e3, 100e-6)


def _analog_low_pass_lsim(t, u, fc_hz, order):
    """scipy.signal.lsim of the analog Butterworth filter (library function), from its steady state."""
    a, b, c, d = signal.tf2ss(*signal.butter(order, 2 * math.pi * fc_hz, analog=True))
    x0 = -np.linalg.solve(a, b).ravel() * u[0]
    _, y, _ = signal.lsim((a, b, c, d), u, t, X0=x0)
    return y


@pytest.mark.parametrize("f_hz, rel", [(20e6, 2e-4), (30e6, 6e-4), (40e6, 1.5e-3), (50e6, 4e-3)])
def test_bandwidth_limit_follows_the_analog_pole_at_25x_the_cutoff(f_hz, rel):
    fc = SCOPE_BANDWIDTH_LIMIT_HZ
    fs = 25 * fc  # a 500 MS/s trace: 10 samples per period of a 50 MHz component
    t = np.arange(20000) / fs
    amp, phase = 0.010, 0.3
    v = 1.2 + amp * np.sin(2 * np.pi * f_hz * t + phase)
    r = output_ripple(t, v, fsw_hz=1e6, bandwidth_limit_hz=fc)
    # first-order RC low pass H = 1/(1 + j f/fc) (handbook formula): the analog output at the sample times
    h = 1.0 / (1.0 + 1j * f_hz / fc)
    window = (t >= r.window_start_s) & (t < r.window_start_s + r.window_s)
    analog = abs(h) * amp * np.sin(2 * np.pi * f_hz * t[window] + phase + np.angle(h))
    # a cubic between samples is not a sine: at 10 samples per period the crest reads up to 0.4 % low
    assert r.pk_pk_v == pytest.approx(np.ptp(analog), rel=rel)
    # the bilinear transform (scipy.signal.butter digital, the former method) is 2.4 % low at 2.5 fc
    if f_hz == 50e6:
        sos = signal.butter(1, fc, fs=fs, output="sos")
        y = signal.sosfilt(sos, v, zi=signal.sosfilt_zi(sos) * v[0])[0]
        assert np.ptp(y[window]) < 0.98 * np.ptp(analog)


@pytest.mark.parametrize("order", [1, 2, 3])
def test_bandwidth_limit_is_the_analog_filter_on_the_trace_between_samples(order):
    from scipy.interpolate import PchipInterpolator

    from benchctl.analysis.ripple import analog_low_pass

    fc, fs, n = 20e6, 500e6, 3000
    t = np.arange(n) / fs
    # flyback-like ripple: a ramp, a step at turn-off (ESR x current step) and a 60 MHz ring
    x = (1.2 + 0.005 * signal.sawtooth(2 * np.pi * 1e6 * t, 0.4) + 0.004 * signal.square(2 * np.pi * 1e6 * t, 0.4)
         + 0.003 * np.exp(-(t % 1e-6) / 30e-9) * np.sin(2 * np.pi * 60e6 * (t % 1e-6)))
    ours = analog_low_pass(x, 1 / fs, fc, order)
    # reference: scipy.signal.lsim of the analog filter driven by the PCHIP between the samples
    # (scipy.interpolate.PchipInterpolator) on a 64x finer grid
    m = 64
    tf = np.arange((n - 1) * m + 1) / (fs * m)
    ref = _analog_low_pass_lsim(tf, PchipInterpolator(t, x)(tf), fc, order)[::m]
    assert np.max(np.abs(ours - ref)) < 2e-4 * np.ptp(x)
    # steps and ramps are held exactly: a square wave through the first-order pole rises as
    # 1 - exp(-t/tau) (RC charging, handbook), sampled
    if order == 1:
        tau = 1 / (2 * math.pi * fc)
        sq = np.where((t % 1e-6) < 0.4e-6, 0.004, -0.004)
        y = analog_low_pass(sq, 1 / fs, fc, 1)
        k = np.arange(1, 150)  # samples after the rising edge at 1 us
        rise = -0.004 + 0.008 * (1 - np.exp(-(k + 0.5) / fs / tau))  # the edge is drawn between samples 499 and 500
        assert y[500 + k] == pytest.approx(rise, abs=2e-3 * 0.008)
