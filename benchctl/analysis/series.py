"""Checking a sampled waveform record (time in seconds and one value per sample)."""

from __future__ import annotations

import numpy as np
from numpy.typing import ArrayLike, NDArray

from benchctl.errors import AnalysisInputError


def as_series(t_s: ArrayLike, y: ArrayLike, name: str, min_samples: int) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """A sampled record as float arrays, checked: 1-D, same length, at least ``min_samples``,
    finite, strictly increasing time. Raises AnalysisInputError saying what to fix."""
    t = np.asarray(t_s, dtype=float)
    v = np.asarray(y, dtype=float)
    if t.ndim != 1 or v.ndim != 1:
        raise AnalysisInputError(f"t_s and {name} must be 1-D arrays; got shapes {t.shape} and {v.shape}")
    if t.size != v.size:
        raise AnalysisInputError(
            f"t_s has {t.size} samples but {name} has {v.size}; pass arrays from the same capture"
        )
    if t.size < min_samples:
        raise AnalysisInputError(f"{name} has {t.size} samples; at least {min_samples} are needed")
    for arr, label in ((t, "t_s"), (v, name)):
        bad = np.flatnonzero(~np.isfinite(arr))
        if bad.size:
            raise AnalysisInputError(
                f"{label} holds NaN or infinite values (first at index {bad[0]}); remove or interpolate them"
            )
    steps = np.diff(t)
    if np.any(steps <= 0):
        i = int(np.flatnonzero(steps <= 0)[0])
        raise AnalysisInputError(
            f"t_s is not strictly increasing at index {i + 1} ({t[i]!r} then {t[i + 1]!r}); sort the record"
        )
    return t, v
