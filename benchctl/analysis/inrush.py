"""Inrush at switch-on: peak input current and I²t from a captured input-current record.

The I²t of the pulse, ∫ i(t)² dt (A²s, the figure fuses and breakers are rated in;
IEC 60269-1 "Joule integral", from memory), is integrated with the trapezoidal rule
from the first sample above ``start_fraction`` × peak to the first sample after the
peak below ``end_fraction`` × peak (default 10 % for both, common practice), or over
a window the caller gives.  The peak is compared with the source's current limit when
one is given.  Arrays are SI (s, A).
"""

from __future__ import annotations

import logging
from dataclasses import dataclass, field

import numpy as np
from numpy.typing import ArrayLike
from scipy.integrate import trapezoid

from benchctl.analysis.series import as_series
from benchctl.errors import AnalysisInputError

logger = logging.getLogger(__name__)


@dataclass(frozen=True)
class InrushMetrics:
    """Peak (A) and I²t (A²s) of an inrush pulse, its window (s) and the source limit (A, or None)."""

    peak_a: float
    peak_time_s: float
    i2t_a2s: float
    start_s: float
    end_s: float
    duration_s: float
    charge_c: float
    source_limit_a: float | None
    peak_to_limit: float | None
    details: dict = field(default_factory=dict)


def inrush_metrics(t_s: ArrayLike, iin_a: ArrayLike, *, source_limit_a: float | None = None,
                   start_fraction: float = 0.1, end_fraction: float = 0.1,
                   window_s: tuple[float, float] | None = None) -> InrushMetrics:
    """Inrush metrics of ``iin_a`` (module docstring).  ``charge_c`` is ∫ i dt over the window (C)."""
    t, i = as_series(t_s, iin_a, "iin_a", 4)
    if not (0.0 < start_fraction < 1.0 and 0.0 < end_fraction < 1.0):
        raise AnalysisInputError("inrush_metrics: start_fraction and end_fraction must lie in (0, 1)")
    k_peak = int(np.argmax(i))
    peak = float(i[k_peak])
    if not peak > 0.0:
        raise AnalysisInputError("inrush_metrics: the current never rises above 0 A; probe the input current")
    flags: list[str] = []
    reasons: list[str] = []
    if window_s is not None:
        a, b = float(window_s[0]), float(window_s[1])
        if not b > a:
            raise AnalysisInputError(f"inrush_metrics: window_s={window_s!r} must be (start, end) with end > start")
        k0 = int(np.searchsorted(t, a, side="left"))
        k1 = int(np.searchsorted(t, b, side="right")) - 1
    else:
        above = np.flatnonzero(i[: k_peak + 1] < start_fraction * peak)
        k0 = int(above[-1]) if above.size else 0
        below = np.flatnonzero(i[k_peak:] < end_fraction * peak)
        if below.size:
            k1 = k_peak + int(below[0])
        else:
            k1 = i.size - 1
            flags.append("lower_bound")
            reasons.append("the current had not fallen below "
                           f"{end_fraction:.0%} of its peak by the end of the record: I²t is a lower bound")
        if k0 == 0 and i[0] >= start_fraction * peak:
            flags.append("lower_bound")
            reasons.append("the record starts inside the pulse: capture more pre-trigger")
    seg_t, seg_i = t[k0:k1 + 1], i[k0:k1 + 1]
    i2t = float(trapezoid(seg_i * seg_i, seg_t))
    q = float(trapezoid(seg_i, seg_t))
    ratio = None if source_limit_a is None else peak / float(source_limit_a)
    return InrushMetrics(peak, float(t[k_peak]), i2t, float(seg_t[0]), float(seg_t[-1]),
                         float(seg_t[-1] - seg_t[0]), q, source_limit_a, ratio,
                         {"flags": flags, "flag_reasons": "; ".join(reasons)})
