"""Hold-up: from the input dropping out to the output leaving regulation, against the stored energy.

With the input disconnected, the bulk capacitance C feeds the converter at (nearly)
constant input power P, so ½·C·(V1² − V2²) = P·t (energy balance; common practice, any
power-supply design text): v² falls linearly in time.  The dropout moment is where the
line fitted to v² over the first part of the fall meets the pre-dropout level V1² (more
exact than a level crossing, which lags by C·ΔV·V/P).  Times in s, volts, watts, farads.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike

from benchctl.errors import AnalysisInputError


@dataclass(frozen=True)
class HoldUpMetrics:
    """dropout_s: the input's dropout; exit_s: the output leaves ±band_v of its level; hold_up_s =
    exit − dropout (None when the output stayed in band); v1_v: input before; v2_v: input at exit.
    at_least_s: when the output stayed in band to the end of the record, the hold-up is at least
    the record's end − dropout (a lower bound; None otherwise)."""

    dropout_s: float | None
    exit_s: float | None
    hold_up_s: float | None
    v1_v: float
    v2_v: float | None
    vout_level_v: float
    reason: str = ""
    at_least_s: float | None = None


def energy_hold_up_s(capacitance_f: float, v1_v: float, v2_v: float, power_w: float) -> float:
    """t = ½·C·(V1² − V2²)/P (energy balance, common practice), s."""
    if not (capacitance_f > 0 and power_w > 0):
        raise AnalysisInputError("energy_hold_up_s: need capacitance_f > 0 and power_w > 0")
    return 0.5 * capacitance_f * (v1_v ** 2 - v2_v ** 2) / power_w


def hold_up_metrics(t_s: ArrayLike, vin_v: ArrayLike, vout_v: ArrayLike, *, band_v: float,
                    fit_from: float = 0.97, fit_to: float = 0.85) -> HoldUpMetrics:
    """Hold-up from a record of the input and output voltages that begins before the dropout.

    The pre-dropout levels are the medians before the input first falls below ``fit_from``·V1
    (less 1 % of the record for the fall's start); the v² line is fitted between
    ``fit_from`` and ``fit_to`` of V1.
    """
    t = np.asarray(t_s, dtype=float)
    vi = np.asarray(vin_v, dtype=float)
    vo = np.asarray(vout_v, dtype=float)
    if not (t.ndim == 1 and t.shape == vi.shape == vo.shape and t.size >= 10):
        raise AnalysisInputError("hold_up_metrics: t_s, vin_v and vout_v must be 1-D, of one length (10 or more)")
    head = max(int(0.02 * t.size), 3)
    v1 = float(np.median(vi[:head]))
    below = np.flatnonzero(vi < fit_from * v1)
    if below.size == 0 or v1 <= 0:
        return HoldUpMetrics(None, None, None, v1, None, float(np.median(vo[:head])), "the input did not fall")
    k0 = int(below[0])
    pre = slice(0, max(k0 - max(int(0.01 * t.size), 1), 3))
    v1 = float(np.median(vi[pre]))
    level = float(np.median(vo[pre]))
    sel = (vi < fit_from * v1) & (vi > fit_to * v1) & (np.arange(t.size) >= k0)
    end = np.flatnonzero(vi[k0:] <= fit_to * v1)
    if end.size:
        sel &= np.arange(t.size) < k0 + int(end[0])
    if np.count_nonzero(sel) < 3:
        return HoldUpMetrics(None, None, None, v1, None, level, "too few samples on the input's fall; use more points")
    slope, icpt = np.polyfit(t[sel], vi[sel] ** 2, 1)
    dropout = float((v1 ** 2 - icpt) / slope) if slope < 0 else None
    out = np.flatnonzero((np.abs(vo - level) > band_v) & (np.arange(t.size) >= k0))
    if dropout is None:
        return HoldUpMetrics(None, None, None, v1, None, level, "the input's v² does not fall: no dropout found")
    if out.size == 0:
        at_least = float(t[-1]) - dropout
        return HoldUpMetrics(dropout, None, None, v1, None, level,
                             f"the output stayed in band to the end of the record: the hold-up is at least "
                             f"{at_least:.4g} s; record longer to measure it", at_least if at_least > 0 else None)
    k = int(out[0])
    exit_s = float(t[k])
    return HoldUpMetrics(dropout, exit_s, exit_s - dropout, v1, float(vi[k]), level)
