"""The margins' uncertainty from the trace's scatter, against a Monte Carlo propagation.

Reference: JCGM 101:2008 (GUM Supplement 1, benchctl.references "JCGM-101"): draw the
analyzer's noise many times, take the margins of every draw, and compare their spread with
the first-order estimate each single trace gives of itself (JCGM 100:2008 5.1.2, G.4).
The loop and its exact margins come from python-control (``control.stability_margins``).
"""

from __future__ import annotations

import math

import control
import numpy as np
import pytest

from benchctl.analysis.margin_uncertainty import local_scatter, margin_uncertainty
from benchctl.analysis.margins import loop_margins

S = control.tf("s")
W = 2.0 * math.pi


def _loop():
    # an integrator of unity gain at 5 kHz with a double pole at 30 kHz. By hand: the phase crosses -180 deg
    # at 30 kHz, where |T| = (5/30)/2 = 1/12, so GM = 12 (21.58 dB); the crossover fc solves
    # (5 kHz/fc)/(1 + (fc/30 kHz)²) = 1 (4.87 kHz), and PM = 90 - 2·atan(fc/30 kHz) = 71.55 deg
    return (W * 5e3) / S / (1 + S / (W * 30e3)) ** 2


def test_the_hand_worked_loop_is_what_python_control_says():
    gm, pm, _, _, wgc, _ = control.stability_margins(_loop())
    fc = wgc / W
    assert (5e3 / fc) / (1 + (fc / 30e3) ** 2) == pytest.approx(1.0, rel=1e-6)
    assert pm == pytest.approx(90 - 2 * math.degrees(math.atan(fc / 30e3)), abs=0.01)
    assert gm == pytest.approx(12.0, rel=1e-6)


@pytest.mark.parametrize("sigma", [0.01, 0.05])
def test_the_estimate_matches_a_monte_carlo_of_the_analyzer_noise(sigma):
    loop = _loop()
    gm_true, pm_true, *_ = control.stability_margins(loop)
    gm_true_db = 20 * math.log10(gm_true)
    f = np.logspace(2, math.log10(2e5), 61)            # 18 points per decade, 100 Hz - 200 kHz
    h = np.asarray(loop(1j * W * f), complex)
    rng = np.random.default_rng(20261202)
    pms, gms, u_pm, u_gm, big_pm, big_gm = [], [], [], [], [], []
    for _ in range(300):
        # circular complex noise of relative rms sigma on each sample (an analyzer's phasor estimate)
        noisy = h * (1 + sigma * (rng.standard_normal(f.size) + 1j * rng.standard_normal(f.size)) / math.sqrt(2))
        m = loop_margins(f, noisy)
        mu = margin_uncertainty(f, noisy, m)
        pms.append(m.worst_phase_margin_deg)
        gms.append(m.worst_gain_margin_db)
        u_pm.append(mu.phase_margin_deg.u)
        u_gm.append(mu.gain_margin_db.u)
        big_pm.append(mu.phase_margin_deg.expanded)
        big_gm.append(mu.gain_margin_db.expanded)
    pms, gms = np.asarray(pms), np.asarray(gms)
    # the single-trace estimate against the Monte Carlo spread (JCGM 101:2008 7.6): within 20 %
    assert np.mean(u_pm) == pytest.approx(np.std(pms), rel=0.2)
    assert np.mean(u_gm) == pytest.approx(np.std(gms), rel=0.2)
    # the expanded interval (k from Welch-Satterthwaite, ~95 %) holds the exact margin that often
    assert np.mean(np.abs(pms - pm_true) <= np.asarray(big_pm)) >= 0.92
    assert np.mean(np.abs(gms - gm_true_db) <= np.asarray(big_gm)) >= 0.92


def test_a_clean_trace_has_next_to_no_uncertainty_and_a_short_one_says_why():
    loop = _loop()
    f = np.logspace(2, math.log10(2e5), 61)
    h = np.asarray(loop(1j * W * f), complex)
    mu = margin_uncertainty(f, h, loop_margins(f, h))
    assert mu.phase_margin_deg.u < 0.05 and mu.gain_margin_db.u < 0.05   # only the quadratic's misfit
    # crossover at 5 kHz: a sweep ending at 6 kHz has one sample above it, too few to judge the scatter
    f2 = np.logspace(2, math.log10(6e3), 40)
    h2 = np.asarray(loop(1j * W * f2), complex)
    short = margin_uncertainty(f2, h2, loop_margins(f2, h2))
    assert short.phase_margin_deg is None and any("too few samples" in n for n in short.notes)


def test_local_scatter_recovers_a_known_noise_and_slope():
    rng = np.random.default_rng(3)
    x = np.linspace(2.0, 4.0, 81)
    y = 5.0 - 20.0 * (x - 3.0) + rng.normal(0.0, 0.3, x.size)   # a straight -20 dB/decade with 0.3 dB rms
    est = local_scatter(x, y, 3.0, half_width_decades=0.5)
    assert est.slope == pytest.approx(-20.0, abs=1.0)
    assert est.sd == pytest.approx(0.3, rel=0.25) and est.dof == est_dof(x, 3.0, 0.5)
    # at a sample itself the interpolation weight is 1: u = s
    assert est.interp_factor == pytest.approx(1.0)


def est_dof(x, xc, hw):
    return int(np.sum(np.abs(x - xc) <= hw)) - 3
