"""Loss split P = a + b·I + c·I² against numpy.polyfit / scipy curve_fit and the simulator's loss breakdown."""

from __future__ import annotations

import math
from dataclasses import replace

import numpy as np
import pytest
from scipy.optimize import curve_fit

from benchctl.analysis.loss_split import fit_loss_split, predict_efficiency
from benchctl.simulated_instruments.converter import FLYBACK_48V_5V, ConverterModel, ManualClock


def _data(seed: int = 4):
    rng = np.random.default_rng(seed)
    i = np.linspace(0.5, 5.0, 10)
    u = 0.01 + 0.002 * i
    p = 0.4 + 0.35 * i + 0.06 * i * i + rng.normal(0.0, u)
    return i, p, u


def test_unweighted_fit_matches_numpy_polyfit_and_its_scaled_covariance() -> None:
    # numpy.polyfit(deg=2, cov=True) scales the covariance by the residual variance (numpy docs).
    i, p, _ = _data()
    split = fit_loss_split(i, p, vin_v=48.0)
    coef, cov = np.polyfit(i, p, 2, cov=True)
    assert split.coefficients == pytest.approx(coef[::-1], rel=1e-9)
    order = [2, 1, 0]
    assert np.asarray(split.covariance) == pytest.approx(cov[np.ix_(order, order)], rel=1e-6)
    assert not split.weighted and split.dof == 7


def test_weighted_fit_matches_curve_fit_with_absolute_sigma() -> None:
    # scipy.optimize.curve_fit(sigma=u, absolute_sigma=True): covariance (JᵀWJ)⁻¹ (scipy docs).
    i, p, u = _data()
    split = fit_loss_split(i, p, u_ploss_w=u)
    popt, pcov = curve_fit(lambda x, a, b, c: a + b * x + c * x * x, i, p, sigma=u, absolute_sigma=True)
    assert split.coefficients == pytest.approx(popt, rel=1e-6)
    assert np.asarray(split.covariance) == pytest.approx(pcov, rel=1e-5)
    # the truth lies within 3 standard uncertainties of each fitted part
    for got, sd, truth in zip(split.coefficients, (split.u_fixed_w, split.u_linear_w_per_a,
                                                   split.u_quadratic_w_per_a2), (0.4, 0.35, 0.06)):
        assert abs(got - truth) < 3 * sd


def test_predicted_efficiency_uncertainty_is_the_propagated_one() -> None:
    # GUM 5.1.2 law of propagation, checked against a finite-difference sensitivity.
    i, p, u = _data()
    split = fit_loss_split(i, p, u_ploss_w=u)
    pred = predict_efficiency(split, 5.0, 2.25)
    _, u_loss = split.loss_w(2.25)
    pout = 5.0 * 2.25
    h = 1e-6
    deta = (pout / (pout + pred.ploss_w + h) - pout / (pout + pred.ploss_w - h)) / (2 * h)
    assert pred.u_efficiency == pytest.approx(abs(deta) * float(u_loss[0]), rel=1e-5)
    assert pred.efficiency == pytest.approx(pout / (pout + pred.ploss_w), rel=1e-12)


def test_split_of_the_model_losses_against_its_own_breakdown() -> None:
    # The model's loss terms by mechanism (simulated_instruments/converter/losses.py).  With the
    # mechanisms that grow with the peak current switched off (switching overlap, Coss, core,
    # leakage/snubber), what is left is pure: fixed = controller + gate + bleed + divider,
    # linear = the diode knee V_F·I, quadratic = I_rms²·R of switch, windings, ESR and diode
    # slope.  The CCM ripple's rms part (ΔI²/12·R, constant at one line voltage) lands in the
    # fixed part, hence its absolute tolerance of 0.03 W.
    d0 = FLYBACK_48V_5V
    d = replace(d0, losses=replace(d0.losses, t_rise_s=0.0, t_fall_s=0.0, c_oss_f=0.0, core_loss_ref_w=0.0),
                parasitics=replace(d0.parasitics, leakage_h=0.0, snubber_c_f=0.0, clamp_r_ohm=math.inf))
    model = ConverterModel(d, clock=ManualClock())
    i = np.linspace(1.5, 5.0, 8)          # CCM at 48 V (boundary ≈ 1 A)
    ops = [model.steady_state(48.0, "CC", float(x)) for x in i]
    split = fit_loss_split(i, [op.loss_w for op in ops], vin_v=48.0)
    full = ops[-1]
    assert split.fixed_w == pytest.approx(full.losses.fixed_w, abs=0.03)
    assert split.linear_w_per_a == pytest.approx(d.losses.rect_vf_v, rel=0.03)
    quad_truth = full.losses.conduction_w + d.losses.rect_r_ohm * full.stage.rect_rms_a ** 2
    assert split.quadratic_w_per_a2 * 25.0 == pytest.approx(quad_truth, rel=0.02)
    # the whole design: the three parts reproduce the model's total loss within 1 % over the CCM range
    model = ConverterModel(d0, clock=ManualClock())
    loss = np.array([model.steady_state(48.0, "CC", float(x)).loss_w for x in i])
    pred, _ = fit_loss_split(i, loss).loss_w(i)
    assert pred == pytest.approx(loss, rel=0.01)
