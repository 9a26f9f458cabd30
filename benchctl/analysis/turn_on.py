"""Turn-on and turn-off of a converter output from a single-shot capture.

Transition metrics follow the definitions of IEEE Std 181-2011 (transitions, pulses and
related waveforms; from memory): the base and top state levels are the output before
and after the transition, the amplitude is their difference, the reference levels are
10 % and 90 % of the amplitude above the base, and the rise (fall) time is the interval
between the first crossings of the 10 % and 90 % (90 % and 10 %) reference levels.
Overshoot is the largest excursion beyond the top (IEEE 181 "overshoot", as a percentage
of the amplitude); undershoot after a turn-off is the largest excursion below the final
level (a negative output).  The turn-on delay runs from the input crossing its level
(``vin_level_v``) to the output crossing its 10 % reference level; the time to
regulation from that same input crossing until the output enters, and stays in, the band
``final ± band_v``.  Monotonic: the output never falls by more than ``dip_tol_v`` below
its running maximum between the 10 % and 90 % crossings (common practice; the tolerance
stands for the scope's noise).  Crossing times are interpolated linearly between samples.

All arrays are SI (``t_s`` seconds, volts).
"""

from __future__ import annotations

import logging
from dataclasses import dataclass, field

import numpy as np
from numpy.typing import ArrayLike, NDArray

from benchctl.analysis.series import as_series
from benchctl.errors import AnalysisInputError

logger = logging.getLogger(__name__)

#: IEEE 181-2011 default reference levels (fractions of the amplitude above the base).
LOW_REF = 0.10
HIGH_REF = 0.90


def first_crossing_s(t_s: NDArray[np.float64], v: NDArray[np.float64], level: float, *, rising: bool,
                     after_s: float | None = None) -> float | None:
    """Time of the first crossing of ``level`` (rising or falling) at or after ``after_s``, interpolated; None if none."""
    start = 0 if after_s is None else int(np.searchsorted(t_s, after_s, side="left"))
    start = max(start, 1)
    above = v >= level if rising else v <= level
    idx = np.flatnonzero(above[start:] & ~above[start - 1:-1]) + start
    if idx.size == 0:
        if start - 1 < v.size and above[start - 1] and (after_s is None or t_s[start - 1] >= after_s):
            return float(t_s[start - 1])
        return None
    k = int(idx[0])
    a, b = v[k - 1], v[k]
    frac = (level - a) / (b - a) if b != a else 0.0
    return float(t_s[k - 1] + frac * (t_s[k] - t_s[k - 1]))


def _entered_band_s(t_s: NDArray[np.float64], v: NDArray[np.float64], centre: float, band: float,
                    after_s: float) -> float | None:
    """Time from which ``v`` stays within ``centre ± band`` to the end of the record (after ``after_s``)."""
    outside = np.flatnonzero((np.abs(v - centre) > band) & (t_s >= after_s))
    if outside.size == 0:
        return float(after_s)
    k = int(outside[-1])
    if k + 1 >= v.size:
        return None
    a, b = abs(v[k] - centre), abs(v[k + 1] - centre)
    frac = (a - band) / (a - b) if a != b else 1.0
    return float(t_s[k] + frac * (t_s[k + 1] - t_s[k]))


@dataclass(frozen=True)
class TurnOnMetrics:
    """A turn-on of the output (s, V, %).

    ``delay_s`` / ``time_to_regulation_s`` are None when the input edge was not given or
    not found (the reason says so) or the output never reached the band.  ``details``
    carries ``flags`` (see the project's result-quality flags) and ``flag_reasons``.
    """

    base_v: float
    top_v: float
    amplitude_v: float
    t_input_s: float | None
    t_low_s: float | None
    t_high_s: float | None
    delay_s: float | None
    rise_time_s: float | None
    overshoot_v: float
    overshoot_pct: float
    monotonic: bool
    largest_dip_v: float
    band_v: float
    time_to_regulation_s: float | None
    reason: str
    details: dict = field(default_factory=dict)


@dataclass(frozen=True)
class TurnOffMetrics:
    """A turn-off of the output (s, V).  ``undershoot_v`` ≥ 0 is the largest excursion below the final level."""

    base_v: float
    final_v: float
    t_input_s: float | None
    t_high_s: float | None
    t_low_s: float | None
    delay_s: float | None
    fall_time_s: float | None
    undershoot_v: float
    minimum_v: float
    reason: str
    details: dict = field(default_factory=dict)


def _levels(t: NDArray[np.float64], v: NDArray[np.float64], before_s: float | None, tail_fraction: float,
            ) -> tuple[float, float]:
    pre = v[t < before_s] if before_s is not None else v[: max(v.size // 20, 1)]
    if pre.size == 0:
        pre = v[:1]
    n_tail = max(int(v.size * tail_fraction), 1)
    return float(np.median(pre)), float(np.median(v[-n_tail:]))


def turn_on_metrics(t_s: ArrayLike, vout_v: ArrayLike, *, t_input_s: float | None = None,
                    final_v: float | None = None, band_v: float | None = None, dip_tol_v: float | None = None,
                    base_before_s: float | None = None, tail_fraction: float = 0.05) -> TurnOnMetrics:
    """Turn-on metrics of ``vout_v`` (module docstring).

    ``t_input_s``: when the input reached its level (see :func:`input_edge_s`), None if
    unknown.  ``final_v``: the top state level (default: median of the last
    ``tail_fraction`` of the record).  ``band_v``: half-width of the regulation band
    (default 1 % of the amplitude).  ``dip_tol_v``: monotonicity tolerance (default 2.5·sqrt(2·ln N)
    × the standard deviation of the base samples, N the samples above the 10 % level — what
    noise alone produces, with margin — at least 0.2 % of the amplitude).
    ``base_before_s``: the base level is the median before this time (default: the first
    5 % of the record).
    """
    t, v = as_series(t_s, vout_v, "vout_v", 8)
    base, top = _levels(t, v, base_before_s if base_before_s is not None else t_input_s, tail_fraction)
    if final_v is not None:
        top = float(final_v)
    amp = top - base
    if not amp > 0:
        raise AnalysisInputError(
            f"turn_on_metrics: the output does not rise (base {base:.4g} V, final {top:.4g} V); capture the "
            "turn-on with the output starting low, or give final_v")
    band = 0.01 * amp if band_v is None else float(band_v)
    pre = v[t < (base_before_s if base_before_s is not None else (t_input_s if t_input_s is not None else t[v.size // 20]))]
    noise = float(np.std(pre)) if pre.size > 2 else 0.0
    # noise alone makes the running maximum exceed a later sample by up to ~2·sqrt(2·ln N)·σ
    # (the expected extreme of N Gaussian samples, common practice); 25 % margin on top
    n_rise = max(int(np.count_nonzero(v > base + LOW_REF * amp)), 2)
    tol = (max(2.5 * np.sqrt(2.0 * np.log(n_rise)) * noise, 0.002 * amp) if dip_tol_v is None
           else float(dip_tol_v))
    after = t_input_s
    t_low = first_crossing_s(t, v, base + LOW_REF * amp, rising=True, after_s=after)
    t_high = first_crossing_s(t, v, base + HIGH_REF * amp, rising=True, after_s=t_low) if t_low is not None else None
    reasons: list[str] = []
    flags: list[str] = []
    rise = None if t_low is None or t_high is None else t_high - t_low
    if rise is None:
        reasons.append("the output did not cross both reference levels within the record")
        flags.append("not_exist")
    dip = 0.0
    if t_low is not None:
        end = t_high if t_high is not None else t[-1]
        sel = (t >= t_low) & (t <= end)
        if np.any(sel):
            seg = v[sel]
            dip = float(np.max(np.maximum.accumulate(seg) - seg))
    peak = float(np.max(v[t >= t_low])) if t_low is not None else float(np.max(v))
    over = max(peak - top, 0.0)
    delay = None if (t_input_s is None or t_low is None) else t_low - t_input_s
    if t_input_s is None:
        reasons.append("no input edge given: delay and time to regulation are not measured")
    reg = None
    if t_input_s is not None and t_low is not None:
        entered = _entered_band_s(t, v, top, band, t_low)
        reg = None if entered is None else entered - t_input_s
        if entered is None:
            reasons.append(f"the output was not within ±{band:.3g} V of {top:.4g} V at the end of the record")
            flags.append("lower_bound")
    return TurnOnMetrics(base, top, amp, t_input_s, t_low, t_high, delay, rise, over, 100.0 * over / amp,
                         dip <= tol, dip, band, reg, "; ".join(reasons),
                         {"flags": flags, "flag_reasons": "; ".join(reasons), "dip_tol_v": tol})


def input_edge_s(t_s: ArrayLike, vin_v: ArrayLike, level_v: float, *, rising: bool = True) -> float | None:
    """When the input first crosses ``level_v`` (V) in the given direction; None if it never does."""
    t, v = as_series(t_s, vin_v, "vin_v", 2)
    return first_crossing_s(t, v, float(level_v), rising=rising)


def turn_off_metrics(t_s: ArrayLike, vout_v: ArrayLike, *, t_input_s: float | None = None,
                     final_v: float | None = None, base_before_s: float | None = None,
                     tail_fraction: float = 0.05) -> TurnOffMetrics:
    """Turn-off metrics of ``vout_v``: delay from the input edge to the 90 % crossing, fall
    time 90 %→10 % (IEEE 181-2011 reference levels, from memory) and the undershoot below
    the final level (default: median of the record's tail; pass 0 for a discharged output)."""
    t, v = as_series(t_s, vout_v, "vout_v", 8)
    base, tail = _levels(t, v, base_before_s if base_before_s is not None else t_input_s, tail_fraction)
    final = tail if final_v is None else float(final_v)
    amp = base - final
    if not amp > 0:
        raise AnalysisInputError(
            f"turn_off_metrics: the output does not fall (before {base:.4g} V, final {final:.4g} V); capture the "
            "turn-off with the output starting high, or give final_v")
    t_high = first_crossing_s(t, v, final + HIGH_REF * amp, rising=False, after_s=t_input_s)
    t_low = first_crossing_s(t, v, final + LOW_REF * amp, rising=False, after_s=t_high) if t_high is not None else None
    reasons = []
    flags: list[str] = []
    fall = None if t_high is None or t_low is None else t_low - t_high
    if fall is None:
        reasons.append("the output did not fall through both reference levels within the record")
        flags.append("not_exist")
    after = t >= (t_high if t_high is not None else t[0])
    vmin = float(np.min(v[after]))
    under = max(final - vmin, 0.0)
    delay = None if t_input_s is None or t_high is None else t_high - t_input_s
    return TurnOffMetrics(base, final, t_input_s, t_high, t_low, delay, fall, under, vmin, "; ".join(reasons),
                          {"flags": flags, "flag_reasons": "; ".join(reasons)})
