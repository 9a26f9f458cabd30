"""The uncertainty of measured stability margins, from the scatter of the trace itself.

A frequency-response analyzer's reading at each frequency carries noise that grows as the
bandwidth widens and the signal shrinks (a gain margin is read where |T| is small). The
margins of :mod:`benchctl.analysis.margins` interpolate between two samples; how far they may
be off follows from how much neighbouring samples scatter about a smooth curve:

* Around a crossing, samples within ``half_width_decades`` (at least ``min_per_side`` on each
  side) are fitted with a quadratic in log-frequency; the residual standard deviation s
  (n − 3 degrees of freedom) is the scatter of one sample (a type A evaluation, JCGM 100:2008
  4.2) and the fit's first coefficient the local slope.
* The value at the crossing is the linear interpolation (1 − a)·y₀ + a·y₁ of two samples:
  u = s·√((1 − a)² + a²) (GUM 5.1.2, independent samples).
* A gain crossover x_c (|T| = 1) moves by −δG/S_G when the gain reads δG high, so the phase
  margin PM = 180° + φ(x_c) has u(PM)² = u_φ² + (S_φ/S_G)²·u_G²; a phase crossover moves by
  −δφ/S_φ, so GM = −G(x_p) has u(GM)² = u_G² + (S_G/S_φ)²·u_φ² (GUM 5.1.2; the gain and
  phase errors of circular complex noise are independent). The crossover frequency has
  u(log₁₀ f_c) = u_G/|S_G| decades.
* The expanded uncertainty uses k = t₉₇.₅(ν_eff), ν_eff by Welch–Satterthwaite
  (GUM G.4.1, G.3): few samples near a crossing give a wide interval.

The residual of a quadratic also holds any curvature the quadratic does not follow, so u
errs on the large side where the response bends sharply within the window.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike, NDArray

from benchctl.analysis.frequency_response import check_response, unwrapped_phase_deg

#: Half-width of the window fitted around a crossing, decades, and the fewest samples per side.
HALF_WIDTH_DECADES = 0.15
MIN_PER_SIDE = 3
#: The confidence level of the expanded uncertainty (two-sided), as k = 2 for a normal law.
LEVEL = 0.9545


@dataclass(frozen=True)
class LocalScatter:
    """One trace (gain in dB or phase in degrees) near log-frequency ``x_c``."""

    sd: float            # scatter of one sample about the local quadratic
    slope: float         # dy/d(log10 f) at x_c, per decade
    dof: int             # n − 3
    interp_factor: float  # √((1 − a)² + a²) of the two samples interpolated

    @property
    def u(self) -> float:
        """Standard uncertainty of the interpolated value at x_c."""
        return self.sd * self.interp_factor


@dataclass(frozen=True)
class Uncertainty:
    """A standard uncertainty ``u`` with its effective degrees of freedom and coverage factor."""

    u: float
    dof: float
    k: float

    @property
    def expanded(self) -> float:
        return self.k * self.u


@dataclass(frozen=True)
class MarginUncertainty:
    """Uncertainties of the worst margins of :class:`~benchctl.analysis.margins.LoopMargins`
    (None where the margin was not found or too few samples lie near it)."""

    phase_margin_deg: Uncertainty | None
    crossover_hz: Uncertainty | None
    gain_margin_db: Uncertainty | None
    notes: tuple[str, ...] = ()


def local_scatter(x: NDArray[np.float64], y: NDArray[np.float64], x_c: float, *,
                  half_width_decades: float = HALF_WIDTH_DECADES, min_per_side: int = MIN_PER_SIDE
                  ) -> LocalScatter | None:
    """Scatter and slope of ``y`` (sampled at increasing ``x`` = log10 f) near ``x_c``; None when
    fewer than ``min_per_side`` samples lie on either side of it."""
    below, above = np.flatnonzero(x <= x_c), np.flatnonzero(x > x_c)
    if below.size < min_per_side or above.size < min_per_side:
        return None
    near = np.abs(x - x_c) <= half_width_decades
    pick = np.union1d(np.flatnonzero(near), np.concatenate([below[-min_per_side:], above[:min_per_side]]))
    dx, yy = x[pick] - x_c, y[pick]
    coef, residuals, *_ = np.polyfit(dx, yy, 2, full=True)
    dof = int(pick.size - 3)
    ssr = float(residuals[0]) if residuals.size else float(np.sum((np.polyval(coef, dx) - yy) ** 2))
    sd = math.sqrt(max(ssr, 0.0) / dof) if dof > 0 else math.nan
    i = int(below[-1])
    a = (x_c - x[i]) / (x[i + 1] - x[i])
    return LocalScatter(sd, float(coef[1]), dof, math.sqrt((1.0 - a) ** 2 + a ** 2))


def _combine(terms: list[tuple[float, int]]) -> Uncertainty:
    """√Σu_i² with ν_eff = u⁴/Σ(u_i⁴/ν_i) (GUM G.4.1) and k = t at :data:`LEVEL` (GUM G.3.4)."""
    from scipy.stats import t as student_t

    u = math.sqrt(sum(ui * ui for ui, _ in terms))
    denom = sum(ui ** 4 / nu for ui, nu in terms if nu > 0 and ui > 0)
    dof = (u ** 4 / denom) if denom > 0 else math.inf
    k = float(student_t.ppf(0.5 + LEVEL / 2.0, dof)) if math.isfinite(dof) else 2.0
    return Uncertainty(u, dof, k)


def margin_uncertainty(freq_hz: ArrayLike, response: ArrayLike, margins: object, *,
                       half_width_decades: float = HALF_WIDTH_DECADES) -> MarginUncertainty:
    """Uncertainties of ``margins`` (the :class:`~benchctl.analysis.margins.LoopMargins` of this
    trace; ``response`` is T in the same convention the margins were taken in, i.e. already
    negated for ``"inverted"`` data). See the module docstring for the method."""
    from benchctl.analysis.margins import NotFound

    f, t = check_response(freq_hz, response, min_points=2 * MIN_PER_SIDE, where="margin_uncertainty")
    x = np.log10(f)
    gain_db = 20.0 * np.log10(np.abs(t))
    phase = unwrapped_phase_deg(t)
    notes: list[str] = []

    def near(freq: float, crossing: str) -> tuple[LocalScatter, LocalScatter] | None:
        g, p = (local_scatter(x, y, math.log10(freq), half_width_decades=half_width_decades) for y in (gain_db, phase))
        if g is None or p is None or not g.slope or not p.slope:
            notes.append(f"too few samples either side of the {crossing} at {freq:g} Hz to estimate its margin's "
                         "uncertainty")
            return None
        return g, p

    pm = fc = gm = None
    wpm, wgm = getattr(margins, "worst_phase_margin"), getattr(margins, "worst_gain_margin")
    at_gain = None if isinstance(wpm, NotFound) else near(wpm.freq_hz, "gain crossover")
    if at_gain is not None:
        g, p = at_gain
        pm = _combine([(p.u, p.dof), (abs(p.slope / g.slope) * g.u, g.dof)])
        u_dec = g.u / abs(g.slope)
        base = _combine([(u_dec, g.dof)])
        fc = Uncertainty(wpm.freq_hz * math.log(10.0) * u_dec, base.dof, base.k)
    at_phase = None if isinstance(wgm, NotFound) else near(wgm.freq_hz, "phase crossover")
    if at_phase is not None:
        g, p = at_phase
        gm = _combine([(g.u, g.dof), (abs(g.slope / p.slope) * p.u, p.dof)])
    return MarginUncertainty(pm, fc, gm, tuple(notes))


__all__ = ["HALF_WIDTH_DECADES", "LEVEL", "MIN_PER_SIDE", "LocalScatter", "MarginUncertainty", "Uncertainty",
           "local_scatter", "margin_uncertainty"]
