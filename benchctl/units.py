"""Units from quantity names: the project's naming convention (``vin_v``, ``pout_w``, ``freq_hz``).

Quantities carry their unit in the suffix of their name, SI base units in storage; this
is the one table that maps a suffix to its unit.
"""

from __future__ import annotations

SUFFIX_UNITS: dict[str, str] = {
    "v": "V", "a": "A", "w": "W", "hz": "Hz", "db": "dB", "deg": "deg", "s": "s", "pct": "%",
    "ohm": "ohm", "f": "F", "h": "H", "c": "degC",
}


def unit_from_name(name: str) -> str:
    """Unit implied by the suffix of ``name`` (``vin_v`` -> ``V``), ``""`` when none is (efficiency, duty)."""
    head, sep, suffix = name.rpartition("_")
    if not sep or not head:
        return ""
    return SUFFIX_UNITS.get(suffix.lower(), "")
