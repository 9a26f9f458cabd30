"""Quality flags: how a recorded point or a derived result says its number may be wrong.

A derived result carries ``details["flags"]`` (a list drawn from :data:`FLAGS`) and
``details["flag_reasons"]`` (text). A recorded point is flagged by how it was taken:
``settled`` False with ``settle_info["verified"]`` False is *unverified* (a setpoint
was not where it was asked to be), otherwise *unsettled*; ``settle_reason`` says why.

Meaning of each flag (the project's own convention):

* ``unsettled`` / ``unverified``: taken before the DUT settled / with a setpoint off;
* ``clipped``: from a trace that touched the instrument's screen limits;
* ``lower_bound`` / ``upper_bound``: the true value is at least / at most the number;
* ``outside_band``: found outside the measured band (extrapolated);
* ``beyond_standard_range``: a formula used outside the range its standard covers;
* ``not_exist``: the quantity does not exist for this DUT (no phase crossover, so no gain
  margin) - different from "not measured". ``details["unbounded"]`` = ``"above"`` or
  ``"below"`` says which way it is unbounded when that is known (+inf / -inf).

Pure functions; no I/O.
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Mapping
from typing import Any

UNSETTLED = "unsettled"
UNVERIFIED = "unverified"
CLIPPED = "clipped"
LOWER_BOUND = "lower_bound"
UPPER_BOUND = "upper_bound"
OUTSIDE_BAND = "outside_band"
BEYOND_STANDARD_RANGE = "beyond_standard_range"
NOT_EXIST = "not_exist"

FLAGS = (UNSETTLED, UNVERIFIED, CLIPPED, LOWER_BOUND, UPPER_BOUND, OUTSIDE_BAND, BEYOND_STANDARD_RANGE, NOT_EXIST)
POINT_FLAGS = (UNSETTLED, UNVERIFIED)


def _truthy(value: Any) -> bool | None:
    """True/False for bool-like values (numpy and pandas included), None when unknown/NaN."""
    if value is None:
        return None
    if isinstance(value, float) and math.isnan(value):
        return None
    try:
        return bool(value)
    except (TypeError, ValueError):
        return None


def point_flags(settled: Any, settle_info: Any = None, settle_reason: Any = "") -> tuple[tuple[str, ...], str]:
    """(flags, reason) of one recorded point from its ``settled``, ``settle_info`` and ``settle_reason``.

    A point whose ``settled`` is unknown (an older store) carries no flag.
    """
    info = settle_info if isinstance(settle_info, Mapping) else {}
    reason = str(settle_reason or info.get("reason") or "").strip()
    ok = _truthy(settled)
    verified = _truthy(info.get("verified")) if "verified" in info else None
    if verified is False:
        return (UNVERIFIED,), reason or "setpoints not verified"
    if ok is False:
        return (UNSETTLED,), reason or "not settled"
    return (), ""


def result_flags(details: Any) -> tuple[tuple[str, ...], str]:
    """(flags, reasons) stored in a result's ``details`` (empty when none)."""
    if not isinstance(details, Mapping):
        return (), ""
    raw = details.get("flags") or ()
    if isinstance(raw, str):
        raw = [raw]
    flags = tuple(dict.fromkeys(str(f) for f in raw if f))
    return flags, str(details.get("flag_reasons") or "")


def merge_flags(items: Iterable[tuple[Iterable[str], str]], *, where: Iterable[str] | None = None) -> tuple[list[str], str]:
    """Union of several (flags, reason) pairs in the order met; reasons joined, each prefixed
    with its ``where`` text when given (``"48 V, 2.5 A: not settled"``)."""
    flags: list[str] = []
    reasons: list[str] = []
    labels = list(where) if where is not None else None
    for k, (fl, reason) in enumerate(items):
        fl = list(fl)
        for f in fl:
            if f not in flags:
                flags.append(f)
        if fl and reason:
            text = f"{labels[k]}: {reason}" if labels is not None and k < len(labels) else reason
            if text not in reasons:
                reasons.append(text)
    return flags, "; ".join(reasons)


__all__ = [
    "BEYOND_STANDARD_RANGE", "CLIPPED", "FLAGS", "LOWER_BOUND", "NOT_EXIST", "OUTSIDE_BAND", "POINT_FLAGS",
    "UNSETTLED", "UNVERIFIED", "UPPER_BOUND", "merge_flags", "point_flags", "result_flags",
]
