"""Rational fit of converter plants: recovers known poles/zeros, flags RHP zeros, picks order.

True plants are averaged small-signal models (Erickson & Maksimovic, Fundamentals of Power
Electronics, 2nd ed., ch. 7-8; formulas from memory; ERICKSON-2E "Averaged small-signal
models"); their poles and zeros are cross-checked with python-control ``control.poles`` /
``control.zeros`` and responses computed with ``scipy.signal.freqs``.
"""

from __future__ import annotations

import math

import control
import numpy as np
import pytest
import scipy.signal

from benchctl.analysis.plant_fit import PlantFit, extract_plant, fit_plant, fit_plant_auto
from benchctl.errors import AnalysisInputError

S = control.tf("s")
TWO_PI = 2.0 * math.pi


def _flyback_gvd() -> tuple[control.TransferFunction, dict[str, float]]:
    """36-75 V telecom flyback at Vg 48 V, n = Ns/Np 0.25, Lm 200 uH, C 470 uF with 30 mOhm ESR,
    R 6 Ohm, D 0.5 (V = 12 V), CCM: Gvd = Gd0 (1 - s/wz)(1 + s/wesr)/(1 + s/(Q w0) + s^2/w0^2).
    Gd0 = V/(D D'), w0 = D'/sqrt(L'C), Q = D'R sqrt(C/L'), wz = D'^2 R/(D L'), L' = n^2 Lm
    (Erickson & Maksimovic 2nd ed. ch. 7-8, from memory)."""
    vg, n, lm, c, r, d, rc = 48.0, 0.25, 200e-6, 470e-6, 6.0, 0.5, 0.03
    dp = 1 - d
    lp = n * n * lm
    v = vg * n * d / dp
    true = {
        "gd0": v / (d * dp),
        "f0_hz": dp / math.sqrt(lp * c) / TWO_PI,
        "q": dp * r * math.sqrt(c / lp),
        "rhp_zero_hz": dp**2 * r / (d * lp) / TWO_PI,
        "esr_zero_hz": 1 / (rc * c) / TWO_PI,
    }
    w0 = TWO_PI * true["f0_hz"]
    wz = TWO_PI * true["rhp_zero_hz"]
    wesr = TWO_PI * true["esr_zero_hz"]
    sys = true["gd0"] * (1 - S / wz) * (1 + S / wesr) / (1 + S / (true["q"] * w0) + S**2 / w0**2)
    return sys, true


def _buck_gvd() -> control.TransferFunction:
    """Buck 12 V -> 5 V, L 10 uH, C 100 uF, rc 10 mOhm, R 1 Ohm (worked example [calc], ERICKSON-2E formulas):
    Gvd = Vg (1 + s rc C)/(1 + s(L/R + rc C) + s^2 L C (1 + rc/R)), Erickson 2nd ed. ch. 8 (mem)."""
    vg, l_h, c, rc, r = 12.0, 10e-6, 100e-6, 10e-3, 1.0
    return vg * (1 + S * rc * c) / (1 + S * (l_h / r + rc * c) + S**2 * l_h * c * (1 + rc / r))


def _sample(sys: control.TransferFunction, f_lo: float, f_hi: float, per_decade: int):
    n = int(round(math.log10(f_hi / f_lo) * per_decade)) + 1
    f = np.logspace(math.log10(f_lo), math.log10(f_hi), n)
    _, h = scipy.signal.freqs(sys.num[0][0], sys.den[0][0], worN=TWO_PI * f)
    return f, h


def _noisy(h: np.ndarray, rel_rms: float, seed: int) -> np.ndarray:
    rng = np.random.default_rng(seed)
    e = (rng.standard_normal(h.size) + 1j * rng.standard_normal(h.size)) / math.sqrt(2)
    return h * (1 + rel_rms * e)


def test_flyback_poles_zeros_recovered_from_noisy_data() -> None:
    sys, true = _flyback_gvd()
    # The model's roots agree with python-control (control.poles / control.zeros).
    ref_zeros = sorted(control.zeros(sys), key=lambda z: z.real)
    assert ref_zeros[1].real / TWO_PI == pytest.approx(true["rhp_zero_hz"], rel=1e-9)
    assert -ref_zeros[0].real / TWO_PI == pytest.approx(true["esr_zero_hz"], rel=1e-9)
    assert abs(control.poles(sys)[0]) / TWO_PI == pytest.approx(true["f0_hz"], rel=1e-9)
    # flyback worked example [calc] (ERICKSON-2E ch. 7-8): Gd0 48 V, f0 1038.21 Hz, Q 18.40, RHPz 38.197 kHz
    assert true["gd0"] == pytest.approx(48.0, rel=1e-6)
    assert true["f0_hz"] == pytest.approx(1038.21, rel=1e-5)
    assert true["q"] == pytest.approx(18.40, rel=1e-3)
    assert true["rhp_zero_hz"] == pytest.approx(38197, rel=1e-4)

    f, h = _sample(sys, 10.0, 3e5, per_decade=60)
    fit = fit_plant(f, _noisy(h, 0.01, seed=7), num_order=2, den_order=2)
    # Tolerances stated for 1 % rms complex noise, 60 points/decade:
    assert fit.dc_gain == pytest.approx(true["gd0"], rel=0.01)
    assert len(fit.resonances) == 1
    assert fit.resonances[0].f0_hz == pytest.approx(true["f0_hz"], rel=0.005)
    assert fit.resonances[0].q == pytest.approx(true["q"], rel=0.05)
    assert len(fit.rhp_zeros_rad_s) == 1  # flagged
    assert fit.rhp_zero_freqs_hz[0] == pytest.approx(true["rhp_zero_hz"], rel=0.03)
    lhp = [z for z in fit.zeros_rad_s if z.real < 0]
    assert len(lhp) == 1
    assert abs(lhp[0]) / TWO_PI == pytest.approx(true["esr_zero_hz"], rel=0.03)
    assert fit.unstable_poles_rad_s == ()
    # residual error is the noise level, not model error
    assert 0.005 < fit.fit_error.rms_relative < 0.015


def test_buck_fit_on_clean_data_is_exact() -> None:
    sys = _buck_gvd()
    f, h = _sample(sys, 10.0, 1e6, per_decade=30)
    fit = fit_plant(f, h, num_order=1, den_order=2)
    # buck worked example [calc] (ERICKSON-2E ch. 8): f_esr 159.15 kHz, Gd0 12 V, f0 5007.94 Hz, Q 2.889
    assert fit.dc_gain == pytest.approx(12.0, rel=1e-8)
    assert fit.resonances[0].f0_hz == pytest.approx(5007.94, rel=1e-5)
    assert fit.resonances[0].q == pytest.approx(2.889, rel=2e-4)
    assert abs(fit.zeros_hz[0]) == pytest.approx(159.15e3, rel=1e-4)
    assert fit.rhp_zeros_rad_s == ()
    # coefficients equal python-control's normalized to den[-1] = 1
    den = np.asarray(sys.den[0][0], dtype=float)
    num = np.asarray(sys.num[0][0], dtype=float)
    np.testing.assert_allclose(fit.den, den / den[-1], rtol=1e-7)
    np.testing.assert_allclose(fit.num, num / den[-1], rtol=1e-7)
    assert fit.fit_error.max_gain_error_db < 1e-8
    assert fit.fit_error.max_phase_error_deg < 1e-7
    # the model's response equals scipy.signal.freqs of the true transfer function off-grid
    f_off = np.array([33.3, 4567.0, 250e3])
    _, h_ref = scipy.signal.freqs(num, den, worN=TWO_PI * f_off)
    np.testing.assert_allclose(fit.response(f_off), h_ref, rtol=1e-7)


def _third_order() -> control.TransferFunction:
    # buck plant seen through a 50 kHz sense-filter pole
    return _buck_gvd() / (1 + S / (TWO_PI * 50e3))


@pytest.mark.parametrize(
    "name,make,band,expected",
    [
        ("flyback_2_2", lambda: _flyback_gvd()[0], (10.0, 3e5), (2, 2)),
        ("buck_1_2", _buck_gvd, (10.0, 1e6), (1, 2)),
        ("buck_sense_pole_1_3", _third_order, (10.0, 1e6), (1, 3)),
        ("single_pole_0_1", lambda: 10 / (1 + S / (TWO_PI * 500)), (1.0, 1e5), (0, 1)),
    ],
)
def test_auto_order_picks_the_true_order_on_clean_data(name, make, band, expected) -> None:
    sys = make()
    f, h = _sample(sys, band[0], band[1], per_decade=30)
    fit = fit_plant_auto(f, h, max_order=4)
    assert (fit.num_order, fit.den_order) == expected, fit.notes
    assert fit.fit_error.rms_relative < 1e-6
    assert "chosen" in fit.notes[-1]


def test_auto_order_on_noisy_flyback_does_not_overfit() -> None:
    sys, true = _flyback_gvd()
    f, h = _sample(sys, 10.0, 3e5, per_decade=60)
    fit = fit_plant_auto(f, _noisy(h, 0.01, seed=11), max_order=4)
    assert (fit.num_order, fit.den_order) == (2, 2), fit.notes
    assert fit.rhp_zero_freqs_hz[0] == pytest.approx(true["rhp_zero_hz"], rel=0.03)


def test_zero_weights_ignore_corrupted_points() -> None:
    sys = _buck_gvd()
    f, h = _sample(sys, 10.0, 1e6, per_decade=30)
    bad = h.copy()
    bad[60:70] *= 3.0 * np.exp(1j * 0.7)  # a burst of corrupted readings around 1..2 kHz
    w = np.ones(f.size)
    w[60:70] = 0.0
    fit = fit_plant(f, bad, num_order=1, den_order=2, weights=w)
    # Reference values: buck example [calc] (ERICKSON-2E ch. 8) f0 5007.94 Hz, Q 2.889.
    assert fit.resonances[0].f0_hz == pytest.approx(5007.94, rel=1e-5)
    assert fit.resonances[0].q == pytest.approx(2.889, rel=2e-4)
    unweighted = fit_plant(f, bad, num_order=1, den_order=2)
    assert abs(unweighted.resonances[0].q - 2.889) > 0.01


def test_extract_plant_divides_out_the_compensator() -> None:
    # Loop split T = Gc * P (Middlebrook, Int. J. Electronics 38(4), 1975): with a known type-2
    # compensator, T/Gc is the plant (checked against scipy.signal.freqs of P).
    plant = _buck_gvd()
    gc = 2e4 * (1 + S / (TWO_PI * 2e3)) / (S * (1 + S / (TWO_PI * 80e3)))
    f, t = _sample(gc * plant, 10.0, 1e6, per_decade=20)
    _, h_gc = _sample(gc, 10.0, 1e6, per_decade=20)
    _, h_p = _sample(plant, 10.0, 1e6, per_decade=20)
    np.testing.assert_allclose(extract_plant(f, t, h_gc), h_p, rtol=1e-9)
    fit = fit_plant(f, extract_plant(f, t, h_gc), num_order=1, den_order=2)
    assert fit.resonances[0].f0_hz == pytest.approx(5007.94, rel=1e-5)


def test_result_is_a_frozen_dataclass() -> None:
    f, h = _sample(_buck_gvd(), 10.0, 1e6, per_decade=10)
    fit = fit_plant(f, h, num_order=1, den_order=2)
    assert isinstance(fit, PlantFit)
    with pytest.raises(AttributeError):
        fit.dc_gain = 1.0  # type: ignore[misc]


def test_unusable_input_is_refused() -> None:
    f, h = _sample(_buck_gvd(), 10.0, 1e6, per_decade=10)
    with pytest.raises(AnalysisInputError, match="at least 4 needed"):
        fit_plant(f[:3], h[:3], num_order=1, den_order=2)
    with pytest.raises(AnalysisInputError, match="den_order >= 1"):
        fit_plant(f, h, num_order=0, den_order=0)
    with pytest.raises(AnalysisInputError, match="one weight per sample"):
        fit_plant(f, h, num_order=1, den_order=2, weights=np.ones(3))
    with pytest.raises(AnalysisInputError, match=">= 0"):
        fit_plant(f, h, num_order=1, den_order=2, weights=-np.ones(f.size))
    with pytest.raises(AnalysisInputError, match="points but response has"):
        fit_plant(f, h[:-1], num_order=1, den_order=2)
    with pytest.raises(AnalysisInputError, match="compensator"):
        extract_plant(f, h, np.zeros(f.size))
