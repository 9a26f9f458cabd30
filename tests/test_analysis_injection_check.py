"""Trace summaries and the half/double injection check (benchctl.analysis.injection_check)."""

from __future__ import annotations

import math

import control
import numpy as np
import pytest
from scipy import signal

from benchctl.analysis.injection_check import (CheckTolerances, compression_db, injection_verdict, scatter_db,
                                               summarize)

F = np.logspace(-2, 1, 400)


def _loop(num, den):
    _, h = signal.freqs(num, den, worN=2 * np.pi * F)  # exact response, scipy.signal.freqs
    return h


def test_summary_margins_agree_with_python_control():
    # python-control cross-check [calc] (PYTHON-CONTROL): 1/(s^3+2s^2+s) -> gm 2.0 at 1 rad/s, pm 21.386 deg
    num, den = [1.0], [1.0, 2.0, 1.0, 0.0]
    gm, pm, w180, wc = control.margin(control.tf(num, den))
    s = summarize(F, _loop(num, den), "loop")
    assert s.phase_margin_deg == pytest.approx(pm, abs=0.05)
    assert s.crossover_hz == pytest.approx(wc / (2 * math.pi), rel=2e-3)
    assert s.gain_margin_db == pytest.approx(20 * math.log10(gm), abs=0.05)
    assert s.phase_crossover_hz == pytest.approx(w180 / (2 * math.pi), rel=2e-3)
    assert (s.gain_crossover_count, s.phase_crossover_count) == (1, 1)


def test_scatter_recovers_the_noise_of_the_larger_injection():
    # Noise scales as 1/amplitude: sigma_A on the larger sweep, 2 sigma_A on the half one (common practice);
    # the estimator divides the difference's robust sigma (1.4826 MAD) by sqrt(5).
    rng = np.random.default_rng(7)
    h = _loop([1.0], [1.0, 2.0, 1.0, 0.0])
    sigma_db = 0.05
    large = h * 10 ** (rng.normal(0, sigma_db, F.size) / 20)
    small = h * 10 ** (rng.normal(0, 2 * sigma_db, F.size) / 20)
    assert scatter_db(F, small, large, None) == pytest.approx(sigma_db, rel=0.15)


def test_compression_shows_as_a_dip_noise_does_not():
    h = _loop([1.0], [1.0, 2.0, 1.0, 0.0])
    large = h.copy()
    band = (F > 0.2) & (F < 0.6)
    large[band] *= 0.9  # 20 log10(0.9) = -0.915 dB less gain at the larger amplitude
    dip, at = compression_db(F, h, large)
    assert dip == pytest.approx(20 * math.log10(0.9), abs=1e-9)
    assert 0.2 < at < 0.6
    rng = np.random.default_rng(3)
    noisy = h * 10 ** (rng.normal(0, 0.05, F.size) / 20)
    assert compression_db(F, h, noisy) == (0.0, pytest.approx(float("nan"), nan_ok=True))


BASE = {"crossover_hz": 1000.0, "phase_margin_deg": 60.0, "gain_margin_db": 12.0, "gain_noise_db": 0.02}


@pytest.mark.parametrize("half, double, verdict", [
    ({**BASE, "gain_shift_db": 0.0}, {**BASE, "gain_shift_db": 0.0}, "ok"),
    ({**BASE, "gain_shift_db": -0.8}, {**BASE, "gain_shift_db": 0.0}, "too_large"),
    ({**BASE, "gain_shift_db": 0.0}, {**BASE, "phase_margin_deg": 55.0, "gain_shift_db": -0.7}, "near_compression"),
    ({**BASE, "phase_margin_deg": 64.0, "gain_shift_db": 0.0}, {**BASE, "gain_shift_db": 0.0}, "too_small"),
])
def test_verdicts(half, double, verdict):
    got = injection_verdict(BASE, half, double, CheckTolerances())
    assert got.verdict == verdict and got.flagged == (verdict != "ok")


def test_a_rough_trace_is_noise_limited_first():
    got = injection_verdict({**BASE, "gain_noise_db": 0.5}, {**BASE, "gain_shift_db": -0.8}, None, CheckTolerances())
    assert got.verdict == "too_small" and "noise-limited" in got.reason
