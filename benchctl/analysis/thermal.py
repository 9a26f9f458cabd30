"""Temperature analysis: first-order warm-up fits, temperature rise, and derating by interpolation.

* :func:`first_order_response` and :func:`fit_first_order`: a part on a board warming after a
  loss step follows T(t) = T∞ + (T0 − T∞)·e^(−t/τ) (a first-order thermal network, C·dT/dt =
  P − (T − T_amb)/R; common practice); the fit gives T∞ before the part gets there, and τ.
* :func:`temperature_rise`: ΔT = T_part − T_ambient, the figure a part's rating is given for.
* :func:`derated_load`: at one ambient, the highest load whose hot spot stays under a limit,
  by linear interpolation of the hot-spot temperature against load between the two measured
  loads that bracket the limit (common practice); flagged when no bracket exists.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike, NDArray
from scipy.optimize import curve_fit

from benchctl.errors import AnalysisInputError


def first_order_response(t_s: ArrayLike, t0_c: float, t_final_c: float, tau_s: float) -> NDArray[np.float64]:
    """T(t) = T∞ + (T0 − T∞)·e^(−t/τ), °C, for t ≥ 0 from the loss step."""
    t = np.asarray(t_s, dtype=float)
    return t_final_c + (t0_c - t_final_c) * np.exp(-t / tau_s)


@dataclass(frozen=True)
class FirstOrderFit:
    """T0, T∞ (°C) and τ (s) with their standard errors; ``rms_residual_c`` of the fit."""

    t0_c: float
    t_final_c: float
    tau_s: float
    u_t_final_c: float
    u_tau_s: float
    rms_residual_c: float


def fit_first_order(t_s: ArrayLike, temp_c: ArrayLike) -> FirstOrderFit:
    """Least-squares fit of :func:`first_order_response` to a warm-up record (t from the step)."""
    t = np.asarray(t_s, dtype=float)
    y = np.asarray(temp_c, dtype=float)
    if t.shape != y.shape or t.size < 4:
        raise AnalysisInputError(f"fit_first_order: give equal-length time and temperature arrays of 4 or more "
                                 f"points (got {t.size} and {y.size})")
    if not (np.all(np.isfinite(t)) and np.all(np.isfinite(y))):
        raise AnalysisInputError("fit_first_order: the record holds non-finite values")
    span = float(t.max() - t.min())
    if not span > 0.0:
        raise AnalysisInputError("fit_first_order: the times span nothing")
    guess = (float(y[0]), float(y[-1]), span / 3.0)
    try:
        popt, pcov = curve_fit(first_order_response, t, y, p0=guess, maxfev=20000)
    except RuntimeError as exc:
        raise AnalysisInputError(f"fit_first_order: the fit did not converge ({exc}); the record may not "
                                 "be a first-order approach") from None
    resid = y - first_order_response(t, *popt)
    err = np.sqrt(np.clip(np.diag(pcov), 0.0, None)) if np.all(np.isfinite(pcov)) else np.full(3, math.nan)
    return FirstOrderFit(float(popt[0]), float(popt[1]), float(popt[2]), float(err[1]), float(err[2]),
                         float(np.sqrt(np.mean(resid * resid))))


def temperature_rise(temp_c: ArrayLike, ambient_c: ArrayLike) -> NDArray[np.float64]:
    """ΔT = T − T_ambient, K."""
    return np.asarray(temp_c, dtype=float) - np.asarray(ambient_c, dtype=float)


@dataclass(frozen=True)
class Derating:
    """The highest load (A) at one ambient (°C) keeping a hot spot under ``limit_c``.

    found: a bracket of measured loads straddles the limit (``load_a`` interpolated).
    ``flag``: "" when found; "not_reached" (every measured load stays under the limit:
    ``load_a`` is the highest measured load, a lower bound); "exceeded_everywhere" (even the
    lowest load is over: ``load_a`` is None).
    """

    ambient_c: float
    limit_c: float
    load_a: float | None
    found: bool
    flag: str
    reason: str
    #: When found: the indices (into the arrays given) of the two points that bracket the limit.
    bracket: tuple[int, int] | None = None


def derated_load(load_a: ArrayLike, hot_spot_c: ArrayLike, limit_c: float, *, ambient_c: float = math.nan) -> Derating:
    """Highest load whose hot spot stays at or under ``limit_c`` (module docstring).

    The loads are sorted; the first measured load whose hot spot exceeds the limit and the one
    before it bracket the crossing, found by linear interpolation
    I* = I₁ + (limit − T₁)·(I₂ − I₁)/(T₂ − T₁).
    """
    i = np.asarray(load_a, dtype=float)
    temp = np.asarray(hot_spot_c, dtype=float)
    if i.shape != temp.shape or i.size < 1:
        raise AnalysisInputError("derated_load: give equal-length load and temperature arrays")
    keep = np.isfinite(i) & np.isfinite(temp)
    given = np.flatnonzero(keep)
    i, temp = i[keep], temp[keep]
    if i.size == 0:
        raise AnalysisInputError("derated_load: no finite (load, temperature) pair")
    order = np.argsort(i, kind="stable")
    i, temp, given = i[order], temp[order], given[order]
    over = np.flatnonzero(temp > limit_c)
    if over.size == 0:
        return Derating(ambient_c, limit_c, float(i[-1]), False, "not_reached",
                        f"every measured load up to {i[-1]:g} A stays under {limit_c:g} °C; the derated load is "
                        "at least that (measure heavier loads to find it)")
    k = int(over[0])
    if k == 0:
        return Derating(ambient_c, limit_c, None, False, "exceeded_everywhere",
                        f"the lowest measured load {i[0]:g} A already exceeds {limit_c:g} °C ({temp[0]:.4g} °C)")
    i1, i2, t1, t2 = float(i[k - 1]), float(i[k]), float(temp[k - 1]), float(temp[k])
    load = i1 + (limit_c - t1) * (i2 - i1) / (t2 - t1)
    return Derating(ambient_c, limit_c, float(load), True, "",
                    f"interpolated between {i1:g} A ({t1:.4g} °C) and {i2:g} A ({t2:.4g} °C)",
                    (int(given[k - 1]), int(given[k])))
