"""Checking, converting and interpolating measured frequency-response arrays.

A frequency response is two 1-D arrays of equal length: ``freq_hz`` (strictly
increasing, > 0) and the complex ``response`` at those frequencies. Between
samples the response is modelled as log-magnitude and *unwrapped* phase, both
linear in log-frequency, which is how a Bode plot is read (common practice).

Unwrapping picks, between neighbouring samples, the phase change of the smallest
size (numpy.unwrap): it is right only while the true change stays within ±180°. A
sweep too coarse for the phase (a delay adds 360°·f·τ, which grows without bound)
then folds the phase back and invents or hides crossings. :func:`large_phase_steps`
finds the intervals whose unwrapped step exceeds ``UNWRAP_STEP_LIMIT_DEG`` (90°, our
choice: half of what unwrapping can resolve, leaving room for noise and for a step
that keeps growing); from the first of them on, the unwrapped phase is ambiguous.
"""

from __future__ import annotations

import numpy as np
from numpy.typing import ArrayLike, NDArray

from benchctl.errors import AnalysisInputError

__all__ = [
    "check_response",
    "response_from_gain_phase",
    "gain_db_of",
    "unwrapped_phase_deg",
    "interpolate_response",
    "large_phase_steps",
    "UNWRAP_STEP_LIMIT_DEG",
]

UNWRAP_STEP_LIMIT_DEG = 90.0


def check_response(
    freq_hz: ArrayLike,
    response: ArrayLike,
    *,
    min_points: int,
    where: str,
) -> tuple[NDArray[np.float64], NDArray[np.complex128]]:
    """Validate and return ``(freq_hz, response)`` as float and complex arrays.

    Raises AnalysisInputError naming ``where`` when lengths differ, a value is
    NaN/inf, frequency is not strictly increasing and > 0, the response is zero
    somewhere, or there are fewer than ``min_points`` samples.
    """
    f = np.asarray(freq_hz, dtype=float)
    try:
        h = np.asarray(response, dtype=complex)
    except (TypeError, ValueError) as exc:
        raise AnalysisInputError(
            f"{where}: response cannot be read as complex numbers ({exc}); "
            "pass a complex array, or build one with response_from_gain_phase(gain_db, phase_deg)"
        ) from exc
    if f.ndim != 1 or h.ndim != 1:
        raise AnalysisInputError(
            f"{where}: freq_hz and response must be 1-D arrays, got shapes {f.shape} and {h.shape}"
        )
    if f.size != h.size:
        raise AnalysisInputError(
            f"{where}: freq_hz has {f.size} points but response has {h.size}; "
            "pass one response value per frequency"
        )
    if f.size < min_points:
        raise AnalysisInputError(
            f"{where}: {f.size} points given, at least {min_points} needed; "
            "measure more frequencies"
        )
    if not np.all(np.isfinite(f)):
        i = int(np.flatnonzero(~np.isfinite(f))[0])
        raise AnalysisInputError(
            f"{where}: freq_hz[{i}] is {f[i]}; remove non-finite frequencies"
        )
    if not np.all(np.isfinite(h)):
        i = int(np.flatnonzero(~np.isfinite(h))[0])
        raise AnalysisInputError(
            f"{where}: response[{i}] (at {f[i]:g} Hz) is {h[i]}; remove or re-measure that point"
        )
    if f[0] <= 0.0:
        raise AnalysisInputError(f"{where}: freq_hz must be > 0, got {f[0]:g} at index 0")
    steps = np.diff(f)
    if np.any(steps <= 0.0):
        i = int(np.flatnonzero(steps <= 0.0)[0])
        raise AnalysisInputError(
            f"{where}: freq_hz is not strictly increasing at index {i + 1} "
            f"({f[i]:g} Hz then {f[i + 1]:g} Hz); sort the data and drop repeated frequencies"
        )
    if np.any(h == 0.0):
        i = int(np.flatnonzero(h == 0.0)[0])
        raise AnalysisInputError(
            f"{where}: response[{i}] (at {f[i]:g} Hz) is exactly zero, its phase is undefined; "
            "drop that point"
        )
    return f, h


def response_from_gain_phase(gain_db: ArrayLike, phase_deg: ArrayLike) -> NDArray[np.complex128]:
    """Complex response 10**(gain_db/20) * exp(j*phase_deg) from Bode data (dB, degrees)."""
    g = np.asarray(gain_db, dtype=float)
    p = np.asarray(phase_deg, dtype=float)
    if g.shape != p.shape:
        raise AnalysisInputError(
            f"response_from_gain_phase: gain_db has shape {g.shape} but phase_deg has {p.shape}; "
            "pass one phase per gain value"
        )
    return (10.0 ** (g / 20.0)) * np.exp(1j * np.deg2rad(p))


def gain_db_of(response: ArrayLike) -> NDArray[np.float64]:
    """20*log10|response| in dB."""
    return 20.0 * np.log10(np.abs(np.asarray(response, dtype=complex)))


def unwrapped_phase_deg(response: ArrayLike) -> NDArray[np.float64]:
    """Unwrapped phase in degrees, anchored so the first sample lies in (-270, +90].

    The anchor puts the low-frequency phase of a negative-feedback loop (0 to
    -180 deg, perhaps a little above 0 from a zero) on its natural branch; a
    different anchor only shifts every value by a multiple of 360 deg.
    """
    h = np.asarray(response, dtype=complex)
    phase = np.rad2deg(np.unwrap(np.angle(h)))
    first = phase[0]
    anchored = ((first + 270.0) % 360.0) - 270.0
    if anchored <= -270.0:
        anchored += 360.0
    return phase + (anchored - first)


def large_phase_steps(response: ArrayLike, limit_deg: float = UNWRAP_STEP_LIMIT_DEG) -> NDArray[np.intp]:
    """Indices i of the intervals [i, i+1] whose unwrapped phase step |Δφ| exceeds ``limit_deg``
    (degrees, 0 < limit < 180); empty when the sweep is dense enough to unwrap unambiguously."""
    if not 0.0 < limit_deg < 180.0:
        raise AnalysisInputError(f"limit_deg must lie between 0 and 180 degrees, got {limit_deg!r}")
    steps = np.abs(np.diff(unwrapped_phase_deg(response)))
    return np.flatnonzero(steps > limit_deg)


def interpolate_response(
    freq_hz: ArrayLike,
    response: ArrayLike,
    at_freq_hz: ArrayLike,
) -> NDArray[np.complex128]:
    """Response at ``at_freq_hz`` (Hz), interpolated inside the measured band.

    Log-magnitude and unwrapped phase are interpolated linearly in log-frequency.
    Frequencies outside [freq_hz[0], freq_hz[-1]] raise AnalysisInputError (no
    extrapolation).
    """
    f, h = check_response(freq_hz, response, min_points=2, where="interpolate_response")
    at = np.atleast_1d(np.asarray(at_freq_hz, dtype=float))
    if not np.all(np.isfinite(at)):
        raise AnalysisInputError("interpolate_response: at_freq_hz contains NaN or inf")
    span = 1e-9 * (f[-1] - f[0])
    if np.any(at < f[0] - span) or np.any(at > f[-1] + span):
        raise AnalysisInputError(
            f"interpolate_response: requested {at.min():g}..{at.max():g} Hz but data cover "
            f"{f[0]:g}..{f[-1]:g} Hz; measure a wider band or move the frequency inside it"
        )
    x = np.log10(f)
    xq = np.log10(np.clip(at, f[0], f[-1]))
    log_mag = np.interp(xq, x, np.log10(np.abs(h)))
    phase = np.interp(xq, x, unwrapped_phase_deg(h))
    out = (10.0**log_mag) * np.exp(1j * np.deg2rad(phase))
    return out.reshape(np.shape(at_freq_hz))
