"""The run's derived results condensed for reading: per-point series become one line.

Results whose scope names a point (``seq``) come one per point (efficiency, loss ...);
they are summarised as count, minimum and maximum. Every other result is listed as
stored. ``limit:<name>`` results are left out here (the report lists them apart).
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd

from .limit_marks import LIMIT_PREFIX


@dataclass(frozen=True)
class ResultLine:
    """One line of the results table. ``value_text`` is ``"not found"`` (with ``note``
    giving the stored reason) when the result has no value, and carries ``± U`` (the
    expanded uncertainty, k = 2) when one is stored; a per-point series shows the largest
    U of its points. ``flags`` are the quality flags of the result (or of any point of a
    series), the note saying why."""

    name: str
    value_text: str
    unit: str
    scope_text: str
    note: str
    flags: tuple[str, ...] = ()


def format_value(value: float | None, unit: str = "") -> str:
    """A number with six significant digits, or ``not found`` for NaN/None."""
    if value is None or (isinstance(value, float) and math.isnan(value)):
        return "not found"
    return f"{value:.6g}"


def scope_text(scope: Any) -> str:
    """``vin_set_v = 48, iout_set_a = 2.5`` from a scope mapping ("" when empty)."""
    if not isinstance(scope, Mapping) or not scope:
        return ""
    return ", ".join(f"{k} = {v:g}" if isinstance(v, float) else f"{k} = {v}" for k, v in scope.items())


def _note(details: Any) -> str:
    if not isinstance(details, Mapping):
        return "" if details is None else str(details)
    parts = []
    if details.get("flags"):
        parts.append(f"flagged {', '.join(str(f) for f in details['flags'])}"
                     + (f": {details['flag_reasons']}" if details.get("flag_reasons") else ""))
    for key in ("reason", "definition", "note", "source"):
        if details.get(key):
            parts.append(str(details[key]))
    return "; ".join(parts)


def result_lines(results: pd.DataFrame) -> list[ResultLine]:
    """The results table, in recording order of each name's first result."""
    if results is None or results.empty:
        return []
    lines: list[ResultLine] = []
    per_point: dict[str, list[float]] = {}
    per_point_u: dict[str, list[float]] = {}
    per_point_flags: dict[str, int] = {}
    per_point_unit: dict[str, str] = {}
    order: list[tuple[str, int]] = []  # (name, -1): a per-point series; (name, row position): one result
    for pos, (_, row) in enumerate(results.iterrows()):
        name = str(row["name"])
        if name.startswith(LIMIT_PREFIX):
            continue
        scope = row.get("scope")
        if isinstance(scope, Mapping) and "seq" in scope:
            if name not in per_point:
                per_point[name] = []
                per_point_u[name] = []
                per_point_flags[name] = 0
                per_point_unit[name] = str(row.get("unit", "") or "")
                order.append((name, -1))
            per_point[name].append(float(row["value"]))
            per_point_u[name].append(_u(row))
            details = row.get("details")
            per_point_flags[name] += bool(isinstance(details, Mapping) and details.get("flags"))
        else:
            order.append((name, pos))
    for name, idx in order:
        if idx < 0:
            values = np.asarray(per_point[name], dtype=float)
            finite = values[np.isfinite(values)]
            if finite.size:
                text = f"{finite.min():.6g} … {finite.max():.6g}"
            else:
                text = "not found"
            us = np.asarray(per_point_u[name], dtype=float)
            if np.isfinite(us).any():
                text += f" (U ≤ {np.nanmax(us):.2g})"
            notes = [] if finite.size == values.size else [f"{values.size - finite.size} points without a value"]
            if per_point_flags[name]:
                notes.append(f"{per_point_flags[name]} point(s) flagged unsettled or unverified")
            lines.append(ResultLine(name, text, per_point_unit[name], f"per point ({values.size} points): min … max",
                                    "; ".join(notes), ("flagged",) if per_point_flags[name] else ()))
            continue
        row = results.iloc[idx]
        value = row["value"]
        text = format_value(None if pd.isna(value) else float(value))
        u = _u(row)
        if math.isfinite(u) and not pd.isna(value):
            text += f" ± {u:.2g}"
        details = row.get("details")
        flags = tuple(details.get("flags") or ()) if isinstance(details, Mapping) else ()
        lines.append(ResultLine(name, text, str(row.get("unit", "") or ""), scope_text(row.get("scope")),
                                _note(details), flags))
    return lines


def _u(row: Any) -> float:
    """The expanded uncertainty U of a result row (k as the result states), NaN when none."""
    try:
        u = float(row.get("expanded_uncertainty"))
    except (TypeError, ValueError):
        return math.nan
    return u if math.isfinite(u) else math.nan
