"""Line response of a converter: line-to-output rejection from two sines, and the line-step metrics.

Rejection: the input and output ripple at the injected frequency are each fitted with
a + b·cos(ωt) + c·sin(ωt) by linear least squares (a single-bin sine fit, IEEE Std 1057-2017
§4.1.4 three-parameter fit with the frequency known, from memory); the amplitude is
√(b² + c²), the phase atan2(−c, b), and the rejection 20·log10(|Vout|/|Vin|) dB (negative:
the output ripple is the smaller). Switching ripple and noise not at that frequency fall out
of the fit when the record holds several whole periods.

Line step: the deviation of the output from its value before the step (the mean of the
pre-step samples), its peak (signed), the time of the peak, and the recovery time: from the
step until the output last leaves a band of ±band_v around the pre-step value, or around
the final value for ``settled`` (common practice, as for load steps). A record that ends
outside the band gives ``recovered`` False and no time, never a time that looks good.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike


@dataclass(frozen=True)
class SineFit:
    """amplitude (peak, signal unit), phase (rad, of a cosine), offset, rms of the residual."""

    amplitude: float
    phase_rad: float
    offset: float
    residual_rms: float


def fit_sine(t_s: ArrayLike, v: ArrayLike, frequency_hz: float) -> SineFit:
    """Least-squares sine at a known frequency (module docstring)."""
    t = np.asarray(t_s, dtype=float)
    y = np.asarray(v, dtype=float)
    if t.shape != y.shape or t.size < 4:
        raise ValueError(f"fit_sine: need matching time and value arrays of 4 samples or more, got {t.shape}, {y.shape}")
    if not frequency_hz > 0.0:
        raise ValueError(f"fit_sine: frequency_hz={frequency_hz!r} must be > 0")
    w = 2.0 * math.pi * frequency_hz
    basis = np.column_stack([np.ones_like(t), np.cos(w * t), np.sin(w * t)])
    coef, *_ = np.linalg.lstsq(basis, y, rcond=None)
    a, b, c = (float(x) for x in coef)
    resid = y - basis @ coef
    return SineFit(math.hypot(b, c), math.atan2(-c, b), a, float(np.sqrt(np.mean(resid ** 2))))


@dataclass(frozen=True)
class Rejection:
    """Line-to-output at one frequency: amplitudes (V peak), gain (V/V), rejection (dB), phase (deg)."""

    frequency_hz: float
    vin_amplitude_v: float
    vout_amplitude_v: float
    gain: float
    rejection_db: float
    phase_deg: float


def line_rejection(t_s: ArrayLike, vin_v: ArrayLike, vout_v: ArrayLike, frequency_hz: float) -> Rejection:
    """Rejection from simultaneous input and output records (same time base)."""
    fin = fit_sine(t_s, vin_v, frequency_hz)
    fout = fit_sine(t_s, vout_v, frequency_hz)
    if not fin.amplitude > 0.0:
        raise ValueError("line_rejection: no input ripple at the injected frequency; is the generator on?")
    gain = fout.amplitude / fin.amplitude
    phase = math.degrees(math.atan2(math.sin(fout.phase_rad - fin.phase_rad), math.cos(fout.phase_rad - fin.phase_rad)))
    return Rejection(frequency_hz, fin.amplitude, fout.amplitude, gain,
                     20.0 * math.log10(gain) if gain > 0.0 else -math.inf, phase)


@dataclass(frozen=True)
class LineStepMetrics:
    """Output deviation after a line step (V, s); times from the step."""

    pre_step_v: float
    peak_deviation_v: float
    peak_after_step_s: float
    final_shift_v: float
    band_v: float
    recovered: bool
    recovery_s: float | None


def line_step_metrics(t_s: ArrayLike, vout_v: ArrayLike, *, step_time_s: float, band_v: float,
                      tail_fraction: float = 0.05) -> LineStepMetrics:
    """Metrics of the output after a line step at ``step_time_s`` (module docstring).

    The final value is the mean of the last ``tail_fraction`` of the record.
    """
    t = np.asarray(t_s, dtype=float)
    v = np.asarray(vout_v, dtype=float)
    if t.shape != v.shape or t.size < 8:
        raise ValueError("line_step_metrics: need matching arrays of 8 samples or more")
    if not band_v > 0.0:
        raise ValueError(f"line_step_metrics: band_v={band_v!r} must be > 0 V")
    before = t < step_time_s
    after = ~before
    if before.sum() < 2 or after.sum() < 4:
        raise ValueError("line_step_metrics: the record needs samples before and after the step; add pre-trigger time")
    pre = float(np.mean(v[before]))
    dev = v[after] - pre
    k = int(np.argmax(np.abs(dev)))
    ta = t[after]
    tail = max(2, int(math.ceil(tail_fraction * ta.size)))
    final_shift = float(np.mean(dev[-tail:]))
    outside = np.flatnonzero(np.abs(dev) > band_v)
    if outside.size == 0:
        recovered, recovery = True, 0.0
    elif outside[-1] >= ta.size - tail:
        recovered, recovery = False, None
    else:
        i = int(outside[-1])
        # where the deviation crosses the band between samples i and i+1 (linear interpolation)
        a, b = abs(dev[i]), abs(dev[i + 1])
        frac = (a - band_v) / (a - b) if a != b else 0.0
        recovered, recovery = True, float(ta[i] + frac * (ta[i + 1] - ta[i]) - step_time_s)
    return LineStepMetrics(pre, float(dev[k]), float(ta[k] - step_time_s), final_shift, float(band_v),
                           recovered, recovery)
