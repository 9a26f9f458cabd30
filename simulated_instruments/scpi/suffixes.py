"""Suffix multipliers and units of numeric program data.

IEEE 488.2-1992 §7.7.3 and Table 7-1 (from memory): a suffix is an optional
multiplier followed by the unit, case-insensitive. Multipliers: EX 1e18, PE 1e15,
T 1e12, G 1e9, MA 1e6, K 1e3, M 1e-3, U 1e-6, N 1e-9, P 1e-12, F 1e-15, A 1e-18.
``M`` is milli, so ``100 MA`` on an ampere parameter is 100 mA (M + A) and
``1 MAV`` is a megavolt; the two exceptions are ``MHZ`` (megahertz) and ``MOHM``
(megaohm), where ``M`` means mega.
"""

from __future__ import annotations

MULTIPLIERS: dict[str, float] = {
    "EX": 1e18, "PE": 1e15, "T": 1e12, "G": 1e9, "MA": 1e6, "K": 1e3,
    "M": 1e-3, "U": 1e-6, "N": 1e-9, "P": 1e-12, "F": 1e-15, "A": 1e-18,
}

_MEGA_EXCEPTIONS = {("MHZ", "HZ"), ("MOHM", "OHM")}


def suffix_scale(suffix: str, unit: str) -> float | None:
    """Scale factor of ``suffix`` for a parameter measured in ``unit``; ``None`` if it does not fit.

    >>> suffix_scale("mA", "A"), suffix_scale("KHZ", "HZ"), suffix_scale("MHZ", "HZ")
    (0.001, 1000.0, 1000000.0)
    """
    s, u = suffix.upper(), unit.upper()
    if s == u:
        return 1.0
    if (s, u) in _MEGA_EXCEPTIONS:
        return 1e6
    if not s.endswith(u):
        return None
    return MULTIPLIERS.get(s[: len(s) - len(u)])
