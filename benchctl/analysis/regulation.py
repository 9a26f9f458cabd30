"""Line and load regulation of a converter's output voltage.

Definitions (see the project's references; common practice unless noted):

* Line regulation % = (Vo at Vin,max − Vo at Vin,min) / Vo,nom × 100, at a fixed load.
* Load regulation % has two conventions, and the one used is stored with the result:
  ``"textbook"``: (V_NL − V_FL) / V_FL × 100 (power-electronics textbooks);
  ``"rated"``: (Vo at min load − Vo at max load) / V_rated × 100, in the style of
  IEC 61204 (from memory).
* Output deviation % = (Vo − Vo,nom) / Vo,nom × 100.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Literal

import numpy as np
from numpy.typing import ArrayLike

LoadRegulationConvention = Literal["textbook", "rated"]


@dataclass(frozen=True)
class LineRegulation:
    """Line regulation at one load: Vo change between the lowest and highest measured line."""

    line_regulation_pct: float
    iout_a: float
    vin_min_v: float
    vin_max_v: float
    vout_at_vin_min_v: float
    vout_at_vin_max_v: float
    vout_nom_v: float


@dataclass(frozen=True)
class LoadRegulation:
    """Load regulation at one line voltage between the lightest and heaviest measured load."""

    load_regulation_pct: float
    convention: LoadRegulationConvention
    vin_v: float
    iout_min_a: float
    iout_max_a: float
    vout_at_min_load_v: float
    vout_at_max_load_v: float
    denominator_v: float


def _check_same_length(**arrays: np.ndarray) -> None:
    lengths = {k: len(v) for k, v in arrays.items()}
    if len(set(lengths.values())) > 1:
        from benchctl.errors import AnalysisInputError

        raise AnalysisInputError(f"arrays must have the same length, got {lengths}")


def line_regulation_pct(vout_at_vin_min_v: float, vout_at_vin_max_v: float, vout_nom_v: float) -> float:
    """(Vo at Vin,max − Vo at Vin,min) / Vo,nom × 100."""
    return (vout_at_vin_max_v - vout_at_vin_min_v) / vout_nom_v * 100.0


def load_regulation_pct(
    vout_min_load_v: float,
    vout_max_load_v: float,
    convention: LoadRegulationConvention,
    vout_rated_v: float | None = None,
) -> float:
    """Load regulation in % by the chosen convention (see the module docstring)."""
    if convention == "textbook":
        return (vout_min_load_v - vout_max_load_v) / vout_max_load_v * 100.0
    if convention == "rated":
        if vout_rated_v is None:
            raise ValueError("the 'rated' convention needs vout_rated_v")
        return (vout_min_load_v - vout_max_load_v) / vout_rated_v * 100.0
    raise ValueError(f"convention must be 'textbook' or 'rated', not {convention!r}")


def output_deviation_pct(vout_v: ArrayLike, vout_nom_v: float) -> np.ndarray:
    """(Vo − Vo,nom) / Vo,nom × 100 per point."""
    return (np.asarray(vout_v, dtype=float) - vout_nom_v) / vout_nom_v * 100.0


def _group_mean(keys: np.ndarray, values: np.ndarray, decimals: int) -> dict[float, float]:
    """Mean of values per key, keys rounded so that repeated passes merge."""
    out: dict[float, list[float]] = {}
    for k, v in zip(np.round(keys, decimals), values):
        out.setdefault(float(k), []).append(float(v))
    return {k: float(np.mean(v)) for k, v in out.items()}


def line_regulation_by_load(
    vin_v: ArrayLike, iout_a: ArrayLike, vout_v: ArrayLike, vout_nom_v: float, *, decimals: int = 4
) -> list[LineRegulation]:
    """Line regulation at every load setpoint measured at two or more line voltages.

    Points are grouped by load setpoint (rounded to ``decimals``); repeated points (an
    ascending and a descending pass) are averaged.
    """
    vin = np.asarray(vin_v, dtype=float)
    iout = np.asarray(iout_a, dtype=float)
    vout = np.asarray(vout_v, dtype=float)
    _check_same_length(vin_v=vin, iout_a=iout, vout_v=vout)
    results = []
    for load in sorted(set(np.round(iout, decimals))):
        sel = np.round(iout, decimals) == load
        by_line = _group_mean(vin[sel], vout[sel], decimals)
        if len(by_line) < 2:
            continue
        lo, hi = min(by_line), max(by_line)
        results.append(
            LineRegulation(
                line_regulation_pct=line_regulation_pct(by_line[lo], by_line[hi], vout_nom_v),
                iout_a=float(load), vin_min_v=lo, vin_max_v=hi,
                vout_at_vin_min_v=by_line[lo], vout_at_vin_max_v=by_line[hi], vout_nom_v=vout_nom_v,
            )
        )
    return results


def load_regulation_by_line(
    vin_v: ArrayLike,
    iout_a: ArrayLike,
    vout_v: ArrayLike,
    *,
    convention: LoadRegulationConvention,
    vout_rated_v: float | None = None,
    decimals: int = 4,
) -> list[LoadRegulation]:
    """Load regulation at every line voltage measured at two or more loads."""
    vin = np.asarray(vin_v, dtype=float)
    iout = np.asarray(iout_a, dtype=float)
    vout = np.asarray(vout_v, dtype=float)
    _check_same_length(vin_v=vin, iout_a=iout, vout_v=vout)
    results = []
    for line in sorted(set(np.round(vin, decimals))):
        sel = np.round(vin, decimals) == line
        by_load = _group_mean(iout[sel], vout[sel], decimals)
        if len(by_load) < 2:
            continue
        lo, hi = min(by_load), max(by_load)
        pct = load_regulation_pct(by_load[lo], by_load[hi], convention, vout_rated_v)  # checks the convention
        denominator = vout_rated_v if convention == "rated" and vout_rated_v is not None else by_load[hi]
        results.append(
            LoadRegulation(
                load_regulation_pct=pct,
                convention=convention, vin_v=float(line), iout_min_a=lo, iout_max_a=hi,
                vout_at_min_load_v=by_load[lo], vout_at_max_load_v=by_load[hi],
                denominator_v=float(denominator),
            )
        )
    return results
