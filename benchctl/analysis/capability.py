"""Unit-to-unit spread of one figure: location, dispersion, capability and performance indices.

The values are one per unit (serial) of a revision, at one operating point, in the order
the units were measured. Methods:

* **Performance** (ISO 22514-2:2017, the process performance indices; clause numbers from
  memory: clause 7 with the location and dispersion estimators of clause 6). With the
  normal distribution model the quantiles are X50% = mean and X99.865% − X0.135% = 6 s,
  so ``Pp = (U − L) / 6 s`` and ``Ppk = min(U − x̄, x̄ − L) / 3 s``, with ``s`` the total
  (overall) sample standard deviation (n − 1 in the denominator).
* **Capability** (the same clause, the process capability indices): the same formulas with
  the *within* (short-term) dispersion σ̂ in place of s. One value per unit makes subgroups
  of size 1, so σ̂ = MR̄ / d2 from the moving ranges of successive units, d2 = 2/√π = 1.128
  (the expected range of two normal values in σ; the individuals-chart estimator of
  ISO 7870-2:2013, from memory). Cp ≈ Pp says the units drift no more between serials
  than from one to the next; Cp much larger than Pp says the later units differ
  systematically from the earlier ones.
* One-sided limits give only Cpk/Ppk (of that side); Cp/Pp need both.
* **Confidence** of Pp: ``Pp √(χ²(α/2, n−1)/(n−1)) … Pp √(χ²(1−α/2, n−1)/(n−1))``
  (Montgomery, *Introduction to Statistical Quality Control*, 6th ed., section 8.3.5;
  from memory). With 3 to 5 units this interval is wide: the note says so.
* **Normality**: Shapiro–Wilk (``scipy.stats.shapiro``) from n = 3; below about 8 values
  a test only finds gross departures, and n < 3 cannot be tested at all; the note says
  which. The indices above assume a normal distribution.
* **Outliers**: Grubbs' test for one outlier, two-sided, ``G = max|xᵢ − x̄| / s`` against
  ``G_crit = (n−1)/√n · √(t² / (n − 2 + t²))``, t the upper α/(2n) quantile of Student's t
  with n − 2 degrees of freedom (NIST/SEMATECH e-Handbook of Statistical Methods, 1.3.5.17;
  the critical values of ISO 5725-2:1994, table 5). Defined from n = 3.

Undefined values are ``None`` with the reason in ``note`` (no spread, a missing limit, too
few units), never a made-up number.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike

#: d2 for subgroups of two: E|X1 − X2| / σ = 2/√π for normal values (closed form).
D2_TWO = 2.0 / math.sqrt(math.pi)

#: Below this many units a normality test only detects gross departures (common practice).
NORMALITY_MIN_N = 8

#: A capability study usually rests on at least this many values (common practice).
STUDY_MIN_N = 25


@dataclass(frozen=True)
class OutlierTest:
    """Grubbs' test on the values: ``index`` of the most extreme one, its statistic ``g``,
    the critical value ``g_critical`` at ``alpha`` and whether it is an outlier
    (``g > g_critical``). ``index``/``g``/``g_critical`` are None when n < 3 or s = 0."""

    n: int
    alpha: float
    index: int | None
    g: float | None
    g_critical: float | None
    is_outlier: bool
    note: str = ""


@dataclass(frozen=True)
class Capability:
    """Spread and indices of one figure over n units (see the module docstring).

    ``sd`` is the overall sample standard deviation s (n − 1), ``sd_within`` MR̄/d2;
    ``lsl``/``usl`` the lower/upper specification limits (None: not given); ``pp_interval``
    the 95 % confidence interval of Pp; ``normality_p`` the Shapiro–Wilk p-value (None
    below n = 3); ``note`` what a reader must know before using the numbers.
    """

    n: int
    mean: float | None
    sd: float | None
    sd_within: float | None
    minimum: float | None
    maximum: float | None
    lsl: float | None
    usl: float | None
    cp: float | None
    cpk: float | None
    pp: float | None
    ppk: float | None
    pp_interval: tuple[float, float] | None
    normality_p: float | None
    normality_note: str
    outliers: OutlierTest
    note: str = ""

    def to_dict(self) -> dict[str, object]:
        return {
            "n": self.n, "mean": self.mean, "sd": self.sd, "sd_within": self.sd_within, "min": self.minimum,
            "max": self.maximum, "lsl": self.lsl, "usl": self.usl, "cp": self.cp, "cpk": self.cpk, "pp": self.pp,
            "ppk": self.ppk, "pp_interval": list(self.pp_interval) if self.pp_interval else None,
            "normality_p": self.normality_p, "normality_note": self.normality_note,
            "outlier_index": self.outliers.index if self.outliers.is_outlier else None, "note": self.note,
        }


def grubbs_critical(n: int, alpha: float = 0.05) -> float:
    """Two-sided Grubbs critical value for n values (n >= 3), see the module docstring."""
    from scipy import stats

    if n < 3:
        raise ValueError(f"Grubbs' test needs at least 3 values, got {n}")
    t = float(stats.t.isf(alpha / (2 * n), n - 2))
    return (n - 1) / math.sqrt(n) * math.sqrt(t * t / (n - 2 + t * t))


def grubbs_test(values: ArrayLike, alpha: float = 0.05) -> OutlierTest:
    """Grubbs' test for one outlier among ``values`` (finite numbers, a sequence or an array)."""
    x = np.asarray(values, dtype=float)
    n = int(x.size)
    if n < 3:
        return OutlierTest(n, alpha, None, None, None, False, f"n = {n}: an outlier test needs at least 3 units")
    s = float(np.std(x, ddof=1))
    if s == 0.0:
        return OutlierTest(n, alpha, None, None, None, False, "every unit has the same value")
    dev = np.abs(x - x.mean())
    i = int(np.argmax(dev))
    g = float(dev[i] / s)
    crit = grubbs_critical(n, alpha)
    note = ""
    if n == 3:
        note = "with 3 units G is at most 2/√3 = 1.1547, barely above its critical value: only an extreme outlier shows"
    return OutlierTest(n, alpha, i, g, crit, g > crit, note)


def _index(width: float | None, spread: float | None) -> float | None:
    if width is None or spread is None or spread <= 0 or not math.isfinite(spread):
        return None
    return width / spread


def _k_index(mean: float, spread: float | None, lsl: float | None, usl: float | None) -> float | None:
    if spread is None or spread <= 0:
        return None
    sides = []
    if usl is not None:
        sides.append((usl - mean) / (3.0 * spread))
    if lsl is not None:
        sides.append((mean - lsl) / (3.0 * spread))
    return min(sides) if sides else None


def _normality(x: np.ndarray) -> tuple[float | None, str]:
    from scipy import stats

    n = x.size
    if n < 3:
        return None, f"n = {n}: normality cannot be tested; the indices assume a normal distribution"
    if float(np.ptp(x)) == 0.0:
        return None, "every unit has the same value: normality cannot be tested"
    p = float(stats.shapiro(x).pvalue)
    verdict = ("no evidence against normality" if p >= 0.05 else "evidence against normality (p < 0.05): "
               "the indices, which assume a normal distribution, may mislead")
    if n < NORMALITY_MIN_N:
        return p, (f"Shapiro–Wilk p = {p:.2f} with n = {n}: {verdict}; at this n the test detects only gross "
                   "departures, so normality is assumed, not shown")
    return p, f"Shapiro–Wilk p = {p:.2f}: {verdict}"


def capability(values: Sequence[float], lsl: float | None = None, usl: float | None = None, *,
               alpha: float = 0.05) -> Capability:
    """Spread, Cp/Cpk, Pp/Ppk, Pp's confidence interval, normality and outliers of ``values``
    (one per unit, in measurement order; NaN values are left out) against the limits."""
    from scipy import stats

    if lsl is not None and usl is not None and not lsl < usl:
        raise ValueError(f"the lower specification limit {lsl} must be below the upper one {usl}")
    x = np.asarray([v for v in values if v is not None and math.isfinite(v)], dtype=float)
    n = int(x.size)
    notes: list[str] = []
    if n == 0:
        return Capability(0, None, None, None, None, None, lsl, usl, None, None, None, None, None, None,
                          "no value", OutlierTest(0, alpha, None, None, None, False), "no unit has a value here")
    mean = float(x.mean())
    sd = float(np.std(x, ddof=1)) if n >= 2 else None
    sd_within = float(np.mean(np.abs(np.diff(x)))) / D2_TWO if n >= 2 else None
    width = (usl - lsl) if (lsl is not None and usl is not None) else None
    cp = _index(width, None if sd_within is None else 6.0 * sd_within)
    pp = _index(width, None if sd is None else 6.0 * sd)
    cpk = _k_index(mean, sd_within, lsl, usl)
    ppk = _k_index(mean, sd, lsl, usl)
    interval = None
    if pp is not None and n >= 2:
        lo = pp * math.sqrt(float(stats.chi2.ppf(alpha / 2, n - 1)) / (n - 1))
        hi = pp * math.sqrt(float(stats.chi2.ppf(1 - alpha / 2, n - 1)) / (n - 1))
        interval = (lo, hi)
    if n < 2:
        notes.append("one unit: no spread, so no index")
    elif sd == 0.0:
        notes.append("every unit has the same value (no spread seen): the indices are undefined")
    if lsl is None and usl is None:
        notes.append("no specification limit: no index")
    elif width is None:
        notes.append("a one-sided limit: only Cpk and Ppk")
    if 2 <= n < STUDY_MIN_N and (lsl is not None or usl is not None):
        text = f"only {n} units: the indices are rough estimates"
        if interval is not None:
            text += f" (Pp 95 % interval {interval[0]:.2g} … {interval[1]:.2g})"
        notes.append(text + f"; a capability study usually rests on {STUDY_MIN_N} or more")
    p, normality_note = _normality(x)
    return Capability(n, mean, sd, sd_within, float(x.min()), float(x.max()), lsl, usl, cp, cpk, pp, ppk, interval,
                      p, normality_note, grubbs_test(x, alpha), "; ".join(notes))


__all__ = ["D2_TWO", "Capability", "OutlierTest", "capability", "grubbs_critical", "grubbs_test"]
