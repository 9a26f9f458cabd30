"""Protection figures from records: the current into a short, hiccup period and duty, recovery, OVP peak.

A hiccup is a rectangle wave of the current into the overload: on while the converter
switches, off between.  Its edges are where the current crosses half its on level; the
period is the mean spacing of rising edges, the duty the mean on-time over it (IEEE
181-2011 mid-reference level, from memory); the average current is the record's mean over
whole periods.  Recovery: from the moment the overload is removed to the output's return
into ±band of its regulated level.  A, s, V.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike

from benchctl.errors import AnalysisInputError


@dataclass(frozen=True)
class HiccupMetrics:
    """Peak and mean current (A), period (s) and duty; None where fewer than two cycles were seen."""

    peak_a: float
    average_a: float | None
    period_s: float | None
    duty: float | None
    on_level_a: float
    cycles: int
    reason: str = ""


def _edges(x: np.ndarray, level: float) -> tuple[np.ndarray, np.ndarray]:
    above = x > level
    change = np.flatnonzero(above[1:] != above[:-1]) + 1
    return change[above[change]], change[~above[change]]


def hiccup_metrics(t_s: ArrayLike, current_a: ArrayLike, *, skip_s: float = 0.0) -> HiccupMetrics:
    """Hiccup figures of a current record; ``skip_s`` leaves out its beginning (the first discharge)."""
    t = np.asarray(t_s, dtype=float)
    i = np.asarray(current_a, dtype=float)
    if not (t.ndim == 1 and t.shape == i.shape and t.size >= 10):
        raise AnalysisInputError("hiccup_metrics: t_s and current_a must be 1-D, of one length (10 or more)")
    peak = float(np.max(i))
    keep = t >= t[0] + skip_s
    tk, ik = t[keep], i[keep]
    on_level = float(np.percentile(ik, 99)) if ik.size else 0.0
    rises, falls = _edges(ik, 0.5 * on_level) if on_level > 0 else (np.array([], int), np.array([], int))
    if rises.size < 2:
        return HiccupMetrics(peak, None, None, None, on_level, int(rises.size),
                             "fewer than two hiccup cycles in the record; lengthen it")
    t_r = tk[rises]
    period = float(np.mean(np.diff(t_r)))
    ons = []
    for a in rises[:-1]:
        after = falls[falls > a]
        if after.size:
            ons.append(tk[after[0]] - tk[a])
    duty = float(np.mean(ons)) / period if ons else None
    window = (tk >= t_r[0]) & (tk < t_r[-1])
    average = float(np.mean(ik[window]))
    return HiccupMetrics(peak, average, period, duty, on_level, int(rises.size - 1))


def recovery_s(t_s: ArrayLike, vout_v: ArrayLike, *, t_release_s: float, level_v: float, band_v: float) -> float | None:
    """Seconds from ``t_release_s`` until the output enters ±``band_v`` of ``level_v`` for good; None if not."""
    t = np.asarray(t_s, dtype=float)
    v = np.asarray(vout_v, dtype=float)
    outside = np.flatnonzero((np.abs(v - level_v) > band_v) & (t >= t_release_s))
    if outside.size == 0:
        return 0.0
    k = int(outside[-1])
    if k + 1 >= t.size:
        return None
    return float(t[k + 1] - t_release_s)


def ovp_peak(t_s: ArrayLike, vout_v: ArrayLike) -> tuple[float, float]:
    """(peak output voltage V, its time s) of a record."""
    t = np.asarray(t_s, dtype=float)
    v = np.asarray(vout_v, dtype=float)
    if t.size == 0 or t.shape != v.shape:
        raise AnalysisInputError("ovp_peak: t_s and vout_v must be of one non-zero length")
    k = int(np.argmax(v))
    return float(v[k]), float(t[k])
