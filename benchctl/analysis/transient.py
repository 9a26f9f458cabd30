"""Load-step (load transient) response metrics from a captured output-voltage waveform.

Definitions (common practice): the peak deviation is measured from the pre-step value;
the recovery time runs from the step edge until the output enters, and then stays in,
a tolerance band around the pre-step value; the settling time runs from the step edge
until the output enters and stays in a band of the same half-width around the
post-step final value. Times between samples are found by linear interpolation.

All arrays are SI: ``t_s`` in seconds, ``vout_v`` in volts, ``iout_a`` in amperes.
"""

from __future__ import annotations

import logging
from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike, NDArray

from benchctl.analysis.series import as_series
from benchctl.errors import AnalysisInputError

logger = logging.getLogger(__name__)

LOAD_INCREASE = "increase"
LOAD_DECREASE = "decrease"


@dataclass(frozen=True)
class TransientMetrics:
    """Load-step response of an output voltage.

    ``recovered`` / ``settled`` are False when the output never entered and stayed in
    the band before the end of the record; the time is then ``None`` and the reason
    says why. Times ending in ``_time_s`` are on the time base of ``t_s``; times ending
    in ``_after_step_s`` are measured from the step edge.
    """

    step_time_s: float
    load_step: str  # "increase" (undershoot expected) or "decrease" (overshoot expected)
    pre_step_v: float
    final_v: float
    static_shift_v: float  # final_v - pre_step_v
    peak_v: float
    peak_deviation_v: float  # signed: peak_v - pre_step_v
    peak_deviation_abs_v: float
    peak_time_s: float
    peak_after_step_s: float
    band_v: float  # half-width of the tolerance band used for recovery and settling
    recovered: bool
    recovery_after_step_s: float | None
    recovery_reason: str
    settled: bool
    settling_after_step_s: float | None
    settling_reason: str


def find_step_time(t_s: ArrayLike, iout_a: ArrayLike) -> tuple[float, str]:
    """Find the load-step edge in a load-current channel.

    The two levels are the 5th and 95th percentiles of the current; the edge is the
    first crossing of their midpoint (interpolated), and the direction compares the
    medians before and after it. Returns (step time in s, "increase" or "decrease").
    Raises AnalysisInputError when the levels differ by no more than ten times the
    sample-to-sample noise (common practice).
    """
    t, i = as_series(t_s, iout_a, "iout_a", 10)
    lo, hi = float(np.percentile(i, 5)), float(np.percentile(i, 95))
    d = np.diff(i)
    noise = 1.4826 * float(np.median(np.abs(d - np.median(d)))) / np.sqrt(2.0)
    if hi - lo <= 10.0 * noise or hi == lo:
        raise AnalysisInputError(
            f"no load step found in iout_a: its levels differ by {hi - lo:.4g} A against noise {noise:.4g} A rms; "
            "pass step_time_s explicitly or capture a record that starts before and ends after the step"
        )
    mid = 0.5 * (lo + hi)
    above = i > mid
    changes = np.flatnonzero(above[:-1] != above[1:])
    if changes.size == 0:
        raise AnalysisInputError("no load step found in iout_a: the current never crosses its mid level")
    k = int(changes[0])
    frac = (mid - i[k]) / (i[k + 1] - i[k])
    t_edge = float(t[k] + frac * (t[k + 1] - t[k]))
    before = float(np.median(i[: k + 1]))
    after = float(np.median(i[k + 1 :]))
    return t_edge, (LOAD_INCREASE if after > before else LOAD_DECREASE)


def _band_entry_time(t: NDArray[np.float64], dev: NDArray[np.float64], band: float, min_in_band_s: float) -> tuple[float | None, str]:
    """Time at which |dev| enters the band for the last time and stays; None with a reason otherwise."""
    outside = np.abs(dev) > band
    if not outside.any():
        return float(t[0]), "never left the band"
    last = int(np.flatnonzero(outside)[-1])
    if last == t.size - 1:
        return None, (
            f"still outside the +/-{band:.4g} V band at the end of the record "
            f"(deviation {dev[-1]:.4g} V); capture a longer record after the step"
        )
    # interpolate the crossing of the band edge between sample `last` (outside) and `last+1` (inside)
    d0, d1 = abs(dev[last]), abs(dev[last + 1])
    frac = (d0 - band) / (d0 - d1) if d0 != d1 else 0.0
    t_enter = float(t[last] + np.clip(frac, 0.0, 1.0) * (t[last + 1] - t[last]))
    held = float(t[-1] - t_enter)
    if held < min_in_band_s:
        return None, (
            f"entered the band only {held:.4g} s before the end of the record, less than "
            f"min_in_band_s = {min_in_band_s:.4g} s; capture a longer record"
        )
    return t_enter, "entered the band and stayed in it"


def load_step_metrics(
    t_s: ArrayLike,
    vout_v: ArrayLike,
    *,
    step_time_s: float | None = None,
    iout_a: ArrayLike | None = None,
    band_v: float | None = None,
    band_rel: float | None = None,
    load_step: str | None = None,
    pre_window_s: float | None = None,
    final_window_s: float | None = None,
    min_in_band_s: float = 0.0,
    pre_guard_s: float = 0.0,
) -> TransientMetrics:
    """Measure the response of ``vout_v`` to a load step.

    Give the step edge as ``step_time_s`` or let it be found from ``iout_a``. Give the
    band half-width either absolutely (``band_v``, volts) or relative to the final
    value (``band_rel``, e.g. 0.01 for +/-1 %). ``load_step`` ("increase" / "decrease")
    selects undershoot or overshoot; by default it comes from ``iout_a`` or, failing
    that, from the sign of the largest deviation. The pre-step value is the mean over
    ``pre_window_s`` before the edge (default: everything before it); the final value
    is the mean over the last ``final_window_s`` of the record (default: last 10 % of
    the post-step part). ``pre_guard_s`` leaves the last seconds before the edge out of the
    pre-step mean: give half a switching period for a trace averaged over one period
    (:func:`switching_period_average`), whose samples that close to the edge already hold
    part of the step. Method: common practice (peak deviation from the pre-step value;
    recovery until the output enters and stays in the band).
    """
    t, v = as_series(t_s, vout_v, "vout_v", 10)
    direction_from_current: str | None = None
    if iout_a is not None:
        found_t, direction_from_current = find_step_time(t_s, iout_a)
        if step_time_s is None:
            step_time_s = found_t
    if step_time_s is None:
        raise AnalysisInputError("load_step_metrics needs the step edge: pass step_time_s or an iout_a channel")
    if not (t[0] < step_time_s < t[-1]):
        raise AnalysisInputError(
            f"step_time_s = {step_time_s!r} s lies outside the record [{t[0]!r}, {t[-1]!r}] s; "
            "capture a record that contains the step"
        )
    if (band_v is None) == (band_rel is None):
        raise AnalysisInputError("give exactly one of band_v (volts) or band_rel (fraction of the final value)")
    if load_step is not None and load_step not in (LOAD_INCREASE, LOAD_DECREASE):
        raise AnalysisInputError(f"load_step must be {LOAD_INCREASE!r} or {LOAD_DECREASE!r}, got {load_step!r}")

    if not (pre_guard_s >= 0 and np.isfinite(pre_guard_s)):
        raise AnalysisInputError(f"pre_guard_s must be zero or a positive time, got {pre_guard_s!r}")
    pre_mask = t < step_time_s - pre_guard_s
    if pre_window_s is not None:
        if pre_window_s <= 0:
            raise AnalysisInputError(f"pre_window_s must be positive, got {pre_window_s!r}")
        pre_mask &= t >= step_time_s - pre_guard_s - pre_window_s
    if np.count_nonzero(pre_mask) < 2:
        raise AnalysisInputError(
            "fewer than 2 samples before the step; move the trigger so the record starts earlier"
        )
    pre_v = float(np.mean(v[pre_mask]))

    post = t >= step_time_s
    t_post, v_post = t[post], v[post]
    if t_post.size < 5:
        raise AnalysisInputError("fewer than 5 samples after the step; capture a longer record after it")
    if final_window_s is None:
        final_window_s = 0.1 * float(t_post[-1] - step_time_s)
    if final_window_s <= 0:
        raise AnalysisInputError(f"final_window_s must be positive, got {final_window_s!r}")
    fin_mask = t_post >= t_post[-1] - final_window_s
    if np.count_nonzero(fin_mask) < 2:
        fin_mask[-2:] = True
    final_v = float(np.mean(v_post[fin_mask]))

    if band_v is not None:
        if not band_v > 0:
            raise AnalysisInputError(f"band_v must be positive volts, got {band_v!r}")
        band = float(band_v)
    else:
        assert band_rel is not None
        if not band_rel > 0:
            raise AnalysisInputError(f"band_rel must be a positive fraction, got {band_rel!r}")
        band = float(band_rel) * abs(final_v)
        if band == 0.0:
            raise AnalysisInputError("band_rel gives a zero band because the final value is 0 V; use band_v")

    dev_pre = v_post - pre_v
    direction = load_step or direction_from_current
    if direction is None:
        direction = LOAD_INCREASE if abs(dev_pre.min()) >= abs(dev_pre.max()) else LOAD_DECREASE
    k_peak = int(np.argmin(dev_pre) if direction == LOAD_INCREASE else np.argmax(dev_pre))
    peak_dev = float(dev_pre[k_peak])

    t_rec, rec_reason = _band_entry_time(t_post, dev_pre, band, min_in_band_s)
    t_set, set_reason = _band_entry_time(t_post, v_post - final_v, band, min_in_band_s)
    shift = final_v - pre_v
    if t_rec is None and abs(shift) > band:
        rec_reason += (
            f"; the static shift {shift:.4g} V is larger than the band +/-{band:.4g} V, so the output "
            "cannot return to the pre-step band - widen the band or check the load regulation"
        )
    logger.debug("load step at %g s: peak %g V, recovery %s, settling %s", step_time_s, peak_dev, t_rec, t_set)
    return TransientMetrics(
        step_time_s=float(step_time_s),
        load_step=direction,
        pre_step_v=pre_v,
        final_v=final_v,
        static_shift_v=shift,
        peak_v=float(v_post[k_peak]),
        peak_deviation_v=peak_dev,
        peak_deviation_abs_v=abs(peak_dev),
        peak_time_s=float(t_post[k_peak]),
        peak_after_step_s=float(t_post[k_peak] - step_time_s),
        band_v=band,
        recovered=t_rec is not None,
        recovery_after_step_s=None if t_rec is None else max(0.0, t_rec - float(step_time_s)),
        recovery_reason=rec_reason,
        settled=t_set is not None,
        settling_after_step_s=None if t_set is None else max(0.0, t_set - float(step_time_s)),
        settling_reason=set_reason,
    )


def switching_period_average(t_s: ArrayLike, v: ArrayLike, fsw_hz: float) -> NDArray[np.float64]:
    """Moving average of ``v`` over one switching period (uniform sampling assumed).

    A boxcar one period long has nulls at fsw and all its harmonics, so it removes the
    switching ripple and keeps the loop's response: the usual way to read a load-step
    deviation and recovery without the ripple eating the tolerance band (common
    practice). Ends are padded with the mean of the first and last period.
    """
    t, x = as_series(t_s, v, "v", 4)
    if not fsw_hz > 0:
        raise AnalysisInputError(f"fsw_hz must be positive, got {fsw_hz!r}")
    dt = float((t[-1] - t[0]) / (t.size - 1))
    n = int(round(1.0 / (fsw_hz * dt)))
    if n < 2:
        return x.copy()
    if n >= x.size:
        raise AnalysisInputError(f"the record ({t[-1] - t[0]:.3g} s) is shorter than one switching period "
                                 f"({1 / fsw_hz:.3g} s); capture a longer record")
    pad_lo, pad_hi = n // 2, n - 1 - n // 2
    # every output is the mean of one whole period: the first and last half period hold the
    # means of the first and last period (averaging pads instead would leave half a period of
    # ripple in them and bias the pre-step and final values)
    full = np.convolve(x, np.ones(n) / n, mode="valid")
    return np.concatenate([np.full(pad_lo, full[0]), full, np.full(pad_hi, full[-1])])
