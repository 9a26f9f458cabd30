"""Continuous vs discontinuous conduction (CCM / DCM) from measured waveforms, and the
textbook boundary between them.

Waveform method (common practice): in CCM the switch current steps at turn-on from zero to
the inductor valley current (I_avg − ΔI/2 for a buck) and ramps on from there; in DCM it
ramps up from zero, with no step. The start current is that step: the straight line fitted
to the ramp (from a blanking time after the edge, past the leading-edge spike) and
extrapolated back, minus the current just before the on-time (see
:func:`classify_conduction_mode`). A second method looks at an inductor current: in DCM it
sits at zero for an idle interval before the next on-time.

Deciding. By default a cycle train is CCM when its start current lies above zero by more
than ``DETECTION_SIGMAS`` standard uncertainties of its own estimate (a detection limit
from the measurement's noise: common practice). A DCM start current is zero, so the label
then follows the physical boundary up to that limit, a fraction of a percent of the peak
on a clean record. The older rule, CCM when start / peak exceeds a ``threshold_ratio`` r, is
kept on request; it moves the detected boundary to where valley / peak = r, i.e.
(1 + r)/(1 − r) times the textbook boundary, and labels light-load CCM cycles with a start
current below r × peak as DCM.

Boundary (Erickson & Maksimović, Fundamentals of Power Electronics, 2nd ed., ch. 5 —
from memory): K = 2L/(R·Ts); the converter runs in DCM when K < K_crit, with
K_crit = 1 − D for the buck and (1 − D)² for the flyback (L referred to the secondary).
"""

from __future__ import annotations

import logging
import math
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike, NDArray

from benchctl.analysis.series import as_series
from benchctl.errors import AnalysisInputError

logger = logging.getLogger(__name__)

CCM = "CCM"
DCM = "DCM"

DEFAULT_CCM_THRESHOLD = 0.1
"""The start/peak ratio of the older threshold rule, when one is asked for (common practice)."""

DETECTION_SIGMAS = 3.0
"""A start current counts as above zero beyond this many standard uncertainties (common practice)."""

RULE_DETECTION = "detection"
RULE_THRESHOLD = "threshold"


@dataclass(frozen=True)
class ConductionModeResult:
    """Conduction mode found from a waveform.

    ``mode`` is "CCM" or "DCM". ``start_current_a`` (the step of the current at turn-on) and
    ``peak_current_a`` are medians over the ``cycles_used`` complete cycles; ``ratio`` =
    start / peak. ``rule`` is "detection" (CCM when the start current exceeds
    ``detection_limit_a`` = ``DETECTION_SIGMAS`` x ``start_uncertainty_a``, its standard
    uncertainty) or "threshold" (CCM when ``ratio`` > ``threshold_ratio``; None under the
    detection rule). ``idle_fraction`` is the median zero-current fraction of the period
    when the idle interval method was used, otherwise None. ``reason`` says how the decision
    was made.
    """

    mode: str
    start_current_a: float
    peak_current_a: float
    ratio: float
    cycles_used: int
    reason: str
    threshold_ratio: float | None = DEFAULT_CCM_THRESHOLD
    idle_fraction: float | None = None
    rule: str = RULE_THRESHOLD
    start_uncertainty_a: float | None = None
    detection_limit_a: float | None = None


@dataclass(frozen=True)
class BoundarySearch:
    """Result of a bisection for the CCM/DCM boundary.

    ``found`` is False when the two ends of the range give the same mode; then
    ``boundary`` is None and ``reason`` says so. ``lo_value``/``hi_value`` bracket the
    boundary to within the requested tolerance; ``evaluations`` lists every
    (value, mode) the classifier returned, in order.
    """

    found: bool
    boundary: float | None
    lo_value: float
    hi_value: float
    lo_mode: str
    hi_mode: str
    evaluations: tuple[tuple[float, str], ...]
    reason: str


def _edges(
    t: NDArray[np.float64], x: NDArray[np.float64], low: float, high: float, level: float, holdoff_s: float
) -> tuple[list[float], list[float]]:
    """Rising and falling edge times of ``x`` with hysteresis (a rising edge needs ``x``
    above ``high`` after being below ``low``, and vice versa), each interpolated at
    the last crossing of ``level`` before it; a rising edge closer than ``holdoff_s``
    to the previous accepted one is dropped."""
    n = x.size
    event = np.where(x > high, 1, np.where(x < low, -1, 0))
    if event[0] == 0:
        event[0] = 1 if x[0] > level else -1
    last_event = np.maximum.accumulate(np.where(event != 0, np.arange(n), 0))
    state = event[last_event]
    k_rise = np.flatnonzero((state[:-1] < 0) & (state[1:] > 0)) + 1
    k_fall = np.flatnonzero((state[:-1] > 0) & (state[1:] < 0)) + 1
    up = np.flatnonzero((x[:-1] <= level) & (x[1:] > level)) + 1
    down = np.flatnonzero((x[:-1] >= level) & (x[1:] < level)) + 1

    def at_level(ks: NDArray[np.intp], crossings: NDArray[np.intp]) -> list[float]:
        out: list[float] = []
        for k in ks:
            m = int(np.searchsorted(crossings, k, side="right")) - 1
            if m < 0:
                out.append(float(t[k]))
                continue
            j = int(crossings[m])
            a, b = x[j - 1], x[j]
            frac = (level - a) / (b - a) if b != a else 0.0
            out.append(float(t[j - 1] + frac * (t[j] - t[j - 1])))
        return out

    rising: list[float] = []
    for te in at_level(k_rise, up):
        if not rising or te - rising[-1] >= holdoff_s:
            rising.append(te)
    return rising, at_level(k_fall, down)


def _line_fit(x: NDArray[np.float64], y: NDArray[np.float64]) -> tuple[float, float, float, float, float, int]:
    """Least-squares line y = a + b*x: (a, b, residual sd, mean x, Sxx, n) (any statistics text)."""
    n = x.size
    xm = float(x.mean())
    dx = x - xm
    sxx = float(np.dot(dx, dx))
    b = float(np.dot(dx, y - y.mean()) / sxx) if sxx > 0 else 0.0
    a = float(y.mean() - b * xm)
    resid = y - (a + b * x)
    sd = float(np.sqrt(np.dot(resid, resid) / (n - 2))) if n > 2 else 0.0
    return a, b, sd, xm, sxx, n


def _end_of_spike(t: NDArray[np.float64], i: NDArray[np.float64], te: float, k0: int, k1: int,
                  floor_a: float) -> int:
    """First index of the fit window once the leading-edge spike has died away: the ramp line is
    fitted to the later half of [k0, k1), and the window starts after the last earlier sample
    lying more than 3 residual sd (at least ``floor_a``) above that line."""
    mid = k0 + (k1 - k0) // 2
    if k1 - mid < 3:
        return k0
    a, b, sd, _, _, _ = _line_fit(t[mid:k1] - te, i[mid:k1])
    excess = i[k0:mid] - (a + b * (t[k0:mid] - te))
    above = np.flatnonzero(excess > 3.0 * max(sd, floor_a))
    return k0 if above.size == 0 else k0 + int(above[-1]) + 1


def classify_conduction_mode(
    t_s: ArrayLike,
    i_switch_a: ArrayLike,
    *,
    v_gate_v: ArrayLike | None = None,
    fsw_hz: float | None = None,
    blanking_s: float | None = None,
    threshold_ratio: float | None = None,
    zero_band_frac: float = 0.05,
    detection_sigmas: float = DETECTION_SIGMAS,
) -> ConductionModeResult:
    """Classify CCM/DCM from a switch-current waveform (amperes vs seconds).

    On-time starts are the rising edges of ``v_gate_v`` (at half its swing) when given,
    otherwise where the switch current rises out of a band of ``zero_band_frac`` × peak
    around zero. ``fsw_hz``, if given, rejects edges closer than half a period.
    ``blanking_s`` skips the leading-edge spike; the ramp from there to 90 % of the on-time
    is fitted with a straight line. By default the blanking is at least 10 % of each on-time
    and lasts until the spike's tail has fallen within 3 residual sd (or 0.1 % of the peak)
    of the line through the later half of the ramp, so the tail does not lift the intercept.

    Start current of a cycle (the step at turn-on): with a gate channel, the line at the gate
    edge minus the off-state current (the median of the samples below half the zero band;
    the probe's offset). Without one, the line minus the measured current at the last sample
    below half the zero band before the edge: in CCM that sample is still off, so the
    difference is the step; in DCM it already lies on the ramp (or just before it), so the
    difference is zero within noise and one sample's worth of ramp. Its standard uncertainty
    combines the off-state noise (robust sd: 1.4826 × MAD), the line's standard error at that
    time and one sample's worth of ramp as a rectangular spread (b·dt/√12); the median over cycles has the standard uncertainty 1.2533 × sd/√n
    (median of normal data, from memory), taken from the cycles' scatter or the noise,
    whichever is larger.

    Decision: with ``threshold_ratio`` None (the default) CCM when the median start current
    exceeds ``detection_sigmas`` standard uncertainties; with a ratio r, CCM when median
    start / median peak > r (biased: see the module docstring). Common practice.
    """
    t, i = as_series(t_s, i_switch_a, "i_switch_a", 16)
    if threshold_ratio is not None and not 0 < threshold_ratio < 1:
        raise AnalysisInputError(f"threshold_ratio must lie between 0 and 1 (or be None for the detection rule), "
                                 f"got {threshold_ratio!r}")
    if not detection_sigmas > 0:
        raise AnalysisInputError(f"detection_sigmas must be positive, got {detection_sigmas!r}")
    holdoff = 0.0
    if fsw_hz is not None:
        if not fsw_hz > 0:
            raise AnalysisInputError(f"fsw_hz must be positive, got {fsw_hz!r}")
        holdoff = 0.5 / fsw_hz
    peak_all = float(np.percentile(i, 99.5))
    if peak_all <= 0:
        raise AnalysisInputError("i_switch_a never rises above zero; check the probe polarity and channel")
    band = zero_band_frac * peak_all
    low_level = 0.5 * band
    off = i < low_level
    if np.count_nonzero(off) >= 4:
        base = float(np.median(i[off]))
        noise = 1.4826 * float(np.median(np.abs(i[off] - base)))
    else:  # the current never rests near zero (no off-state samples): no offset to correct
        base, noise = 0.0, 0.0

    if v_gate_v is not None:
        _, g = as_series(t_s, v_gate_v, "v_gate_v", 16)
        g_lo, g_hi = float(np.percentile(g, 1)), float(np.percentile(g, 99))
        if g_hi - g_lo <= 0:
            raise AnalysisInputError("v_gate_v does not switch (flat); check the gate-drive channel")
        swing = g_hi - g_lo
        rising, falling = _edges(t, g, g_lo + 0.3 * swing, g_lo + 0.7 * swing, g_lo + 0.5 * swing, holdoff)
        edge_source = "gate rising edges"
    else:
        rising, falling = _edges(t, i, low_level, band, band, holdoff)
        edge_source = f"switch current rising out of the +/-{band:.3g} A zero band"

    starts: list[float] = []
    uncertainties: list[float] = []
    peaks: list[float] = []
    skipped = 0
    falling_arr = np.asarray(falling)
    for te in rising:
        j = int(np.searchsorted(falling_arr, te, side="right"))
        if j >= falling_arr.size:
            continue  # on-time not complete in the record
        tf = float(falling_arr[j])
        t_on = tf - te
        blank = 0.1 * t_on if blanking_s is None else float(blanking_s)
        if blank >= 0.9 * t_on:
            skipped += 1
            continue
        k0 = int(np.searchsorted(t, te + blank, side="left"))
        k1 = int(np.searchsorted(t, te + 0.9 * t_on, side="right"))
        k_end = int(np.searchsorted(t, tf, side="right"))
        if k1 - k0 < 3:
            skipped += 1
            continue
        if blanking_s is None:
            k0 = _end_of_spike(t, i, te, k0, k1, max(noise, 1e-3 * peak_all))
        a, b, sd, xm, sxx, n = _line_fit(t[k0:k1] - te, i[k0:k1])
        if v_gate_v is not None:
            x_ref, i_ref, u_ref = 0.0, base, 0.0
        else:
            k_e = int(np.searchsorted(t, te, side="right"))
            before = np.flatnonzero(i[:k_e] < low_level)
            if before.size == 0:
                skipped += 1
                continue  # the record starts inside this rise: no sample before the on-time
            kb = int(before[-1])
            x_ref, i_ref, u_ref = float(t[kb] - te), float(i[kb]), noise
        line_se = sd * math.sqrt(1.0 / n + (x_ref - xm) ** 2 / sxx) if sxx > 0 else sd
        # the turn-on lies somewhere within one sample interval of the reference: a rectangular
        # spread of one sample's worth of ramp, standard uncertainty b*dt/sqrt(12) (GUM 4.3.7)
        dt_here = float(t[min(k0 + 1, t.size - 1)] - t[k0])
        u_sample = abs(b) * dt_here / math.sqrt(12.0)
        starts.append(a + b * x_ref - i_ref)
        uncertainties.append(math.sqrt(line_se ** 2 + u_ref ** 2 + u_sample ** 2))
        peaks.append(float(np.max(i[k0:k_end])) - base)
    if not starts:
        raise AnalysisInputError(
            f"no complete on-time with enough samples found ({len(rising)} turn-on edges from {edge_source}, "
            f"{skipped} skipped for too few samples after blanking or none before the edge); sample faster, "
            "shorten blanking_s or capture several switching periods"
        )
    starts_arr = np.asarray(starts)
    start = float(np.median(starts_arr))
    peak = float(np.median(peaks))
    ratio = start / peak if peak > 0 else 0.0
    n_cyc = starts_arr.size
    scatter = float(np.std(starts_arr, ddof=1)) if n_cyc > 1 else 0.0
    rms_u = float(np.sqrt(np.mean(np.square(uncertainties))))
    u_start = 1.2533 * max(scatter, rms_u) / math.sqrt(n_cyc)
    if threshold_ratio is None:
        limit = detection_sigmas * u_start
        mode = CCM if start > limit else DCM
        n_ccm = int(np.sum(starts_arr > detection_sigmas * np.asarray(uncertainties)))
        reason = (
            f"start current {start:.4g} A {'>' if mode == CCM else '<='} detection limit {limit:.3g} A "
            f"({detection_sigmas:g} x its standard uncertainty {u_start:.3g} A; start/peak = {ratio:.3f}; "
            f"median over {n_cyc} cycles, {n_ccm} of them above their own limit; on-times from {edge_source})"
        )
        return ConductionModeResult(mode=mode, start_current_a=start, peak_current_a=peak, ratio=ratio,
                                    cycles_used=n_cyc, reason=reason, threshold_ratio=None, rule=RULE_DETECTION,
                                    start_uncertainty_a=u_start, detection_limit_a=limit)
    n_ccm = int(np.sum(starts_arr > threshold_ratio * np.asarray(peaks)))
    mode = CCM if ratio > threshold_ratio else DCM
    reason = (
        f"start/peak = {ratio:.3f} {'>' if mode == CCM else '<='} threshold {threshold_ratio:.3f} "
        f"(median over {n_cyc} cycles, {n_ccm} of them above the threshold; on-times from {edge_source})"
    )
    return ConductionModeResult(
        mode=mode,
        start_current_a=start,
        peak_current_a=peak,
        ratio=ratio,
        cycles_used=n_cyc,
        reason=reason,
        threshold_ratio=float(threshold_ratio),
        rule=RULE_THRESHOLD,
        start_uncertainty_a=u_start,
    )


def conduction_mode_from_idle_interval(
    t_s: ArrayLike,
    i_inductor_a: ArrayLike,
    *,
    zero_band_frac: float = 0.02,
    min_idle_fraction: float = 0.01,
) -> ConductionModeResult:
    """Classify CCM/DCM from an inductor current (amperes vs seconds) by its idle interval.

    Use a current that flows in both switch states (a buck or boost inductor current):
    in DCM it stays within ``zero_band_frac`` × peak of zero for a while before each
    on-time. A cycle runs from one rise out of the zero band to the next; DCM when the
    median idle time is at least ``min_idle_fraction`` of the period. A current that
    never enters the zero band is CCM with ``cycles_used`` = 0. ``start_current_a`` is
    the median valley current; ``threshold_ratio`` reports ``zero_band_frac`` (a
    valley/peak ratio above it cannot touch zero). Erickson & Maksimović 2nd ed.
    ch. 5 (DCM subinterval D3, from memory).
    """
    t, i = as_series(t_s, i_inductor_a, "i_inductor_a", 16)
    peak = float(np.percentile(i, 99.5))
    if peak <= 0:
        raise AnalysisInputError("i_inductor_a never rises above zero; check the probe polarity and channel")
    band = zero_band_frac * peak
    idle = np.abs(i) <= band
    # rises out of the zero band
    rises = np.flatnonzero(idle[:-1] & ~idle[1:]) + 1
    if rises.size >= 2:
        fractions: list[float] = []
        valleys: list[float] = []
        peaks: list[float] = []
        for a, b in zip(rises[:-1], rises[1:]):
            seg = slice(a, b)
            period = float(t[b] - t[a])
            dt_seg = np.diff(t[a : b + 1])
            fractions.append(float(np.sum(dt_seg[idle[a:b]])) / period)
            valleys.append(float(np.min(i[seg])))
            peaks.append(float(np.max(i[seg])))
        frac = float(np.median(fractions))
        valley = float(np.median(valleys))
        pk = float(np.median(peaks))
        mode = DCM if frac >= min_idle_fraction else CCM
        reason = (
            f"median idle time at zero current {frac:.3%} of the period "
            f"{'>=' if mode == DCM else '<'} {min_idle_fraction:.3%} over {len(fractions)} cycles "
            f"(zero band +/-{band:.3g} A)"
        )
        return ConductionModeResult(
            mode=mode,
            start_current_a=valley,
            peak_current_a=pk,
            ratio=valley / pk if pk > 0 else 0.0,
            cycles_used=len(fractions),
            reason=reason,
            threshold_ratio=zero_band_frac,
            idle_fraction=frac,
        )
    if np.any(idle):
        raise AnalysisInputError(
            "the inductor current touches zero but fewer than two complete cycles were found; "
            "capture several switching periods"
        )
    # never touches zero: CCM, no idle interval
    valley = float(np.percentile(i, 0.5))
    return ConductionModeResult(
        mode=CCM,
        start_current_a=valley,
        peak_current_a=peak,
        ratio=valley / peak,
        cycles_used=0,
        reason=(
            f"the current never enters the +/-{band:.3g} A zero band (valley {valley:.4g} A), "
            "so there is no idle interval"
        ),
        threshold_ratio=zero_band_frac,
        idle_fraction=0.0,
    )


def k_parameter(inductance_h: float, load_resistance_ohm: float, fsw_hz: float) -> float:
    """Dimensionless K = 2L/(R·Ts) (Erickson & Maksimović 2nd ed. ch. 5, from memory)."""
    _positive(inductance_h=inductance_h, load_resistance_ohm=load_resistance_ohm, fsw_hz=fsw_hz)
    return 2.0 * inductance_h * fsw_hz / load_resistance_ohm


def k_crit_buck(duty: float) -> float:
    """Buck CCM/DCM boundary K_crit = 1 − D (Erickson & Maksimović 2nd ed. ch. 5, from memory)."""
    _duty(duty)
    return 1.0 - duty


def k_crit_flyback(duty: float) -> float:
    """Flyback CCM/DCM boundary K_crit = (1 − D)², L referred to the secondary
    (Erickson & Maksimović 2nd ed. ch. 5-6, from memory)."""
    _duty(duty)
    return (1.0 - duty) ** 2


def buck_boundary_load_current_a(vin_v: float, vout_v: float, inductance_h: float, fsw_hz: float) -> float:
    """Load current (A) at the CCM/DCM boundary of a buck: half the pk-pk inductor ripple,
    I = (Vin − Vout)·D/(2·L·fs) with D = Vout/Vin (K = K_crit; Erickson 2nd ed. ch. 5, from memory)."""
    _positive(vin_v=vin_v, vout_v=vout_v, inductance_h=inductance_h, fsw_hz=fsw_hz)
    if vout_v >= vin_v:
        raise AnalysisInputError(f"a buck needs vout_v < vin_v; got vout_v={vout_v!r}, vin_v={vin_v!r}")
    duty = vout_v / vin_v
    return (vin_v - vout_v) * duty / (2.0 * inductance_h * fsw_hz)


def flyback_boundary_load_current_a(
    vin_v: float, vout_v: float, magnetizing_inductance_h: float, fsw_hz: float, turns_ratio: float
) -> float:
    """Output current (A) at the CCM/DCM boundary of a flyback.

    ``turns_ratio`` n = Ns/Np; CCM duty D = V/(V + n·Vin); L′ = n²·Lm; boundary where
    K = 2L′/(R·Ts) equals (1 − D)², i.e. I = V·(1 − D)²/(2·L′·fs)
    (Erickson & Maksimović 2nd ed. ch. 5-6, from memory).
    """
    _positive(
        vin_v=vin_v, vout_v=vout_v, magnetizing_inductance_h=magnetizing_inductance_h, fsw_hz=fsw_hz, turns_ratio=turns_ratio
    )
    duty = vout_v / (vout_v + turns_ratio * vin_v)
    l_sec = turns_ratio**2 * magnetizing_inductance_h
    return vout_v * (1.0 - duty) ** 2 / (2.0 * l_sec * fsw_hz)


def find_boundary(classify: Callable[[float], str], lo: float, hi: float, tol: float) -> BoundarySearch:
    """Bisect for the value where ``classify(value)`` changes its answer.

    ``classify`` may set an operating point and measure (e.g. load current →
    "CCM"/"DCM"); it is called at both ends, then at midpoints until the bracket is no
    wider than ``tol``. The boundary reported is the bracket midpoint. Assumes a single
    change of mode inside [lo, hi].
    """
    if not (math.isfinite(lo) and math.isfinite(hi) and lo < hi):
        raise AnalysisInputError(f"find_boundary needs finite lo < hi; got lo={lo!r}, hi={hi!r}")
    if not (math.isfinite(tol) and tol > 0):
        raise AnalysisInputError(f"tol must be positive, got {tol!r}")
    evaluations: list[tuple[float, str]] = []

    def ask(x: float) -> str:
        mode = classify(x)
        evaluations.append((float(x), mode))
        logger.debug("boundary search: %g -> %s", x, mode)
        return mode

    lo_mode, hi_mode = ask(lo), ask(hi)
    if lo_mode == hi_mode:
        return BoundarySearch(
            found=False,
            boundary=None,
            lo_value=float(lo),
            hi_value=float(hi),
            lo_mode=lo_mode,
            hi_mode=hi_mode,
            evaluations=tuple(evaluations),
            reason=f"both ends give {lo_mode!r}; widen the range so the mode changes inside it",
        )
    a, b = float(lo), float(hi)
    for _ in range(200):
        if b - a <= tol:
            break
        mid = 0.5 * (a + b)
        if ask(mid) == lo_mode:
            a = mid
        else:
            b = mid
    return BoundarySearch(
        found=True,
        boundary=0.5 * (a + b),
        lo_value=a,
        hi_value=b,
        lo_mode=lo_mode,
        hi_mode=hi_mode,
        evaluations=tuple(evaluations),
        reason=f"mode changes from {lo_mode!r} to {hi_mode!r} between {a:.6g} and {b:.6g}",
    )


def _positive(**values: float) -> None:
    for name, value in values.items():
        if not (math.isfinite(value) and value > 0):
            raise AnalysisInputError(f"{name} must be a positive finite number, got {value!r}")


def _duty(duty: float) -> None:
    if not (math.isfinite(duty) and 0 <= duty <= 1):
        raise AnalysisInputError(f"duty must lie between 0 and 1, got {duty!r}")
