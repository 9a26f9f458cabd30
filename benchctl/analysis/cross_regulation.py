"""Cross-regulation of a converter with two outputs from a grid of load points.

Definitions (common practice, as multiple-output supplies are specified; K. Billings and
T. Morey, *Switching Power Supply Handbook*, 3rd ed., on multiple-output flybacks, from
memory): at one line voltage, with the loads of both outputs set to their minimum and
maximum,

* **cross-regulation** of output k: the change of V_k as the *other* output's load moves
  from its minimum to its maximum with k's own load held, ΔV_k = V_k(other max) −
  V_k(other min); the figure is the largest |ΔV_k| over k's own load levels, in V and in
  % of V_k's nominal;
* **load regulation** of output k: the change as its *own* load moves from minimum to
  maximum with the other's held (the largest |ΔV_k| over the other's levels);
* **window**: the largest deviation of V_k from nominal over every point, %.

Levels are matched by the load setpoints; a (own, other) pair missing from the grid
leaves its change out, and a figure without any pair is not found (``None``), never 0.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike

from benchctl.errors import AnalysisInputError

__all__ = ["OutputRegulation", "output_regulation"]


@dataclass(frozen=True)
class OutputRegulation:
    """Cross- and load regulation of one output (V, %, A); ``None`` where no pair was measured."""

    nominal_v: float
    cross_delta_v: float | None
    cross_pct: float | None
    cross_at_own_a: float | None
    load_delta_v: float | None
    load_pct: float | None
    load_at_other_a: float | None
    v_min_v: float
    v_max_v: float
    window_pct: float
    cross_changes: tuple[tuple[float, float], ...]   # (own load A, ΔV as the other goes min → max)
    load_changes: tuple[tuple[float, float], ...]    # (other load A, ΔV as its own goes min → max)


def _mean_at(own: np.ndarray, other: np.ndarray, v: np.ndarray, a: float, b: float) -> float | None:
    sel = (own == a) & (other == b)
    return float(np.mean(v[sel])) if sel.any() else None


def _changes(own: np.ndarray, other: np.ndarray, v: np.ndarray, *, vary_other: bool) -> list[tuple[float, float]]:
    held_levels = np.unique(own if vary_other else other)
    moved = other if vary_other else own
    lo, hi = float(moved.min()), float(moved.max())
    out: list[tuple[float, float]] = []
    if lo == hi:            # the moved load has one level: there is no change to take
        return out
    for held in held_levels:
        if vary_other:
            v_lo, v_hi = _mean_at(own, other, v, held, lo), _mean_at(own, other, v, held, hi)
        else:
            v_lo, v_hi = _mean_at(own, other, v, lo, held), _mean_at(own, other, v, hi, held)
        if v_lo is not None and v_hi is not None:
            out.append((float(held), v_hi - v_lo))
    return out


def _worst(changes: list[tuple[float, float]]) -> tuple[float | None, float | None]:
    if not changes:
        return None, None
    at, dv = max(changes, key=lambda c: abs(c[1]))
    return dv, at


def output_regulation(own_a: ArrayLike, other_a: ArrayLike, v: ArrayLike, *, nominal_v: float) -> OutputRegulation:
    """Cross-regulation, load regulation and window of one output; see the module docstring.

    ``own_a``, ``other_a``: the load setpoints of this output and the other at each point (A);
    ``v``: this output's measured voltage there (V); ``nominal_v`` its nominal (V, > 0).
    Points repeated at one (own, other) pair are averaged.
    """
    own, other, volts = (np.asarray(x, dtype=float) for x in (own_a, other_a, v))
    if not (own.shape == other.shape == volts.shape and own.ndim == 1):
        raise AnalysisInputError(f"give one own load, other load and voltage per point; got shapes "
                                 f"{own.shape}, {other.shape}, {volts.shape}")
    if own.size < 2:
        raise AnalysisInputError(f"{own.size} point(s): measure at least the minimum and maximum of a load")
    if not (np.all(np.isfinite(own)) and np.all(np.isfinite(other)) and np.all(np.isfinite(volts))):
        raise AnalysisInputError("a load or voltage is not a finite number; re-measure or drop that point")
    if not (math.isfinite(nominal_v) and nominal_v > 0):
        raise AnalysisInputError(f"nominal_v {nominal_v!r} must be a positive voltage")
    cross = _changes(own, other, volts, vary_other=True)
    load = _changes(own, other, volts, vary_other=False)
    cross_dv, cross_at = _worst(cross)
    load_dv, load_at = _worst(load)

    def pct(x: float | None) -> float | None:
        return None if x is None else 100.0 * x / nominal_v

    window = float(np.max(np.abs(volts - nominal_v))) * 100.0 / nominal_v
    return OutputRegulation(nominal_v=float(nominal_v), cross_delta_v=cross_dv, cross_pct=pct(cross_dv),
                            cross_at_own_a=cross_at, load_delta_v=load_dv, load_pct=pct(load_dv),
                            load_at_other_a=load_at, v_min_v=float(volts.min()), v_max_v=float(volts.max()),
                            window_pct=window, cross_changes=tuple(cross), load_changes=tuple(load))
