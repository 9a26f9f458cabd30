"""Continuous vs discontinuous conduction (CCM / DCM) from measured waveforms, and the
textbook boundary between them.

Waveform method (common practice): in CCM the switch current starts each on-time at a
value clearly above zero (the inductor valley current, I_avg − ΔI/2 for a buck); in DCM
it ramps up from zero. The start current is read a blanking time after the turn-on
edge, past the leading-edge spike, and extrapolated back to the edge with a straight
line fitted to the ramp. A second method looks at an inductor current: in DCM it sits
at zero for an idle interval before the next on-time.

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
"""Start current above this fraction of the peak current counts as CCM (common practice)."""


@dataclass(frozen=True)
class ConductionModeResult:
    """Conduction mode found from a waveform.

    ``mode`` is "CCM" or "DCM". ``start_current_a`` and ``peak_current_a`` are medians
    over the ``cycles_used`` complete cycles; ``ratio`` = start / peak;
    ``threshold_ratio`` is the ratio above which the mode counts as CCM.
    ``idle_fraction`` is the median zero-current fraction of the period when the idle
    interval method was used, otherwise None. ``reason`` says how the decision was made.
    """

    mode: str
    start_current_a: float
    peak_current_a: float
    ratio: float
    cycles_used: int
    reason: str
    threshold_ratio: float = DEFAULT_CCM_THRESHOLD
    idle_fraction: float | None = None


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


def classify_conduction_mode(
    t_s: ArrayLike,
    i_switch_a: ArrayLike,
    *,
    v_gate_v: ArrayLike | None = None,
    fsw_hz: float | None = None,
    blanking_s: float | None = None,
    threshold_ratio: float = DEFAULT_CCM_THRESHOLD,
    zero_band_frac: float = 0.05,
) -> ConductionModeResult:
    """Classify CCM/DCM from a switch-current waveform (amperes vs seconds).

    On-time starts are the rising edges of ``v_gate_v`` (at half its swing) when given,
    otherwise where the switch current rises out of a band of ``zero_band_frac`` × peak
    around zero (in DCM the start then reads at most about that band, well below the
    threshold). ``fsw_hz``, if given, rejects edges closer than half a period.
    ``blanking_s`` (default 10 % of each on-time) skips the leading-edge spike; the
    ramp from there to 90 % of the on-time is fitted with a straight line and
    extrapolated back to the edge. CCM when median start / median peak >
    ``threshold_ratio``. Common practice.
    """
    t, i = as_series(t_s, i_switch_a, "i_switch_a", 16)
    if not 0 < threshold_ratio < 1:
        raise AnalysisInputError(f"threshold_ratio must lie between 0 and 1, got {threshold_ratio!r}")
    holdoff = 0.0
    if fsw_hz is not None:
        if not fsw_hz > 0:
            raise AnalysisInputError(f"fsw_hz must be positive, got {fsw_hz!r}")
        holdoff = 0.5 / fsw_hz
    peak_all = float(np.percentile(i, 99.5))
    if peak_all <= 0:
        raise AnalysisInputError("i_switch_a never rises above zero; check the probe polarity and channel")

    if v_gate_v is not None:
        _, g = as_series(t_s, v_gate_v, "v_gate_v", 16)
        g_lo, g_hi = float(np.percentile(g, 1)), float(np.percentile(g, 99))
        if g_hi - g_lo <= 0:
            raise AnalysisInputError("v_gate_v does not switch (flat); check the gate-drive channel")
        swing = g_hi - g_lo
        rising, falling = _edges(t, g, g_lo + 0.3 * swing, g_lo + 0.7 * swing, g_lo + 0.5 * swing, holdoff)
        edge_source = "gate rising edges"
    else:
        band = zero_band_frac * peak_all
        rising, falling = _edges(t, i, 0.5 * band, band, band, holdoff)
        edge_source = f"switch current rising out of the +/-{band:.3g} A zero band"

    starts: list[float] = []
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
        if k1 - k0 < 2:
            skipped += 1
            continue
        _slope, intercept = np.polyfit(t[k0:k1] - te, i[k0:k1], 1)
        starts.append(float(intercept))
        peaks.append(float(np.max(i[k0:k_end])))
    if not starts:
        raise AnalysisInputError(
            f"no complete on-time with enough samples found ({len(rising)} turn-on edges from {edge_source}, "
            f"{skipped} skipped for too few samples after blanking); sample faster, shorten blanking_s "
            "or capture several switching periods"
        )
    start = float(np.median(starts))
    peak = float(np.median(peaks))
    ratio = start / peak if peak > 0 else 0.0
    n_ccm = int(np.sum(np.asarray(starts) > threshold_ratio * np.asarray(peaks)))
    mode = CCM if ratio > threshold_ratio else DCM
    reason = (
        f"start/peak = {ratio:.3f} {'>' if mode == CCM else '<='} threshold {threshold_ratio:.3f} "
        f"(median over {len(starts)} cycles, {n_ccm} of them above the threshold; on-times from {edge_source})"
    )
    return ConductionModeResult(
        mode=mode,
        start_current_a=start,
        peak_current_a=peak,
        ratio=ratio,
        cycles_used=len(starts),
        reason=reason,
        threshold_ratio=float(threshold_ratio),
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
