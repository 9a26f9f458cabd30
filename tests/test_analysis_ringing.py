"""Ringing fit, two-capacitor method and RC snubber against circuit formulas and scipy.signal.

Second-order relations (series RLC, any circuits text — from memory):
ω_n = 1/√(LC), ζ = (R/2)·√(C/L), ω_d = ω_n·√(1 − ζ²), decay α = ζ·ω_n, Q = 1/(2ζ).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import integrate, signal

from benchctl.analysis.ringing import fit_ringing, parasitics_from_two_frequencies, rc_snubber
from benchctl.errors import AnalysisInputError

# Scenario: drain of a 36-75 V telecom-input flyback at turn-off, 48 V in, ~90 V plateau.


def test_damped_sinusoid_with_seeded_noise():
    f_d, zeta = 25e6, 0.05
    wn = 2 * math.pi * f_d / math.sqrt(1 - zeta**2)
    alpha = zeta * wn
    fs = 2.5e9
    t = np.arange(int(600e-9 * fs)) / fs
    t0 = 100e-9
    ring = np.where(
        t >= t0, 30.0 * np.exp(-alpha * (t - t0)) * np.cos(2 * math.pi * f_d * (t - t0)), 0.0
    )
    v = np.where(t >= t0, 90.0, 0.0) + ring
    v = v + np.random.default_rng(2024).normal(0.0, 0.3, t.size)  # 0.3 V rms probe noise
    fit = fit_ringing(t, v)
    assert fit.fit_ok, fit.fit_reason
    assert fit.start_time_s == pytest.approx(t0, abs=2 / fs)  # starts at the overshoot peak
    # tolerances: 1 % of the 30 V ring in noise, over ~12 visible periods
    assert fit.f_ring_hz == pytest.approx(f_d, rel=2e-3)
    assert fit.damping_ratio == pytest.approx(zeta, rel=0.01)
    assert fit.tau_s == pytest.approx(1 / alpha, rel=0.01)
    assert fit.q_factor == pytest.approx(1 / (2 * zeta), rel=0.01)  # Q = 1/(2 zeta)
    assert fit.f_natural_hz == pytest.approx(wn / (2 * math.pi), rel=2e-3)
    assert fit.offset_v == pytest.approx(90.0, abs=0.1)
    assert fit.peak_v == pytest.approx(120.0, abs=1.5)
    assert fit.fit_rms_error_v == pytest.approx(0.3, rel=0.1)  # residual ~ the added noise


def _rlc_ring(l_h: float, c_f: float, r_ohm: float, fs: float, n: int):
    """Capacitor voltage of a series RLC step, scipy.signal.step of 1/(LCs^2 + RCs + 1)."""
    t = np.arange(n) / fs
    _, y = signal.step(([1.0], [l_h * c_f, r_ohm * c_f, 1.0]), T=t)
    return t, 48.0 * y


def test_fit_matches_scipy_rlc_and_two_capacitor_method_recovers_lc():
    l_par, c_par, c_add = 50e-9, 200e-12, 220e-12
    r = 0.1 * math.sqrt(l_par / c_par)  # zeta = (R/2) sqrt(C/L) = 0.05
    fs = 5e9
    fits = []
    for c in (c_par, c_par + c_add):
        t, v = _rlc_ring(l_par, c, r, fs, 4000)
        fit = fit_ringing(t, v)
        assert fit.fit_ok, fit.fit_reason
        # series RLC formulas (module docstring)
        # noise-free: the fit must reproduce the exact circuit values
        assert fit.f_natural_hz == pytest.approx(1 / (2 * math.pi * math.sqrt(l_par * c)), rel=1e-6)
        assert fit.damping_ratio == pytest.approx(r / 2 * math.sqrt(c / l_par), rel=1e-5)
        assert fit.offset_v == pytest.approx(48.0, abs=0.05)
        fits.append(fit)
    lc = parasitics_from_two_frequencies(fits[0].f_natural_hz, fits[1].f_natural_hz, c_add)
    # two-capacitor method (common practice, from memory): C_par = C_add/((f1/f2)^2 - 1)
    assert lc.c_par_f == pytest.approx(c_par, rel=1e-4)
    assert lc.l_par_h == pytest.approx(l_par, rel=1e-4)
    assert lc.z0_ohm == pytest.approx(math.sqrt(l_par / c_par), rel=1e-4)


def test_two_capacitor_method_on_exact_lc_frequencies():
    l_par, c_par = 35e-9, 470e-12
    for c_add in (100e-12, 470e-12, 1e-9):
        f1 = 1 / (2 * math.pi * math.sqrt(l_par * c_par))  # LC resonance (circuits text)
        f2 = 1 / (2 * math.pi * math.sqrt(l_par * (c_par + c_add)))
        lc = parasitics_from_two_frequencies(f1, f2, c_add)
        assert lc.c_par_f == pytest.approx(c_par, rel=1e-9)
        assert lc.l_par_h == pytest.approx(l_par, rel=1e-9)
    with pytest.raises(AnalysisInputError, match="must be below f1_hz"):
        parasitics_from_two_frequencies(f2, f1, 100e-12)


def test_rc_snubber_values_loss_and_damping():
    l_par, c_par = 50e-9, 200e-12
    v_sw, fsw = 100.0, 100e3
    sn = rc_snubber(c_par, l_par, v_switch_v=v_sw, fsw_hz=fsw)
    assert sn.r_ohm == pytest.approx(math.sqrt(l_par / c_par))  # characteristic impedance
    assert sn.c_f == pytest.approx(3 * c_par)

    # loss: charging C through R from a step dissipates C V^2/2 in R, discharging another
    # C V^2/2 (classic RC energy result, circuits text, from memory) -> C V^2 fs per period.
    tau = sn.r_ohm * sn.c_f
    t = np.linspace(0.0, 40 * tau, 40001)
    i = v_sw / sn.r_ohm * np.exp(-t / tau)
    e_charge = integrate.trapezoid(i**2 * sn.r_ohm, t)
    assert e_charge == pytest.approx(0.5 * sn.c_f * v_sw**2, rel=1e-4)
    assert sn.loss_w == pytest.approx(2 * e_charge * fsw, rel=1e-4)

    # damping: node C_par || (R + C_snub) fed through L (and the 0.1*Z0 loss resistance).
    # Reference: poles of the circuit polynomial (numpy.roots); a well-damped snubber gives
    # the dominant pair zeta >= 0.5 (common practice) against 0.05 without it.
    r_s = 0.1 * math.sqrt(l_par / c_par)
    num_z = [sn.r_ohm * sn.c_f, 1.0]
    den_z = [c_par * sn.r_ohm * sn.c_f, c_par + sn.c_f, 0.0]
    den = np.polyadd(num_z, np.polymul([l_par, r_s], den_z))
    pair = [p for p in np.roots(den) if p.imag > 0][0]
    assert -pair.real / abs(pair) >= 0.5
    t = np.linspace(0.0, 200e-9, 4001)
    _, y = signal.step((num_z, den), T=t)
    _, y0 = signal.step(([1.0], [l_par * c_par, r_s * c_par, 1.0]), T=t)
    assert y.max() - 1 < 0.5 * (y0.max() - 1)  # overshoot at least halved


def test_ringing_input_errors():
    t = np.arange(200) * 1e-9
    with pytest.raises(AnalysisInputError, match="no ringing found"):
        fit_ringing(t, np.full(t.size, 5.0), start_index=0)
    with pytest.raises(AnalysisInputError, match="1.5 periods"):
        fit_ringing(t, np.sin(2 * math.pi * 1e6 * t), start_index=0)  # 0.2 periods only
    with pytest.raises(AnalysisInputError, match="fewer than 20 samples"):
        fit_ringing(t, np.sin(2 * math.pi * 50e6 * t), start_index=190)
    with pytest.raises(AnalysisInputError, match="pass arrays from the same capture"):
        fit_ringing(t, np.zeros(10))
    with pytest.raises(AnalysisInputError, match="c_multiple"):
        rc_snubber(200e-12, 50e-9, v_switch_v=100.0, fsw_hz=1e5, c_multiple=0.0)
