"""Measurement noise of simulated meters: a gain term plus an offset term, seeded.

Noise is Gaussian with standard deviation ``gain_ppm``·|reading|·1e-6 + ``offset``, the
way instrument data sheets state accuracy as "% of reading + % of range" (common
practice); averaging N readings divides it by √N.
"""

from __future__ import annotations

import threading
from dataclasses import dataclass

import numpy as np


@dataclass(frozen=True)
class NoiseSpec:
    gain_ppm: float
    offset: float


class MeterNoise:
    """Thread-safe seeded noise source for one instrument."""

    def __init__(self, seed: int | list[int]) -> None:
        self._rng = np.random.default_rng(seed)
        self._lock = threading.Lock()

    def add(self, value: float, spec: NoiseSpec, averaging: int = 1) -> float:
        sigma = (spec.gain_ppm * 1e-6 * abs(value) + spec.offset) / np.sqrt(max(1, averaging))
        with self._lock:
            return float(value + sigma * self._rng.standard_normal())
