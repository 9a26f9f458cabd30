"""Settling by fitting the approach: it never stops before the true settling time, and not long after.

Every case runs on a fake clock (time is injected), so nothing here depends on the machine's
speed. The DUT is a sum of exponentials x(t) = x∞ + Σ aᵢ·e^(−t/τᵢ) (the step response of a
linear system; first-order settling time τ·ln(A/tol), common control-text definition), read
with an optional aperture: a reading is the mean of x over its integration time, as a DC
meter integrating over one power-line cycle gives.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from benchctl.settle import (
    SettleResult,
    assess_residual,
    fit_exponential,
    fit_two_exponentials,
    settle_adaptive,
    settle_exponential,
)


class FakeDut:
    """A DUT on a fake clock: each reading takes ``overhead_s`` plus the ``aperture_s`` it integrates over."""

    def __init__(self, x_inf, terms, *, noise=0.0, aperture_s=0.0, overhead_s=1e-4, seed=0, ramp_per_s=0.0):
        self.x_inf, self.terms = x_inf, list(terms)
        self.noise, self.aperture_s, self.overhead_s, self.ramp = noise, aperture_s, overhead_s, ramp_per_s
        self.t = 0.0
        self.rng = np.random.default_rng(seed)

    def x(self, t):
        return self.x_inf + self.ramp * t + sum(a * math.exp(-t / tau) for a, tau in self.terms)

    def _mean(self, t1, t2):
        if t2 <= t1:
            return self.x(t1)
        exp_part = sum(a * tau * (math.exp(-t1 / tau) - math.exp(-t2 / tau)) for a, tau in self.terms) / (t2 - t1)
        return self.x_inf + self.ramp * 0.5 * (t1 + t2) + exp_part

    def clock(self):
        return self.t

    def sleep(self, dt):
        self.t += dt

    def read_round(self, name="x"):
        t1 = self.t + 0.5 * self.overhead_s
        t2 = t1 + self.aperture_s
        self.t = t2 + 0.5 * self.overhead_s
        return {name: (0.5 * (t1 + t2), self._mean(t1, t2) + self.noise * self.rng.standard_normal())}

    def true_settling_time_s(self, tol):
        """Last moment the true deviation exceeds tol (a fine grid; exact enough for the bounds below)."""
        ts = np.linspace(0.0, 20.0 * max([tau for _, tau in self.terms] or [1.0]), 400001)
        dev = np.abs(sum((a * np.exp(-ts / tau) for a, tau in self.terms), np.zeros_like(ts)))
        above = np.nonzero(dev > tol)[0]
        return float(ts[above[-1]]) if len(above) else 0.0


def _settle(dut, *, rel_tol=2e-4, abs_tol=0.0, **kw):
    kw.setdefault("timeout_s", 30.0)
    return settle_exponential(dut.read_round, settle_on=["x"], rel_tol=rel_tol, abs_tol=abs_tol,
                              clock=dut.clock, sleep=dut.sleep, **kw)


# -- the fit against the reference library -------------------------------------------------------


def test_fit_matches_scipy_curve_fit_on_noisy_first_order_readings():
    # Reference: scipy.optimize.curve_fit (Levenberg-Marquardt) on the same least-squares problem;
    # both must land on the same minimum, and the same standard error of τ.
    from scipy.optimize import curve_fit

    rng = np.random.default_rng(3)
    t = np.linspace(0.0, 0.15, 60)
    x = 4.0 + 2.5 * np.exp(-t / 0.021) + rng.normal(0.0, 2e-3, t.size)
    ours = fit_exponential(t, x)

    def model(tt, c, a, tau):
        return c + a * np.exp(-tt / tau)

    popt, pcov = curve_fit(model, t, x, p0=(x[-1], x[0] - x[-1], 0.01))
    assert ours.final == pytest.approx(popt[0], abs=1e-6)
    assert ours.amplitude == pytest.approx(popt[1], rel=1e-5)
    assert ours.tau_s == pytest.approx(popt[2], rel=1e-5)
    assert ours.tau_se_s == pytest.approx(math.sqrt(pcov[2, 2]), rel=1e-3)
    assert ours.resolved


def test_fit_is_exact_on_noiseless_readings_and_predicts_the_residual():
    t = np.linspace(0.0, 0.1, 25)
    x = 12.0 - 3.0 * np.exp(-t / 0.02)  # x(0.1) − x∞ = −3·e^(−5)
    fit = fit_exponential(t, x)
    assert fit.tau_s == pytest.approx(0.02, rel=1e-6)
    assert fit.final == pytest.approx(12.0, abs=1e-7)
    assert fit.residual_end == pytest.approx(-3.0 * math.exp(-5.0), rel=1e-5)


def test_two_exponentials_are_separated():
    t = np.linspace(0.0, 0.3, 120)
    x = 1.0 + 3.0 * np.exp(-t / 0.002) + 0.3 * np.exp(-t / 0.05)
    fit = fit_two_exponentials(t, x)
    assert fit.taus_s == pytest.approx((0.002, 0.05), rel=1e-4)
    assert fit.amplitudes == pytest.approx((3.0, 0.3), rel=1e-4)
    assert fit.residual_end == pytest.approx(0.3 * math.exp(-0.3 / 0.05), rel=1e-4)


# -- never early, not much late ------------------------------------------------------------------


CASES = [
    # (label, x∞, terms [(amplitude, τ s)], aperture s, noise)
    ("first order, fast readings", 10.0, [(3.0, 0.02)], 0.0, 1e-4),
    ("first order, readings integrate one τ", 10.0, [(3.0, 0.02)], 0.02, 1e-4),
    ("first order, falling, 20 ms readings", 10.0, [(-8.0, 0.02)], 0.02, 1e-4),
    ("first order, quarter-τ readings", 10.0, [(3.0, 0.02)], 0.005, 5e-4),
    ("fast large step on a slow small one", 10.0, [(3.0, 0.002), (0.3, 0.05)], 0.0005, 1e-4),
    ("same, 20 ms readings", 10.0, [(3.0, 0.002), (0.3, 0.05)], 0.02, 1e-4),
    ("slow tail 100x slower", 10.0, [(3.0, 0.002), (0.05, 0.2)], 0.02, 1e-4),
    ("light load, large relative step", 0.25, [(29.0, 0.02)], 0.02, 2e-5),
    ("step over within the first 20 ms reading", 6.69, [(1.3, 0.005)], 0.02, 9e-5),
]


@pytest.mark.parametrize("label,x_inf,terms,aperture_s,noise", CASES, ids=[c[0] for c in CASES])
@pytest.mark.parametrize("seed", [0, 1, 2])
def test_settle_stops_after_the_true_settling_time_and_close_to_it(label, x_inf, terms, aperture_s, noise, seed):
    dut = FakeDut(x_inf, terms, noise=noise, aperture_s=aperture_s, seed=seed)
    rel_tol, abs_tol = 2e-4, 1e-3 if x_inf < 1 else 0.0
    result = _settle(dut, rel_tol=rel_tol, abs_tol=abs_tol)
    tol = max(abs_tol, rel_tol * x_inf)
    assert result.settled, result.reason
    # Never early: when the settle returns (the recorded readings begin), the true deviation is within tol.
    assert abs(dut.x(dut.t) - x_inf) <= tol
    # Not much late: within 15 % of the true settling time plus one reading and the minimum count of readings.
    reading_s = aperture_s + dut.overhead_s
    truth_s = dut.true_settling_time_s(tol)
    assert dut.t <= 1.15 * truth_s + reading_s + 8 * reading_s
    # The predicted final value is the true one within the tolerance.
    assert result.final_value == pytest.approx(x_inf, abs=tol)
    assert result.method == "exponential_fit" and result.quantity == "x"
    assert result.predicted_residual is not None and result.predicted_residual <= tol


def test_window_of_few_fast_readings_stops_early_where_the_fit_does_not():
    """The failure the fit replaces: 4 readings 1 ms apart agree on a 20 ms exponential long before it settles."""
    tol = 2e-4 * 5.0
    old = FakeDut(5.0, [(1.5, 0.02)], overhead_s=1e-3)
    r_old = settle_adaptive(lambda: old.read_round()["x"][1], rel_tol=0.0, abs_tol=tol, window=4, window_s=0.0,
                            clock=old.clock, sleep=old.sleep)
    assert r_old.settled and abs(old.x(old.t) - 5.0) > 3 * tol  # stopped early: still far from the final value
    new = FakeDut(5.0, [(1.5, 0.02)], overhead_s=1e-3)
    r_new = _settle(new, rel_tol=0.0, abs_tol=tol)
    assert r_new.settled and abs(new.x(new.t) - 5.0) <= tol


def test_a_ramp_never_settles_and_says_why():
    # 10 %/s: over the readings' own span it moves more than the tolerance, and ever more so.
    dut = FakeDut(5.0, [], ramp_per_s=0.5, noise=1e-4, overhead_s=1e-3)
    result = _settle(dut, rel_tol=2e-4, timeout_s=2.0)
    assert not result.settled and result.settling_time_s is None
    assert "not settled within 2 s" in result.reason and "x" in result.reason
    info = result.info()
    assert info["reason"] == result.reason and info["method"] == "exponential_fit"


def test_given_time_constant_is_used_and_is_never_faster_than_the_readings():
    # τ given 4x too short: the readings' own fit (the slower) still decides, so it does not stop early.
    dut = FakeDut(10.0, [(3.0, 0.02)], aperture_s=0.005)
    result = _settle(dut, time_constant_s=0.005)
    assert result.settled and abs(dut.x(dut.t) - 10.0) <= 2e-3
    assert result.tau_s == pytest.approx(0.02, rel=0.05) and result.tau_source.startswith("fit")
    # τ given when the readings show no transient at all: the given one is the one used.
    flat = FakeDut(10.0, [], aperture_s=0.005, noise=1e-4)
    result = _settle(flat, time_constant_s=0.03)
    assert result.settled and result.tau_source == "given" and result.tau_s == 0.03


def test_a_transient_too_slow_for_the_readings_needs_its_time_constant_given():
    # 1 % left of a 1 s transient, read every millisecond: eight readings look flat (the readings'
    # own span is all the settle can go by) - the limit of any settle without a time constant.
    # Given the DUT's time constant (procedure or station), it waits until the residual is gone.
    unknown = FakeDut(5.0, [(0.05, 1.0)], overhead_s=1e-3, noise=1e-5)
    r = _settle(unknown, rel_tol=2e-4)
    assert r.settled and r.tau_source == "window span" and abs(unknown.x(unknown.t) - 5.0) > 0.01
    known = FakeDut(5.0, [(0.05, 1.0)], overhead_s=1e-3, noise=1e-5)
    r = _settle(known, rel_tol=2e-4, time_constant_s=1.0)
    assert r.settled and abs(known.x(known.t) - 5.0) <= 1e-3


def test_thermal_creep_slower_than_max_tau_is_drift_not_settling():
    # A 20 ms electrical step riding on losses that creep with a 100 s thermal time constant
    # (0.2 % of the reading still to come). Settling waits out the electrical part only and
    # reports the creep; the drift criterion (benchctl.stability) is the one that waits for parts
    # to warm. Told to wait out every time constant, it cannot finish within its timeout.
    # A dwell of 3 s makes the creep plain in the readings (30 σ over the window).
    terms = [(3.0, 0.02), (-0.02, 100.0)]
    dut = FakeDut(10.0, terms, aperture_s=0.02, noise=2e-5)
    r = _settle(dut, rel_tol=2e-4, timeout_s=8.0, min_dwell_s=3.0)
    assert r.settled and dut.t < 3.2
    assert abs(3.0 * math.exp(-dut.t / 0.02)) <= 2e-3  # the electrical part is gone
    q = r.quantities["x"]
    assert q["drift_tau_s"] > 10.0 and q["drift_per_s"] > 0  # losses rising: the reading creeps up
    patient = FakeDut(10.0, terms, aperture_s=0.02, noise=2e-5)
    r2 = _settle(patient, rel_tol=2e-4, timeout_s=8.0, min_dwell_s=3.0, max_tau_s=math.inf)
    assert not r2.settled and "not settled within 8 s" in r2.reason and "two exponentials" in r2.reason


def test_time_constant_of_earlier_points_is_the_hint_when_a_point_shows_no_transient():
    flat = FakeDut(10.0, [], aperture_s=0.02, noise=1e-4)
    result = _settle(flat, tau_memory={"x": 0.02})
    assert result.settled and result.tau_source == "earlier points"


def test_minimum_dwell_is_kept():
    dut = FakeDut(10.0, [], aperture_s=0.01)
    result = _settle(dut, min_dwell_s=0.5)
    assert result.settled and dut.t >= 0.5 and result.dwell_s >= 0.5


def test_several_quantities_all_settle_and_the_first_is_the_one_reported():
    class Two:
        def __init__(self):
            self.fast = FakeDut(5.0, [(1.0, 0.002)], aperture_s=0.002)
            self.slow = FakeDut(20.0, [(6.0, 0.03)], aperture_s=0.002)
            self.t = 0.0

        def clock(self):
            return self.t

        def read(self):
            a = self.fast.read_round("pout_w")
            b = self.slow.read_round("pin_w")
            self.t = self.fast.t = self.slow.t = max(self.fast.t, self.slow.t)
            return {**a, **b}

    two = Two()
    result = settle_exponential(two.read, settle_on=["pin_w", "pout_w"], rel_tol=2e-4, abs_tol=0.0,
                                clock=two.clock, sleep=lambda dt: None)
    assert result.settled and result.quantity == "pin_w"
    assert abs(two.slow.x(two.t) - 20.0) <= 2e-4 * 20.0  # the slower one decided
    assert set(result.quantities) == {"pin_w", "pout_w"}
    assert result.quantities["pin_w"]["tau_s"] == pytest.approx(0.03, rel=0.05)


def test_settle_info_has_the_agreed_keys():
    dut = FakeDut(10.0, [(3.0, 0.02)], aperture_s=0.005)
    result = _settle(dut).with_verification(False, {"iout_a": {"setpoint": 1.0, "measured": 0.9, "tol": 0.006}},
                                            "iout_a off by -0.1")
    info = result.info()
    for key in ("method", "quantity", "window_s", "dwell_s", "tau_s", "predicted_residual",
                "predicted_residual_rel", "verified", "verification", "reason"):
        assert key in info
    assert info["verified"] is False and info["reason"] == "iout_a off by -0.1"
    assert result.settled and not result.ok  # settled, but not verified: the point is not good
    assert info["predicted_residual_rel"] == pytest.approx(info["predicted_residual"] / 10.0, rel=1e-3)


def test_residual_assessment_window_span_fallback_needs_enough_flat_readings():
    # Flat readings, no τ from anywhere: the readings' own span stands in for τ; with noise as
    # large as the tolerance a handful of readings cannot prove settling, many can.
    rng = np.random.default_rng(0)
    few_t = np.linspace(0, 0.01, 8)
    few = 10.0 + rng.normal(0.0, 2e-3, few_t.size)
    a_few = assess_residual(few_t, few, rel_tol=2e-4, abs_tol=0.0)
    many_t = np.linspace(0, 0.1, 200)
    many = 10.0 + rng.normal(0.0, 2e-3, many_t.size)
    a_many = assess_residual(many_t, many, rel_tol=2e-4, abs_tol=0.0)
    assert a_few.tau_source == a_many.tau_source == "window span"
    assert not a_few.settled and a_many.settled


def test_bad_arguments_are_refused():
    with pytest.raises(ValueError, match="min_readings"):
        settle_exponential(lambda: {}, settle_on=["x"], min_readings=3)
    with pytest.raises(ValueError, match="settle_on"):
        settle_exponential(lambda: {}, settle_on=[])
    with pytest.raises(ValueError, match="at least 3 readings"):
        fit_exponential([0.0, 1.0], [1.0, 2.0])


def test_result_helpers_keep_the_reason():
    r = SettleResult(True, 0.1, 0.1, 1.0, 1e-3, 10, method="exponential_fit")
    u = r.unsettled_by("input power drifting", drift={"stable": False})
    assert not u.settled and u.why_not == "input power drifting" and u.info()["drift"] == {"stable": False}
