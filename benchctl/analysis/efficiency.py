"""Efficiency and loss of a DC-DC converter from measured input and output power.

η = Σ Vo·Io / Pin (common practice; for DC input the input power is Vin·Iin or the power
meter's reading). Loss = Pin − Pout.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike


def efficiency(pout_w: ArrayLike, pin_w: ArrayLike) -> np.ndarray:
    """Efficiency Pout/Pin per point (dimensionless, 0..1); NaN where Pin ≤ 0."""
    pout = np.asarray(pout_w, dtype=float)
    pin = np.asarray(pin_w, dtype=float)
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.where(pin > 0, pout / pin, np.nan)


def loss_w(pout_w: ArrayLike, pin_w: ArrayLike) -> np.ndarray:
    """Power dissipated in the converter, Pin − Pout, in W."""
    return np.asarray(pin_w, dtype=float) - np.asarray(pout_w, dtype=float)


@dataclass(frozen=True)
class PeakEfficiency:
    """The highest measured efficiency and where it occurred."""

    efficiency: float
    iout_a: float
    vin_v: float


def peak_efficiency(vin_v: ArrayLike, iout_a: ArrayLike, eff: ArrayLike) -> PeakEfficiency | None:
    """The maximum of ``eff`` over the measured points, or None when no point is finite."""
    e = np.asarray(eff, dtype=float)
    if e.size == 0 or not np.isfinite(e).any():
        return None
    k = int(np.nanargmax(e))
    return PeakEfficiency(float(e[k]), float(np.asarray(iout_a, dtype=float)[k]), float(np.asarray(vin_v, dtype=float)[k]))
