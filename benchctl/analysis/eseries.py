"""Preferred-number series for resistors and capacitors (IEC 60063).

The tables are written out as IEC 60063 lists them (from memory), one decade
[1, 10) each. E6, E12 and E24 are *not* the rounded geometric series 10**(i/n):
several E24 values (2.7, 3.0, 3.3, 3.6, 3.9, 4.3, 4.7, 8.2) differ from a plain
two-digit rounding. E48 and E96 are the three-digit rounding of 10**(i/n).

``nearest_preferred`` rounds any positive value, in any decade, to the series
member nearest in *logarithmic* distance (the ratio error, which is what a
tolerance band is about), so 9.6 rounds up to 10 rather than down to 9.1 in E24.
"""

from __future__ import annotations

import math

from benchctl.errors import AnalysisInputError

__all__ = ["SERIES", "series_values", "nearest_preferred"]

_E6 = (1.0, 1.5, 2.2, 3.3, 4.7, 6.8)

_E12 = (1.0, 1.2, 1.5, 1.8, 2.2, 2.7, 3.3, 3.9, 4.7, 5.6, 6.8, 8.2)

_E24 = (
    1.0, 1.1, 1.2, 1.3, 1.5, 1.6, 1.8, 2.0, 2.2, 2.4, 2.7, 3.0,
    3.3, 3.6, 3.9, 4.3, 4.7, 5.1, 5.6, 6.2, 6.8, 7.5, 8.2, 9.1,
)

_E48 = (
    1.00, 1.05, 1.10, 1.15, 1.21, 1.27, 1.33, 1.40, 1.47, 1.54, 1.62, 1.69,
    1.78, 1.87, 1.96, 2.05, 2.15, 2.26, 2.37, 2.49, 2.61, 2.74, 2.87, 3.01,
    3.16, 3.32, 3.48, 3.65, 3.83, 4.02, 4.22, 4.42, 4.64, 4.87, 5.11, 5.36,
    5.62, 5.90, 6.19, 6.49, 6.81, 7.15, 7.50, 7.87, 8.25, 8.66, 9.09, 9.53,
)

_E96 = (
    1.00, 1.02, 1.05, 1.07, 1.10, 1.13, 1.15, 1.18, 1.21, 1.24, 1.27, 1.30,
    1.33, 1.37, 1.40, 1.43, 1.47, 1.50, 1.54, 1.58, 1.62, 1.65, 1.69, 1.74,
    1.78, 1.82, 1.87, 1.91, 1.96, 2.00, 2.05, 2.10, 2.15, 2.21, 2.26, 2.32,
    2.37, 2.43, 2.49, 2.55, 2.61, 2.67, 2.74, 2.80, 2.87, 2.94, 3.01, 3.09,
    3.16, 3.24, 3.32, 3.40, 3.48, 3.57, 3.65, 3.74, 3.83, 3.92, 4.02, 4.12,
    4.22, 4.32, 4.42, 4.53, 4.64, 4.75, 4.87, 4.99, 5.11, 5.23, 5.36, 5.49,
    5.62, 5.76, 5.90, 6.04, 6.19, 6.34, 6.49, 6.65, 6.81, 6.98, 7.15, 7.32,
    7.50, 7.68, 7.87, 8.06, 8.25, 8.45, 8.66, 8.87, 9.09, 9.31, 9.53, 9.76,
)

#: Mantissas in [1, 10) of each series, ascending.
SERIES: dict[str, tuple[float, ...]] = {
    "E6": _E6,
    "E12": _E12,
    "E24": _E24,
    "E48": _E48,
    "E96": _E96,
}

# Significant digits of each series, used to strip float noise from the result.
_DIGITS = {"E6": 2, "E12": 2, "E24": 2, "E48": 3, "E96": 3}


def series_values(series: str) -> tuple[float, ...]:
    """Return the mantissas in [1, 10) of ``series`` ("E6", "E12", "E24", "E48", "E96")."""
    key = series.strip().upper()
    if key not in SERIES:
        raise AnalysisInputError(
            f"unknown preferred-number series {series!r}: use one of {', '.join(SERIES)}"
        )
    return SERIES[key]


def nearest_preferred(value: float, series: str = "E24") -> float:
    """Round ``value`` (any unit, > 0) to the nearest member of an IEC 60063 series.

    Distance is measured as |log10(candidate / value)|, across decade boundaries
    (candidates are this decade's values, the next decade's first value and the
    previous decade's last value). On an exact tie in log distance the larger
    value wins. Returns the value in the same unit as the input.
    """
    mantissas = series_values(series)
    key = series.strip().upper()
    if not isinstance(value, (int, float)) or not math.isfinite(value) or value <= 0.0:
        raise AnalysisInputError(
            f"nearest_preferred needs a finite value > 0, got {value!r}: "
            "pass the component value in ohms or farads"
        )
    exponent = math.floor(math.log10(value))
    candidates: list[tuple[float, int]] = [(m, exponent) for m in mantissas]
    candidates.append((mantissas[0], exponent + 1))
    candidates.append((mantissas[-1], exponent - 1))
    best_value = 0.0
    best_distance = math.inf
    for mantissa, exp in candidates:
        candidate = _compose(mantissa, exp, _DIGITS[key])
        distance = abs(math.log10(candidate / value))
        if distance < best_distance - 1e-12 or (
            abs(distance - best_distance) <= 1e-12 and candidate > best_value
        ):
            best_value = candidate
            best_distance = distance
    return best_value


def _compose(mantissa: float, exponent: int, digits: int) -> float:
    """mantissa * 10**exponent without binary noise (e.g. 4.7e-9, not 4.700000000000001e-09)."""
    return float(f"{mantissa * 10.0**exponent:.{digits - 1}e}")
