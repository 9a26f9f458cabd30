"""Exact crossover frequency, phase margin and gain margin of a loop transfer function.

Definitions (Erickson & Maksimović, *Fundamentals of Power Electronics*, 2nd ed., ch. 9):
crossover where |T(j2πfc)| = 1, PM = 180° + ∠T(fc); GM = −20·log10|T(f180)| where
∠T = −180° (T real and negative).  Crossings are bracketed on a dense log grid of the
exact response and refined with scipy.optimize.brentq (on |T| − 1 and on Im T).
When several crossings exist the one closest to instability is reported (smallest
|PM|, smallest |GM| in dB) — the same selection rule as python-control's
``stability_margins``.  A crossing that does not exist is reported as ``None`` with
the reason in the matching ``*_reason`` field.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy.optimize import brentq

from .small_signal import RationalTF


@dataclass(frozen=True)
class LoopTruth:
    """Exact loop margins.  ``None`` means "does not exist"; the reason says why."""

    crossover_hz: float | None
    phase_margin_deg: float | None
    phase_crossover_hz: float | None
    gain_margin_db: float | None
    crossover_reason: str
    gain_margin_reason: str
    f_min_hz: float
    f_max_hz: float


def _wrap180(deg: float) -> float:
    return (deg + 180.0) % 360.0 - 180.0


def loop_margins(loop: RationalTF, f_min_hz: float = 1e-3, f_max_hz: float = 1e8,
                 points_per_decade: int = 200) -> LoopTruth:
    """Margins of ``loop`` searched on [f_min_hz, f_max_hz] (Hz)."""
    if not 0.0 < f_min_hz < f_max_hz:
        raise ValueError(f"loop_margins: need 0 < f_min_hz < f_max_hz, got {f_min_hz!r}, {f_max_hz!r}")
    decades = math.log10(f_max_hz / f_min_hz)
    f = np.logspace(math.log10(f_min_hz), math.log10(f_max_hz), max(int(decades * points_per_decade), 16))
    h = loop.response(f)

    def mag_minus_one(x: float) -> float:
        return float(abs(loop.response(x)) - 1.0)

    def imag_part(x: float) -> float:
        return float(np.imag(loop.response(x)))

    m = np.abs(h) - 1.0
    idx = np.nonzero(np.signbit(m[:-1]) != np.signbit(m[1:]))[0]
    crossings = [brentq(mag_minus_one, f[i], f[i + 1], xtol=1e-12 * f[i], rtol=1e-14) for i in idx]
    band = f"{f_min_hz:g}–{f_max_hz:g} Hz"
    if crossings:
        pms = [_wrap180(math.degrees(float(np.angle(loop.response(fc)))) + 180.0) for fc in crossings]
        k = int(np.argmin(np.abs(pms)))
        fc, pm, c_reason = float(crossings[k]), float(pms[k]), ""
    else:
        above = bool(m[0] > 0.0)
        fc = pm = None
        c_reason = f"|T| stays {'above' if above else 'below'} 1 (0 dB) over {band}"

    im = np.imag(h)
    idx = np.nonzero(np.signbit(im[:-1]) != np.signbit(im[1:]))[0]
    phase_x = []
    for i in idx:
        x = brentq(imag_part, f[i], f[i + 1], xtol=1e-12 * f[i], rtol=1e-14)
        if np.real(loop.response(x)) < 0.0:
            phase_x.append(x)
    if phase_x:
        gms = [-20.0 * math.log10(abs(loop.response(x))) for x in phase_x]
        k = int(np.argmin(np.abs(gms)))
        f180, gm, g_reason = float(phase_x[k]), float(gms[k]), ""
    else:
        f180 = gm = None
        g_reason = f"the phase never reaches −180° over {band}"
    return LoopTruth(fc, pm, f180, gm, c_reason, g_reason, f_min_hz, f_max_hz)
