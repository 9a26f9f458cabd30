"""benchctl.analysis.thermal against outside references: the first-order step response and hand-worked interpolation."""

from __future__ import annotations

import math

import numpy as np
import pytest

from benchctl.analysis.thermal import derated_load, first_order_response, fit_first_order, temperature_rise
from benchctl.errors import AnalysisInputError


def test_first_order_response_is_the_handbook_step_response():
    # T(t) = T∞ + (T0 − T∞)·e^(−t/τ) (first-order system step response, any control or heat-transfer
    # handbook): after one τ the part has covered 1 − 1/e = 63.2 % of the step, after 3τ 95.0 %.
    t0, tinf, tau = 25.0, 75.0, 60.0
    y = first_order_response([0.0, tau, 3 * tau], t0, tinf, tau)
    assert y[0] == pytest.approx(25.0)
    assert (y[1] - t0) / (tinf - t0) == pytest.approx(1 - math.exp(-1), rel=1e-12)
    assert (y[2] - t0) / (tinf - t0) == pytest.approx(0.9502129, rel=1e-6)


def test_fit_recovers_time_constant_and_final_value_from_a_noisy_record():
    rng = np.random.default_rng(3)
    t = np.linspace(0.0, 400.0, 200)
    y = 30.0 + (80.0 - 30.0) * (1 - np.exp(-t / 85.0)) + rng.normal(0.0, 0.05, t.size)
    fit = fit_first_order(t, y)
    # noise 0.05 K on a 50 K step over 4.7 τ: τ within 1 % and T∞ within 0.1 K (several standard errors)
    assert fit.tau_s == pytest.approx(85.0, rel=0.01)
    assert fit.t_final_c == pytest.approx(80.0, abs=0.1)
    assert fit.rms_residual_c == pytest.approx(0.05, rel=0.25)


def test_fit_refuses_too_short_a_record():
    with pytest.raises(AnalysisInputError):
        fit_first_order([0.0, 1.0], [1.0, 2.0])


def test_temperature_rise_is_part_minus_ambient():
    assert temperature_rise([72.5, 40.0], [25.0, 25.5]).tolist() == [47.5, 14.5]


def test_derated_load_interpolates_between_the_bracketing_loads():
    # Hand calculation: hot spot 96 °C at 3 A and 117 °C at 5 A, limit 105 °C:
    # I* = 3 + (105 − 96)·(5 − 3)/(117 − 96) = 3 + 18/21 = 3.857142… A
    d = derated_load([1.0, 3.0, 5.0], [78.0, 96.0, 117.0], 105.0, ambient_c=70.0)
    assert d.found and d.flag == ""
    assert d.load_a == pytest.approx(3.0 + 18.0 / 21.0, rel=1e-12)


def test_derated_load_flags_a_limit_not_reached_and_one_exceeded_everywhere():
    d = derated_load([5.0, 1.0, 3.0], [72.0, 33.0, 51.0], 105.0)
    assert not d.found and d.flag == "not_reached" and d.load_a == 5.0   # a lower bound, flagged
    e = derated_load([1.0, 3.0], [110.0, 130.0], 105.0)
    assert e.load_a is None and e.flag == "exceeded_everywhere"
