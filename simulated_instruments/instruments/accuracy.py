"""Documented accuracy of a simulated reading, and the seeded errors that stay inside it.

Each measured quantity of an instrument has a data-sheet style accuracy per range,
±(``pct_of_reading`` % of the reading + ``offset``) in the quantity's unit, the range
being the smallest whose full scale holds |reading| (auto-ranging; the last range above
that) — the way instrument data sheets state it (common practice).

What an instrument actually reads is the true value plus a fixed error of its own,
drawn once from its seed (a gain error within ±``FIXED_FRACTION`` of the % term and an
offset error within ±``FIXED_FRACTION`` of the offset term, uniform, per range), plus
noise: Gaussian with σ = ``NOISE_FRACTION`` × the accuracy at that reading, cut at
±``NOISE_CLIP_SIGMA`` σ, divided by √N when N readings are averaged.  The total error is
therefore never more than (0.4 + 0.2) = 0.6 of the documented accuracy: a reading is
always inside its spec, as a calibrated instrument's is.

``accuracy_toml`` gives the table a station file carries for an instrument (the format
agreed for station files: one inline table for a single range, an array of inline
tables with ``range_max`` for several; distribution rectangular by default).
"""

from __future__ import annotations

import math
import threading
from dataclasses import dataclass

import numpy as np

FIXED_FRACTION = 0.4
NOISE_FRACTION = 0.05
NOISE_CLIP_SIGMA = 4.0


@dataclass(frozen=True)
class AccuracyRange:
    """One range: full scale ``range_max`` (unit of the quantity), ±(pct_of_reading % + offset)."""

    range_max: float
    pct_of_reading: float
    offset: float

    def limit(self, value: float) -> float:
        """Accuracy at ``value``: pct_of_reading/100·|value| + offset (unit of the quantity)."""
        return self.pct_of_reading / 100.0 * abs(value) + self.offset


@dataclass(frozen=True)
class QuantityAccuracy:
    """Accuracy of one measured quantity over its ranges (increasing ``range_max``)."""

    unit: str
    ranges: tuple[AccuracyRange, ...]

    def __post_init__(self) -> None:
        maxima = [r.range_max for r in self.ranges]
        if not self.ranges or maxima != sorted(maxima) or len(set(maxima)) != len(maxima):
            raise ValueError(f"QuantityAccuracy: give ranges with increasing range_max, got {maxima}")
        for r in self.ranges:
            if not (r.range_max > 0.0 and r.pct_of_reading >= 0.0 and r.offset >= 0.0):
                raise ValueError(f"QuantityAccuracy: range {r} needs range_max > 0 and non-negative terms")

    def range_index(self, value: float) -> int:
        """Index of the smallest range whose full scale holds |value| (the last one above all)."""
        for k, r in enumerate(self.ranges):
            if abs(value) <= r.range_max:
                return k
        return len(self.ranges) - 1

    def limit(self, value: float) -> float:
        """Documented accuracy at ``value`` (unit of the quantity)."""
        return self.ranges[self.range_index(value)].limit(value)

    def toml_value(self) -> str:
        """This accuracy as the value of a station-file key (inline table or array of them)."""
        if len(self.ranges) == 1:
            r = self.ranges[0]
            return f"{{ pct_of_reading = {r.pct_of_reading!r}, offset = {r.offset!r} }}"
        items = ", ".join(f"{{ range_max = {r.range_max!r}, pct_of_reading = {r.pct_of_reading!r}, "
                          f"offset = {r.offset!r} }}" for r in self.ranges)
        return f"[ {items} ]"


def single(unit: str, range_max: float, pct_of_reading: float, offset: float) -> QuantityAccuracy:
    """A quantity with one range."""
    return QuantityAccuracy(unit, (AccuracyRange(range_max, pct_of_reading, offset),))


def ranged(unit: str, *ranges: tuple[float, float, float]) -> QuantityAccuracy:
    """A quantity with several ranges given as (range_max, pct_of_reading, offset)."""
    return QuantityAccuracy(unit, tuple(AccuracyRange(*r) for r in ranges))


def accuracy_toml(role: str, accuracy: dict[str, QuantityAccuracy]) -> list[str]:
    """Station-file lines of ``[instruments.<role>.accuracy]`` for ``accuracy``."""
    lines = [f"[instruments.{role}.accuracy]"]
    for name, qa in accuracy.items():
        lines.append(f"{name} = {qa.toml_value()}")
    return lines


class InstrumentErrors:
    """The actual errors of one instrument (see module docstring); thread-safe and seeded."""

    def __init__(self, accuracy: dict[str, QuantityAccuracy], seed: int | list[int]) -> None:
        self.accuracy = dict(accuracy)
        self._rng = np.random.default_rng(seed)
        self._lock = threading.Lock()
        self._fixed: dict[tuple[str, int], tuple[float, float]] = {}
        for name in sorted(self.accuracy):
            for k, r in enumerate(self.accuracy[name].ranges):
                g, o = self._rng.uniform(-FIXED_FRACTION, FIXED_FRACTION, size=2)
                self._fixed[(name, k)] = (float(g) * r.pct_of_reading / 100.0, float(o) * r.offset)

    def fixed_error(self, quantity: str, value: float) -> float:
        """The instrument's fixed (calibration) error at the true ``value`` (unit of the quantity)."""
        k = self._quantity(quantity).range_index(value)
        gain, offset = self._fixed[(quantity, k)]
        return gain * value + offset

    def limit(self, quantity: str, value: float) -> float:
        """Documented accuracy of ``quantity`` at ``value``."""
        return self._quantity(quantity).limit(value)

    def read(self, quantity: str, value: float, averaging: int = 1) -> float:
        """What the instrument reads for the true ``value``: fixed error plus (averaged) noise."""
        sigma = NOISE_FRACTION * self.limit(quantity, value) / math.sqrt(max(1, int(averaging)))
        with self._lock:
            z = float(self._rng.standard_normal())
        z = max(-NOISE_CLIP_SIGMA, min(NOISE_CLIP_SIGMA, z))
        return float(value + self.fixed_error(quantity, value) + sigma * z)

    def _quantity(self, quantity: str) -> QuantityAccuracy:
        try:
            return self.accuracy[quantity]
        except KeyError:
            raise ValueError(f"no accuracy for {quantity!r}; this instrument measures "
                             f"{', '.join(self.accuracy)}") from None
