"""benchctl.analysis.line_response against outside references: scipy.signal for a transfer
function's magnitude and phase, and the first-order step response for the recovery time."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import signal

from benchctl.analysis.line_response import fit_sine, line_rejection, line_step_metrics


def test_rejection_of_a_known_transfer_function_matches_scipy_freqs():
    # H(s) = 0.05·ω0²/(s² + 2ζω0 s + ω0²): scipy.signal.freqs gives its complex response
    w0, zeta = 2 * math.pi * 2e3, 0.3
    num, den = [0.05 * w0 ** 2], [1.0, 2 * zeta * w0, w0 ** 2]
    rng = np.random.default_rng(3)
    for f in (200.0, 1.5e3, 2e3, 8e3):
        _, h = signal.freqs(num, den, worN=[2 * math.pi * f])
        t = np.arange(20000) * (10.0 / f) / 20000
        vin = 0.5 * np.sin(2 * math.pi * f * t) + 48.0
        vout = 0.5 * abs(h[0]) * np.sin(2 * math.pi * f * t + np.angle(h[0])) + 5.0
        vout = vout + 0.01 * np.sin(2 * math.pi * 150e3 * t) + rng.normal(0, 1e-4, t.size)  # ripple + noise
        r = line_rejection(t, vin, vout, f)
        # Tolerances: the 150 kHz ripple is not a whole number of periods in every record, so a little of it
        # leaks into the fit; at 8 kHz the output sine (1.6 mV) is six times smaller than the ripple:
        # 0.05 dB in magnitude and 2 degrees in phase bound that leakage (and the 0.1 mV noise).
        assert r.rejection_db == pytest.approx(20 * math.log10(abs(h[0])), abs=0.05)
        assert r.phase_deg == pytest.approx(math.degrees(np.angle(h[0])), abs=2.0)


def test_sine_fit_recovers_amplitude_offset_and_phase():
    t = np.linspace(0.0, 0.01, 5000, endpoint=False)
    fit = fit_sine(t, 2.0 + 0.3 * np.cos(2 * math.pi * 1e3 * t + 0.7), 1e3)
    assert (fit.amplitude, fit.offset, fit.phase_rad) == pytest.approx((0.3, 2.0, 0.7), abs=1e-9)
    with pytest.raises(ValueError):
        fit_sine(t, t, 0.0)


def test_recovery_of_a_first_order_decay_is_tau_ln_of_peak_over_band():
    # v = A·e^(−t/τ) after the step: it enters ±band at τ·ln(A/band) (exponential decay, handbook formula)
    tau, amp, band = 2e-4, 0.3, 0.01
    t = np.linspace(-5e-4, 4e-3, 45001)
    v = 5.0 + np.where(t >= 0, amp * np.exp(-t / tau), 0.0)
    m = line_step_metrics(t, v, step_time_s=0.0, band_v=band)
    assert m.recovered and m.recovery_s == pytest.approx(tau * math.log(amp / band), rel=1e-3)
    assert m.peak_deviation_v == pytest.approx(amp, rel=1e-3) and m.peak_after_step_s == pytest.approx(0.0, abs=1e-6)
    assert m.pre_step_v == pytest.approx(5.0)


def test_a_record_that_ends_outside_the_band_is_not_recovered():
    t = np.linspace(-1e-4, 1e-3, 1000)
    v = np.where(t >= 0, 0.1 * np.exp(-t / 1e-2), 0.0)
    m = line_step_metrics(t, v, step_time_s=0.0, band_v=0.01)
    assert not m.recovered and m.recovery_s is None
