"""Waiting for a DUT to settle after a setpoint change.

Two methods, both bounded by ``timeout_s`` (an unsettled result instead of a hang; the
point is then recorded with ``settled = False`` and the reason):

``settle_exponential`` (the default of :meth:`benchctl.bench.Bench.settle`) — the approach
of a first-order system after a step, x(t) = x∞ + A·e^(−(t − t0)/τ) (the step response of
any linear system is a sum of such terms; the slowest one is what is left near the end).
It reads one or several quantities together and, after every reading, fits that curve
(variable projection: for each τ on a logarithmic grid, refined by Brent's method, x∞ and
A by linear least squares; scipy.optimize.minimize_scalar) and predicts the residual
|x(t) − x∞| at the end of the readings, i.e. when the recorded readings begin; it stops
only when that prediction plus twice its standard error (from the fit's covariance,
first-order propagation) is within the tolerance for every quantity settled on. The time
constant comes from the procedure or the station (``[station] dut_time_constant_s``), from
the readings themselves when the fit resolves the transient (amplitude ≥ 8 σ of the
scatter, τ shorter than the readings' span, τ known to 25 %), or from earlier points of
the run; when none is known, the slowest τ the readings allow (profile least squares) —
at most their own span — is taken, so a trend over the window is a residual of its own
size, not "agreement" (a transient much slower than that window cannot be told from a
flat line by any settle: give its time constant). Components slower than ``max_tau_s``
(default 10 s) are slow drift — parts warming — and are reported, not waited out: that is
the stability criterion's job (:mod:`benchctl.stability`).
Where a time constant is given and the readings want a slower one, the slower one is
used. When the single exponential says settled and there are 8 readings or more, a sum
of two exponentials is fitted too; if the second one is significant (F test) and leaves
a larger residual, that one decides (a fast large step riding on a slow small one).

``settle_adaptive`` (``method="window"``) — the trailing readings agree within the
tolerance (max − min ≤ tol, tol = max(abs_tol, rel_tol·|value|)); then the settling time
is found the way a step response's settling time is defined — the moment after which
every reading stays within ±tol of the final value (common practice; e.g. the 2 %
settling time of control textbooks) — counted from the start of the settle. The window
is ``window`` readings spanning at least ``window_s`` seconds. For a first-order response
the spread over a window W is A·e^(−(t−W)/τ)·(1 − e^(−W/τ)), which reaches tol at the true
settling time τ·ln(A/tol) when W ≈ 0.7 τ (W + τ·ln(1 − e^(−W/τ)) = 0); a much shorter
window stops early (while the output still creeps), so give ``window_s`` ≈ 0.7 τ.

Every result can say how it decided (:meth:`SettleResult.info`, the ``settle_info`` stored
with each point: method, quantity, window_s, dwell_s, tau_s, predicted_residual,
predicted_residual_rel, verified, verification, reason).
"""

from __future__ import annotations

import math
import time
from dataclasses import dataclass, field, replace
from typing import Any, Callable, Mapping, Sequence

import numpy as np

#: Coverage factor on the predicted residual's standard error (≈ 95 %, GUM 6.2-6.3).
COVERAGE_K = 2.0
#: A transient counts as resolved by the fit when its amplitude is this many σ of the scatter...
RESOLVED_AMPLITUDE_SIGMAS = 8.0
#: ... and τ is known to this relative standard error.
RESOLVED_TAU_REL_SE = 0.25


@dataclass(frozen=True)
class SettleResult:
    """Outcome of a settle: whether it settled, when, and how it decided.

    ``settled`` is the settle criterion alone; ``verified`` says whether the setpoints were
    verified afterwards (:meth:`with_verification`); a point is good when :attr:`ok`.
    """

    settled: bool
    settling_time_s: float | None  # from the start until settled; None if unsettled
    elapsed_s: float  # time spent in the settle routine
    final_value: float  # predicted final value (fit) or the mean of the agreeing window
    tolerance: float
    readings: int
    reason: str = ""
    method: str = "window"  # "exponential_fit" | "window" | "fixed" | "disabled"
    quantity: str = ""
    window_s: float | None = None  # span of the readings the decision was made on, s
    dwell_s: float | None = None  # time at the point before recording, s
    tau_s: float | None = None  # time constant used for the decision, s (estimated or given), or None
    predicted_residual: float | None = None  # |x(t_rec) − x∞| predicted, unit of the quantity
    residual_bound: float | None = None  # predicted residual + k·standard error (what was compared with tol)
    tau_source: str = ""  # "given", "fit", "earlier points", "window span"
    quantities: Mapping[str, Mapping[str, Any]] = field(default_factory=dict)
    verified: bool = True
    verification: Mapping[str, Mapping[str, float]] = field(default_factory=dict)
    verification_reason: str = ""
    extra: Mapping[str, Any] = field(default_factory=dict)

    @property
    def ok(self) -> bool:
        """Settled and its setpoints verified: the point may be trusted."""
        return self.settled and self.verified

    @property
    def predicted_residual_rel(self) -> float | None:
        if self.predicted_residual is None or not self.final_value:
            return None
        return self.predicted_residual / abs(self.final_value)

    @property
    def why_not(self) -> str:
        """Why the point is unsettled or unverified; "" when :attr:`ok`."""
        parts = [r for r in ((self.reason if not self.settled else ""),
                             (self.verification_reason if not self.verified else "")) if r]
        return "; ".join(parts)

    def with_verification(self, verified: bool, checks: Mapping[str, Mapping[str, float]], reason: str = "") -> "SettleResult":
        """A copy carrying the setpoint verification (see :mod:`benchctl.verification`)."""
        return replace(self, verified=bool(verified), verification={k: dict(v) for k, v in checks.items()},
                       verification_reason=reason)

    def with_extra(self, **extra: Any) -> "SettleResult":
        """A copy with more facts for ``settle_info`` (e.g. a drift check)."""
        return replace(self, extra={**self.extra, **extra})

    def unsettled_by(self, reason: str, **extra: Any) -> "SettleResult":
        """A copy marked unsettled for ``reason`` (a later criterion failed, e.g. slow drift)."""
        why = "; ".join(r for r in (self.reason if not self.settled else "", reason) if r)
        return replace(self, settled=False, settling_time_s=None, reason=why, extra={**self.extra, **extra})

    def info(self) -> dict[str, Any]:
        """The ``settle_info`` dict stored with a point (keys of the project's conventions)."""
        out: dict[str, Any] = {
            "method": self.method,
            "quantity": self.quantity,
            "window_s": _finite_or_none(self.window_s),
            "dwell_s": _finite_or_none(self.dwell_s),
            "tau_s": _finite_or_none(self.tau_s),
            "predicted_residual": _finite_or_none(self.predicted_residual),
            "predicted_residual_rel": _finite_or_none(self.predicted_residual_rel),
            "verified": bool(self.verified),
            "verification": {k: {kk: _finite_or_none(vv) for kk, vv in v.items()} for k, v in self.verification.items()},
            "reason": self.why_not,
            "settled": bool(self.settled),
            "tolerance": _finite_or_none(self.tolerance),
            "residual_bound": _finite_or_none(self.residual_bound),
            "tau_source": self.tau_source,
            "readings": int(self.readings),
            "settling_time_s": _finite_or_none(self.settling_time_s),
        }
        if self.quantities:
            out["quantities"] = {k: {kk: (_finite_or_none(vv) if isinstance(vv, float) else vv) for kk, vv in v.items()}
                                 for k, v in self.quantities.items()}
        out.update(self.extra)
        return out


def _finite_or_none(x: float | None) -> float | None:
    if x is None:
        return None
    x = float(x)
    return x if math.isfinite(x) else None


def disabled_result(value: float, quantity: str = "") -> SettleResult:
    """What a settle returns when settling is switched off (dry runs): one reading, not settled."""
    return SettleResult(False, None, 0.0, value, 0.0, 1, "settling disabled (dry run)", method="disabled",
                        quantity=quantity, dwell_s=0.0)


# -- the exponential approach ------------------------------------------------------------


@dataclass(frozen=True)
class ExponentialFit:
    """x(t) = final + amplitude·e^(−(t − t0_s)/tau_s) fitted to readings (t in s).

    ``residual_end`` is the predicted x(t_end_s) − final, ``residual_end_se`` its standard
    error; ``sigma`` the standard deviation of the readings about the curve.
    """

    final: float
    amplitude: float
    tau_s: float
    t0_s: float
    t_end_s: float
    sigma: float
    n: int
    residual_end: float
    residual_end_se: float
    tau_se_s: float | None  # None when τ was fixed
    fixed_tau: bool
    #: The slowest τ the readings allow (profile least squares, 95 %): RSS(τ) within
    #: RSS_min·(1 + F(0.95; 1, n − 3)/(n − 3)) (Bates & Watts 1988, 6.1); None when τ was fixed.
    tau_upper_s: float | None = None

    @property
    def resolved(self) -> bool:
        """The readings show the transient clearly enough to trust the fitted τ."""
        if self.fixed_tau or self.tau_se_s is None or self.n < 6:
            return False
        return (abs(self.amplitude) >= RESOLVED_AMPLITUDE_SIGMAS * self.sigma
                and self.tau_s <= (self.t_end_s - self.t0_s)
                and self.tau_se_s <= RESOLVED_TAU_REL_SE * self.tau_s)

    @property
    def residual_bound(self) -> float:
        return abs(self.residual_end) + COVERAGE_K * self.residual_end_se


def _ls_fixed(t: np.ndarray, x: np.ndarray, tau_s: float) -> tuple[float, float, float, np.ndarray]:
    """(final, amplitude at t[0], residual sum of squares, basis) for a fixed τ."""
    e = np.exp(-(t - t[0]) / tau_s)
    n = len(t)
    xm = x.mean()
    xc = x - xm
    se, see, sex = e.sum(), float(e @ e), float(e @ xc)
    det = n * see - se * se
    if det <= 1e-300:
        return xm, 0.0, float(xc @ xc), e
    a = n * sex / det
    c = xm - a * se / n
    r = x - c - a * e
    return c, a, float(r @ r), e


def _grid_rss(t: np.ndarray, x: np.ndarray, taus: np.ndarray) -> np.ndarray:
    """Residual sum of squares of the best (final, amplitude) for every τ in ``taus`` at once."""
    e = np.exp(-(t[None, :] - t[0]) / taus[:, None])
    n = len(t)
    xc = x - x.mean()
    se = e.sum(axis=1)
    see = np.einsum("ij,ij->i", e, e)
    sex = e @ xc
    det = n * see - se * se
    with np.errstate(divide="ignore", invalid="ignore"):
        a = np.where(det > 1e-300, n * sex / det, 0.0)
    return float(xc @ xc) - a * sex


def fit_exponential(
    t_s: Sequence[float],
    x: Sequence[float],
    *,
    tau_s: float | None = None,
    tau_min_s: float | None = None,
    tau_max_s: float | None = None,
) -> ExponentialFit:
    """Fit x(t) = final + A·e^(−(t − t0)/τ) to readings; τ fixed when ``tau_s`` is given.

    Free τ: variable projection (x∞ and A by linear least squares for each τ; τ by a
    logarithmic grid then Brent's method, scipy.optimize.minimize_scalar) within
    [``tau_min_s``, ``tau_max_s``] (defaults: a fifth of the shortest reading interval, and
    50 × the readings' span). Standard errors from σ²·(JᵀJ)⁻¹ with σ² = RSS/(n − p), the
    usual nonlinear least-squares covariance (e.g. Bates & Watts, *Nonlinear Regression
    Analysis*, 1988, ch. 2; scipy.optimize.curve_fit does the same).
    """
    t = np.asarray(t_s, dtype=float)
    xv = np.asarray(x, dtype=float)
    n = len(t)
    if n < 3 or len(xv) != n:
        raise ValueError(f"fit_exponential: need at least 3 readings with one time each, got {n} and {len(xv)}")
    span = float(t[-1] - t[0])
    if not span > 0:
        raise ValueError("fit_exponential: the readings must span some time (all times are equal)")
    if tau_s is not None:
        if not tau_s > 0:
            raise ValueError(f"fit_exponential: tau_s must be > 0 s, got {tau_s!r}")
        c, a, rss, e = _ls_fixed(t, xv, float(tau_s))
        dof = max(n - 2, 1)
        sigma = math.sqrt(max(rss, 0.0) / dof)
        decay = math.exp(-span / tau_s)
        # Var(a) for the 2-parameter linear model: σ²·n/det
        det = n * float(e @ e) - float(e.sum()) ** 2
        var_a = sigma * sigma * n / det if det > 1e-300 else math.inf
        return ExponentialFit(c, a, float(tau_s), float(t[0]), float(t[-1]), sigma, n, a * decay,
                              math.sqrt(var_a) * decay, None, True)

    dt = np.diff(t)
    lo = tau_min_s if tau_min_s is not None else max(float(dt[dt > 0].min()) / 5.0 if (dt > 0).any() else span / 100, 1e-9)
    hi = tau_max_s if tau_max_s is not None else 50.0 * span
    lo, hi = min(lo, hi), max(lo, hi)
    grid = np.geomspace(lo, hi, 41)
    rss = _grid_rss(t, xv, grid)
    k = int(np.nanargmin(rss))
    tau = float(grid[k])
    if 0 < k < len(grid) - 1:
        from scipy.optimize import minimize_scalar

        res = minimize_scalar(lambda u: _ls_fixed(t, xv, math.exp(u))[2],
                              bounds=(math.log(grid[k - 1]), math.log(grid[k + 1])), method="bounded",
                              options={"xatol": 1e-8})
        if res.success and res.fun <= rss[k]:
            tau = math.exp(float(res.x))
    c, a, rss_best, e = _ls_fixed(t, xv, tau)
    dof = n - 3
    if dof < 1:
        sigma = 0.0
        return ExponentialFit(c, a, tau, float(t[0]), float(t[-1]), sigma, n, a * math.exp(-span / tau),
                              math.inf, math.inf, False, hi)
    from scipy.stats import f as f_dist

    threshold = rss_best * (1.0 + float(f_dist.ppf(0.95, 1, dof)) / dof)
    above = np.nonzero((grid > tau) & (rss > threshold))[0]
    tau_upper = float(grid[above[0]]) if len(above) else float(hi)  # the first slower τ the readings reject
    sigma = math.sqrt(max(rss_best, 0.0) / dof)
    # Jacobian of (final, amplitude, τ) and the covariance σ²(JᵀJ)⁻¹
    jac = np.column_stack([np.ones(n), e, a * e * (t - t[0]) / (tau * tau)])
    try:
        cov = sigma * sigma * np.linalg.inv(jac.T @ jac)
    except np.linalg.LinAlgError:
        cov = np.full((3, 3), math.inf)
    decay = math.exp(-span / tau)
    grad = np.array([0.0, decay, a * decay * span / (tau * tau)])
    with np.errstate(all="ignore"):
        var_r = float(grad @ cov @ grad)
    tau_var = float(cov[2, 2])
    return ExponentialFit(c, a, tau, float(t[0]), float(t[-1]), sigma, n, a * decay,
                          math.sqrt(var_r) if var_r >= 0 and math.isfinite(var_r) else math.inf,
                          math.sqrt(tau_var) if tau_var >= 0 and math.isfinite(tau_var) else math.inf, False,
                          tau_upper)


@dataclass(frozen=True)
class TwoExponentialFit:
    """x(t) = final + a1·e^(−(t − t0)/τ1) + a2·e^(−(t − t0)/τ2), τ1 < τ2, fitted to readings."""

    final: float
    amplitudes: tuple[float, float]
    taus_s: tuple[float, float]
    t0_s: float
    t_end_s: float
    sigma: float
    n: int
    rss: float
    residual_end: float
    residual_end_se: float
    fast_residual_end: float  # the faster term alone at the last reading
    fast_residual_end_se: float

    @property
    def residual_bound(self) -> float:
        return abs(self.residual_end) + COVERAGE_K * self.residual_end_se

    @property
    def fast_residual_bound(self) -> float:
        return abs(self.fast_residual_end) + COVERAGE_K * self.fast_residual_end_se


def _ls_basis(x: np.ndarray, basis: np.ndarray) -> tuple[np.ndarray, float]:
    """Linear least squares of x on the columns of ``basis``: (coefficients, RSS)."""
    coef, *_ = np.linalg.lstsq(basis, x, rcond=None)
    r = x - basis @ coef
    return coef, float(r @ r)


#: The slower of two fitted exponentials is at least this many times slower than the faster.
MIN_TAU_RATIO = 2.0


def fit_two_exponentials(t_s: Sequence[float], x: Sequence[float], *, tau_min_s: float | None = None,
                         tau_max_s: float | None = None, tau1_hint_s: float | None = None) -> TwoExponentialFit:
    """Fit a sum of two exponentials (variable projection: final value and amplitudes by
    linear least squares, the two τ by a logarithmic grid then Nelder-Mead, scipy.optimize.minimize,
    over log τ1 and log τ2/τ1 ≥ log ``MIN_TAU_RATIO``, so the two stay distinct); ``tau1_hint_s``
    (the single-exponential fit's τ) starts the faster one there and searches the slower one
    above it. Standard error of the residual at the last reading from the 5-parameter
    covariance σ²(JᵀJ)⁻¹. Needs at least 7 readings."""
    from scipy.optimize import minimize

    t = np.asarray(t_s, dtype=float)
    xv = np.asarray(x, dtype=float)
    n = len(t)
    if n < 7:
        raise ValueError(f"fit_two_exponentials: need at least 7 readings, got {n}")
    span = float(t[-1] - t[0])
    dt = np.diff(t)
    lo = tau_min_s if tau_min_s is not None else max(float(dt[dt > 0].min()) / 5.0, 1e-9)
    hi = tau_max_s if tau_max_s is not None else 50.0 * span
    u = t - t[0]
    xm = xv.mean()
    xc = xv - xm
    log_lo, log_hi, log_ratio = math.log(lo), math.log(hi), math.log(MIN_TAU_RATIO)

    def taus(p: np.ndarray) -> tuple[float, float]:
        l1 = min(max(float(p[0]), log_lo), log_hi - log_ratio)
        l2 = min(l1 + max(float(p[1]), log_ratio), log_hi)
        return math.exp(l1), math.exp(l2)

    def rss_of(p: np.ndarray) -> float:
        t1, t2 = taus(p)
        basis = np.column_stack([np.ones(n), np.exp(-u / t1), np.exp(-u / t2)])
        try:
            return _ls_basis(xv, basis)[1]
        except np.linalg.LinAlgError:
            return math.inf

    if tau1_hint_s is not None and lo < tau1_hint_s < hi / MIN_TAU_RATIO:
        firsts = [math.log(tau1_hint_s)]
    else:
        firsts = list(np.log(np.geomspace(lo, hi / MIN_TAU_RATIO, 16)))
    candidates = [np.array([l1, lr]) for l1 in firsts
                  for lr in np.linspace(log_ratio, max(log_hi - l1, log_ratio), 16)]
    rss_start = [rss_of(p) for p in candidates]
    k = int(np.argmin(rss_start))
    start = candidates[k]
    res = minimize(rss_of, start, method="Nelder-Mead",
                   options={"xatol": 1e-4, "fatol": 1e-12 * max(float(xc @ xc), 1e-300), "maxiter": 400})
    best = res.x if res.fun <= rss_start[k] else start
    tau1, tau2 = taus(best)
    e1, e2 = np.exp(-u / tau1), np.exp(-u / tau2)
    try:
        coef, rss = _ls_basis(xv, np.column_stack([np.ones(n), e1, e2]))
    except np.linalg.LinAlgError:  # degenerate: no second exponential can be told apart
        coef, rss = np.array([xm, 0.0, 0.0]), float(xc @ xc)
    c, a1, a2 = (float(v) for v in coef)
    sigma = math.sqrt(max(rss, 0.0) / (n - 5)) if n > 5 else 0.0
    d1, d2 = math.exp(-span / tau1), math.exp(-span / tau2)
    jac = np.column_stack([np.ones(n), e1, e2, a1 * e1 * u / tau1**2, a2 * e2 * u / tau2**2])
    grad = np.array([0.0, d1, d2, a1 * d1 * span / tau1**2, a2 * d2 * span / tau2**2])
    grad_fast = np.array([0.0, d1, 0.0, a1 * d1 * span / tau1**2, 0.0])
    try:
        with np.errstate(all="ignore"):
            cov = sigma * sigma * np.linalg.pinv(jac.T @ jac)
            var_r = float(grad @ cov @ grad)
            var_fast = float(grad_fast @ cov @ grad_fast)
    except np.linalg.LinAlgError:
        var_r = var_fast = math.inf

    def root(v: float) -> float:
        return math.sqrt(v) if math.isfinite(v) and v >= 0 else math.inf

    return TwoExponentialFit(c, (a1, a2), (tau1, tau2), float(t[0]), float(t[-1]), sigma, n, rss,
                             a1 * d1 + a2 * d2, root(var_r), a1 * d1, root(var_fast))


def second_exponential_significant(one: ExponentialFit, two: TwoExponentialFit, *, confidence: float = 0.99) -> bool:
    """F-test of the nested models (2 more parameters): is the second exponential real?
    (extra-sum-of-squares F test, e.g. Bates & Watts 1988, 3.10; scipy.stats.f)."""
    from scipy.stats import f as f_dist

    dof2 = two.n - 5
    if dof2 < 1:
        return False
    rss1 = one.sigma ** 2 * max(one.n - 3, 1)
    if rss1 <= one.n * (1e-9 * max(abs(one.final), abs(one.amplitude))) ** 2:
        return False  # one exponential already fits to the numbers' own precision
    if two.rss <= 0:
        return rss1 > 0
    stat = ((rss1 - two.rss) / 2.0) / (two.rss / dof2)
    return bool(stat > f_dist.ppf(confidence, 2, dof2))


@dataclass(frozen=True)
class ResidualAssessment:
    """How one quantity's residual was judged at one moment."""

    settled: bool
    residual: float  # predicted |x(t_end) − x∞|
    bound: float  # residual + k·se: what is compared with the tolerance
    tolerance: float
    final: float
    tau_s: float
    tau_source: str
    fitted_tau_s: float | None  # τ of the free fit when it resolved the transient
    span_s: float
    drift_tau_s: float | None = None  # a component slower than max_tau_s, left to the drift criterion
    drift_per_s: float | None = None  # its rate of change at the last reading (unit/s)


def assess_residual(
    t_s: Sequence[float],
    x: Sequence[float],
    *,
    rel_tol: float,
    abs_tol: float,
    tau_given_s: float | None = None,
    tau_earlier_s: float | None = None,
    max_tau_s: float = math.inf,
) -> ResidualAssessment:
    """Judge whether readings ``x`` at ``t_s`` have settled (see the module docstring).

    Candidates for the residual at the last reading: the free fit when it resolves the
    transient; the fit with τ fixed at the given time constant (procedure or station);
    when the free fit does not resolve the transient, the fit with τ from earlier points
    (``tau_earlier_s``), or else with τ equal to the readings' span. The largest bound counts,
    so a given τ slower than the fit is kept (conservative). A component slower than
    ``max_tau_s`` is slow drift (parts warming), not settling: it is reported, and left to the
    drift criterion (:mod:`benchctl.stability`).
    """
    t = np.asarray(t_s, dtype=float)
    xv = np.asarray(x, dtype=float)
    span = float(t[-1] - t[0])
    free = fit_exponential(t, xv)
    resolved = free.resolved and free.tau_s <= max_tau_s
    candidates: list[tuple[ExponentialFit, str]] = []
    fitted = None
    if resolved:
        candidates.append((free, "fit"))
        fitted = free.tau_s
    if tau_given_s is not None and tau_given_s > 0:
        candidates.append((fit_exponential(t, xv, tau_s=tau_given_s), "given"))
    if not resolved:
        if tau_earlier_s is not None and tau_earlier_s > 0:
            candidates.append((fit_exponential(t, xv, tau_s=tau_earlier_s), "earlier points"))
        elif tau_given_s is None:
            # The slowest τ the readings allow, at most their own span: a clear step over within
            # the first reading rejects every slow τ; flat readings reject none, so the span stands in.
            cap = min(span, max_tau_s)
            step_seen = abs(free.amplitude) >= RESOLVED_AMPLITUDE_SIGMAS * free.sigma
            tau_c = min(free.tau_upper_s or cap, cap) if step_seen else cap
            candidates.append((fit_exponential(t, xv, tau_s=tau_c),
                               "window span" if tau_c >= cap else "fit, slowest the readings allow"))
    best, source = max(candidates, key=lambda c: c[0].residual_bound)
    final = best.final
    tol = max(abs_tol, rel_tol * abs(final))
    bound = best.residual_bound
    tau = best.tau_s
    if bound <= tol and len(t) >= 8:
        # The single exponential says settled: check that a slower second one is not hiding
        # in its residuals (a fast large step riding on a slow small one).
        two = fit_two_exponentials(t, xv, tau1_hint_s=free.tau_s)
        if second_exponential_significant(free, two):
            if two.taus_s[1] > max_tau_s:  # the slower one is drift: judge the faster one alone
                a2, tau2 = two.amplitudes[1], two.taus_s[1]
                drift = -a2 / tau2 * math.exp(-span / tau2)
                if two.fast_residual_bound > bound:
                    bound, tau, source = two.fast_residual_bound, two.taus_s[0], "fit, two exponentials"
                return ResidualAssessment(bound <= tol and math.isfinite(bound), abs(two.fast_residual_end)
                                          if source.startswith("fit, two") else abs(best.residual_end), bound,
                                          tol, final, tau, source, fitted, span, tau2, drift)
            if two.residual_bound > bound:
                bound, final, tau, source = two.residual_bound, two.final, two.taus_s[1], "fit, two exponentials"
                tol = max(abs_tol, rel_tol * abs(final))
                return ResidualAssessment(bound <= tol and math.isfinite(bound), abs(two.residual_end), bound, tol,
                                          final, tau, source, fitted, span)
    return ResidualAssessment(bound <= tol and math.isfinite(bound), abs(best.residual_end), bound, tol, final,
                              tau, source, fitted, span)


def settle_exponential(
    read: Callable[[], Mapping[str, tuple[float, float]]],
    *,
    settle_on: Sequence[str],
    rel_tol: float | Mapping[str, float] = 1e-3,
    abs_tol: float | Mapping[str, float] = 1e-3,
    time_constant_s: float | None = None,
    tau_memory: Mapping[str, float] | None = None,
    min_readings: int = 8,
    min_window_s: float = 0.0,
    min_dwell_s: float = 0.0,
    timeout_s: float = 10.0,
    interval_s: float = 0.0,
    max_readings: int = 400,
    max_tau_s: float = 10.0,
    clock: Callable[[], float] = time.monotonic,
    sleep: Callable[[float], None] = time.sleep,
    t_change_s: float | None = None,
) -> SettleResult:
    """Read until every quantity of ``settle_on`` is predicted within its tolerance.

    ``read()`` returns ``{name: (t_s, value)}`` for one round of readings, or ``{name: [(t_s,
    value), ...]}`` with every reading that arrived since the last call (``t_s`` on ``clock``;
    see :mod:`benchctl.readings`). Tolerances are per quantity
    (a mapping) or common: tol = max(abs_tol, rel_tol·|x∞|). ``time_constant_s`` is the DUT's
    dominant time constant when known (procedure or station); ``tau_memory`` holds τ fitted
    at earlier points per quantity. The first quantity of ``settle_on`` is the one the point
    is for (``quantity`` of the result). ``min_dwell_s`` is counted from ``t_change_s`` (the
    setpoint change; default: the start of the settle). Components slower than ``max_tau_s``
    are slow drift, not settling (reported per quantity as ``drift_tau_s`` and ``drift_per_s``).
    """
    names = list(settle_on)
    if not names:
        raise ValueError("settle_exponential: settle_on names no quantity")
    if min_readings < 8:
        raise ValueError("settle_exponential: min_readings must be at least 8 (a fit of two exponentials "
                         "and its scatter checks the fit of one)")
    if timeout_s < 0 or min_dwell_s < 0 or min_window_s < 0:
        raise ValueError("settle_exponential: timeout_s, min_dwell_s and min_window_s must not be negative")

    def tol_of(spec: float | Mapping[str, float], name: str) -> float:
        return float(spec[name]) if isinstance(spec, Mapping) else float(spec)

    t0 = clock()
    t_ref = t0 if t_change_s is None else t_change_s
    series: dict[str, tuple[list[float], list[float]]] = {n: ([], []) for n in names}
    count = 0
    judged_at = -math.inf
    last: dict[str, ResidualAssessment] = {}
    while True:
        round_ = read()
        for name in names:
            ts, xs = series[name]
            got = round_[name]
            for t_read, value in (got if isinstance(got, list) else [got]):
                ts.append(t_read - t0)
                xs.append(float(value))
            if len(ts) > max_readings:  # thin the older half: the span (and the early transient) stays
                half = len(ts) // 2
                ts[:half], xs[:half] = ts[:half:2], xs[:half:2]
        count = min(len(series[n][0]) for n in names)
        now = clock()
        elapsed = now - t0
        # Judge after every reading, but at most about every 2 % of the time spent so far when
        # readings come much faster than that (the decision is late by at most that much).
        ready = count >= min_readings and (elapsed - judged_at >= 0.02 * elapsed or elapsed >= timeout_s)
        if ready:
            judged_at = elapsed
            all_ok = True
            for name in names:
                ts, xs = series[name]
                if ts[-1] - ts[0] <= 0:
                    all_ok = False
                    continue
                a = assess_residual(ts, xs, rel_tol=tol_of(rel_tol, name), abs_tol=tol_of(abs_tol, name),
                                    tau_given_s=time_constant_s,
                                    tau_earlier_s=(tau_memory or {}).get(name), max_tau_s=max_tau_s)
                last[name] = a
                all_ok = all_ok and a.settled
            dwell = now - t_ref
            span_ok = all(series[n][0][-1] - series[n][0][0] >= min_window_s for n in names)
            if all_ok and span_ok and dwell >= min_dwell_s:
                return _exponential_result(True, names, last, series, elapsed, dwell, count, "")
        if elapsed >= timeout_s:
            if last:
                worst = max(last.items(), key=lambda kv: kv[1].bound / kv[1].tolerance if kv[1].tolerance else math.inf)
                why = (f"{worst[0]} not settled within {timeout_s:g} s: predicted residual "
                       f"{worst[1].bound:.4g} (with {COVERAGE_K:g} standard errors) above the tolerance "
                       f"{worst[1].tolerance:.4g} (tau {worst[1].tau_s:.3g} s, {worst[1].tau_source})")
            else:
                why = f"fewer than {min_readings} readings in {timeout_s:g} s: nothing to judge settling on"
            return _exponential_result(False, names, last, series, elapsed, clock() - t_ref, count, why)
        if interval_s > 0:
            sleep(interval_s)


def _exponential_result(settled: bool, names: list[str], last: Mapping[str, ResidualAssessment],
                        series: Mapping[str, tuple[list[float], list[float]]], elapsed: float, dwell: float,
                        count: int, reason: str) -> SettleResult:
    primary = names[0]
    a = last.get(primary)
    per = {}
    for name in names:
        q = last.get(name)
        if q is None:
            per[name] = {"settled": False}
            continue
        per[name] = {"settled": q.settled, "final": q.final, "tau_s": q.tau_s, "tau_source": q.tau_source,
                     "fitted_tau_s": q.fitted_tau_s, "predicted_residual": q.residual,
                     "predicted_residual_rel": q.residual / abs(q.final) if q.final else None,
                     "residual_bound": q.bound, "tolerance": q.tolerance}
        if q.drift_tau_s is not None:
            per[name].update(drift_tau_s=q.drift_tau_s, drift_per_s=q.drift_per_s)
    value = a.final if a is not None else (series[primary][1][-1] if series[primary][1] else math.nan)
    return SettleResult(
        settled=settled,
        settling_time_s=elapsed if settled else None,
        elapsed_s=elapsed,
        final_value=value,
        tolerance=a.tolerance if a is not None else math.nan,
        readings=count,
        reason=reason,
        method="exponential_fit",
        quantity=primary,
        window_s=a.span_s if a is not None else None,
        dwell_s=dwell,
        tau_s=a.tau_s if a is not None else None,
        predicted_residual=a.residual if a is not None else None,
        residual_bound=a.bound if a is not None else None,
        tau_source=a.tau_source if a is not None else "",
        quantities=per,
    )


def fitted_time_constants(result: SettleResult) -> dict[str, float]:
    """τ the fit resolved for each quantity of a settle (for later points' hints)."""
    out = {}
    for name, q in result.quantities.items():
        tau = q.get("fitted_tau_s")
        if tau:
            out[name] = float(tau)
    return out


# -- agreement of a trailing window ------------------------------------------------------------


def settle_adaptive(
    read: Callable[[], float],
    *,
    rel_tol: float = 1e-3,
    abs_tol: float = 1e-3,
    window: int = 4,
    window_s: float = 0.0,
    interval_s: float = 0.0,
    timeout_s: float = 10.0,
    clock: Callable[[], float] = time.monotonic,
    sleep: Callable[[float], None] = time.sleep,
) -> SettleResult:
    """Read until the trailing window of readings agrees within the tolerance, or time out."""
    if window < 2:
        raise ValueError("window must be at least 2 readings")
    if window_s < 0:
        raise ValueError("window_s must not be negative")
    t0 = clock()
    times: list[float] = []
    values: list[float] = []
    while True:
        value = read()
        now = clock()
        times.append(now - t0)
        values.append(value)
        start = len(values) - window
        while start > 0 and times[-1] - times[start] < window_s:
            start -= 1
        if start >= 0 and times[-1] - times[start] >= window_s:
            recent = values[start:]
            tol = max(abs_tol, rel_tol * abs(recent[-1]))
            if max(recent) - min(recent) <= tol:
                final = sum(recent) / len(recent)
                k = len(values) - 1
                while k > 0 and abs(values[k - 1] - final) <= tol:
                    k -= 1
                return SettleResult(True, times[k], now - t0, final, tol, len(values), method="window",
                                    window_s=times[-1] - times[start], dwell_s=now - t0)
        if now - t0 >= timeout_s:
            tol = max(abs_tol, rel_tol * abs(value))
            return SettleResult(
                False, None, now - t0, value, tol, len(values),
                reason=f"readings did not agree within {tol:g} over {window} readings in {timeout_s:g} s",
                method="window", dwell_s=now - t0,
            )
        if interval_s > 0:
            sleep(interval_s)
