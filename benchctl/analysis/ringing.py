"""Turn-off ringing: damped-sinusoid fit, parasitic L and C by the two-capacitor method,
and an RC snubber suggestion.

Model: v(t) = A·e^(−α·(t − t0))·sin(2π·f·(t − t0) + φ) + c, with τ = 1/α. For a
second-order (series RLC) ring, α = ζ·ω_n and 2π·f = ω_n·√(1 − ζ²), so
ζ = α/√(α² + (2πf)²) and Q = 1/(2ζ) (any circuits text; from memory).

The initial guess comes from the FFT peak, the spacing of zero crossings and the
logarithmic decrement of the half-period extremes; scipy.optimize.least_squares then
refines all five parameters.
"""

from __future__ import annotations

import logging
import math
from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike, NDArray
from scipy.optimize import least_squares

from benchctl.analysis.series import as_series
from benchctl.errors import AnalysisInputError

logger = logging.getLogger(__name__)


@dataclass(frozen=True)
class RingingFit:
    """Damped sinusoid fitted to a ring.

    ``f_ring_hz`` is the observed (damped) frequency, ``f_natural_hz`` the undamped
    ω_n/2π; for the two-capacitor method use ``f_natural_hz`` (they differ by less
    than 0.5 % when ζ < 0.1). ``tau_s`` and ``q_factor`` are ``math.inf`` for an
    undamped ring. ``peak_v`` is the sample farthest from the settled value
    ``offset_v`` in the fitted segment. ``fit_ok`` is False when the optimiser did not
    converge or the residual is large compared with the ring; ``fit_reason`` says which.
    """

    f_ring_hz: float
    f_natural_hz: float
    damping_ratio: float
    decay_rate_per_s: float
    tau_s: float
    q_factor: float
    amplitude_v: float
    phase_rad: float
    offset_v: float
    peak_v: float
    peak_time_s: float
    fit_rms_error_v: float
    start_index: int
    start_time_s: float
    samples_used: int
    fit_ok: bool
    fit_reason: str


@dataclass(frozen=True)
class ParasiticLC:
    """Parasitic capacitance and inductance of a ring, from the two-capacitor method.

    ``z0_ohm`` = √(L/C) is the characteristic impedance of the ring tank.
    """

    c_par_f: float
    l_par_h: float
    z0_ohm: float
    f1_hz: float
    f2_hz: float
    c_add_f: float


@dataclass(frozen=True)
class RcSnubberDesign:
    """RC snubber across the ringing node.

    ``loss_w`` = C·V²·fs is dissipated in the resistor whatever its value: the
    capacitor is charged to ``v_switch_v`` and discharged once per period.
    """

    r_ohm: float
    c_f: float
    c_multiple: float
    loss_w: float
    v_switch_v: float
    fsw_hz: float


def _fft_frequency(tr: NDArray[np.float64], x: NDArray[np.float64]) -> float:
    dt = float((tr[-1] - tr[0]) / (tr.size - 1))
    n = x.size
    # rectangular window: a ring is largest at the start of the segment, where a taper would hide it
    spec = np.abs(np.fft.rfft(x - x.mean(), n=8 * n))
    freqs = np.fft.rfftfreq(8 * n, d=dt)
    k = int(np.argmax(spec[1:]) + 1)
    return float(freqs[k])


def _initial_guess(tr: NDArray[np.float64], x: NDArray[np.float64]) -> tuple[float, float, float, float, float]:
    """(A, alpha, f, phi, c) from the FFT, zero crossings and log decrement."""
    n = x.size
    c0 = float(np.mean(x[-max(4, n // 5) :]))
    y = x - c0
    if not np.any(np.abs(y) > 0):
        raise AnalysisInputError("no ringing found: the segment is flat; check the start index and the channel")
    f0 = _fft_frequency(tr, y)
    duration = float(tr[-1] - tr[0])
    if f0 <= 0 or f0 * duration < 1.5:
        raise AnalysisInputError(
            f"no ringing found: fewer than 1.5 periods in the {duration:.4g} s segment "
            f"(FFT peak at {f0:.4g} Hz); capture a longer record after the turn-off"
        )
    noise = float(np.std(y[-max(4, n // 10) :]))
    half = 0.5 / f0
    amps: list[float] = []
    times: list[float] = []
    bounds = np.searchsorted(tr, np.arange(0.0, duration + half, half))
    for lo_i, hi_i in zip(bounds[:-1], bounds[1:]):
        if hi_i <= lo_i:
            continue
        k = lo_i + int(np.argmax(np.abs(y[lo_i:hi_i])))
        amp = float(abs(y[k]))
        if amp <= 3.0 * noise and len(amps) >= 2:
            break
        amps.append(amp)
        times.append(float(tr[k]))
    alpha0 = 0.0
    if len(amps) >= 2 and min(amps) > 0:
        slope = float(np.polyfit(times, np.log(amps), 1)[0])
        alpha0 = max(0.0, -slope)
    # zero crossings inside the part of the record where the ring stands above the noise
    t_end = times[-1] if times else duration
    sign = np.signbit(y)
    zc = np.flatnonzero(sign[:-1] != sign[1:])
    zc_t = [
        float(tr[k] - y[k] * (tr[k + 1] - tr[k]) / (y[k + 1] - y[k]))
        for k in zc
        if tr[k] <= t_end and y[k + 1] != y[k]
    ]
    f_guess = f0
    if len(zc_t) >= 3:
        f_zc = (len(zc_t) - 1) / (2.0 * (zc_t[-1] - zc_t[0]))
        if 0.5 * f0 < f_zc < 2.0 * f0:
            f_guess = f_zc
    w = 2 * math.pi * f_guess
    env = np.exp(-alpha0 * tr)
    basis = np.column_stack([env * np.sin(w * tr), env * np.cos(w * tr), np.ones_like(tr)])
    coef, *_ = np.linalg.lstsq(basis, x, rcond=None)
    amp0 = float(math.hypot(coef[0], coef[1]))
    phi0 = float(math.atan2(coef[1], coef[0]))
    return amp0, alpha0, f_guess, phi0, float(coef[2])


def fit_ringing(
    t_s: ArrayLike,
    v_v: ArrayLike,
    *,
    start_index: int | None = None,
    duration_s: float | None = None,
) -> RingingFit:
    """Fit a damped sinusoid to the ring in ``v_v`` (volts) after ``start_index``.

    By default the ring starts at the highest sample, the turn-off overshoot peak of a
    switch-node or drain voltage; give ``start_index`` for any other ring. The fit
    covers ``duration_s`` seconds from the start (default: 1.5 times the time the ring
    takes to decay to 5 % of its first swing, at most to the end of the record).
    """
    t, v = as_series(t_s, v_v, "v_v", 20)
    if start_index is None:
        start_index = int(np.argmax(v))
    if not 0 <= start_index < t.size - 20:
        raise AnalysisInputError(
            f"start_index {start_index} leaves fewer than 20 samples to fit (record has {t.size}); "
            "give an earlier start or a longer record"
        )
    end = t.size
    if duration_s is not None:
        if not duration_s > 0:
            raise AnalysisInputError(f"duration_s must be positive, got {duration_s!r}")
        end = int(np.searchsorted(t, t[start_index] + duration_s, side="right"))
    seg_t = t[start_index:end]
    seg_v = v[start_index:end]
    if duration_s is None and seg_t.size > 40:
        # fit up to 1.5 x the time the ring needs to decay to 5 % of its first swing
        y = np.abs(seg_v - np.median(seg_v[-max(4, seg_v.size // 5) :]))
        last = int(np.flatnonzero(y > 0.05 * y.max())[-1]) if y.max() > 0 else seg_v.size - 1
        keep = min(seg_v.size, max(40, int(1.5 * (last + 1))))
        seg_t, seg_v = seg_t[:keep], seg_v[:keep]
    if seg_t.size < 20:
        raise AnalysisInputError(f"only {seg_t.size} samples in the fitted segment; lengthen duration_s")
    t0 = float(seg_t[0])
    tr = seg_t - t0
    amp0, alpha0, f0, phi0, c0 = _initial_guess(tr, seg_v)
    scale_v = max(abs(amp0), float(np.ptp(seg_v)), 1e-30)
    tn = tr * f0  # time in periods of the guessed frequency: well conditioned

    def residual(p: NDArray[np.float64]) -> NDArray[np.float64]:
        a, an, fn, ph, c = p
        return (a * np.exp(-an * tn) * np.sin(2 * math.pi * fn * tn + ph) + c - seg_v) / scale_v

    p0 = np.array([abs(amp0), alpha0 / f0, 1.0, phi0 if amp0 >= 0 else phi0 + math.pi, c0])
    lower = np.array([0.0, 0.0, 0.2, -np.inf, -np.inf])
    upper = np.array([np.inf, np.inf, 5.0, np.inf, np.inf])
    sol = least_squares(residual, p0, bounds=(lower, upper), x_scale=np.array([scale_v, 0.1, 0.1, 1.0, scale_v]))
    a, an, fn, ph, c = (float(q) for q in sol.x)
    f = fn * f0
    alpha = an * f0
    wd = 2 * math.pi * f
    zeta = alpha / math.hypot(alpha, wd)
    rms_err = float(np.sqrt(np.mean((sol.fun * scale_v) ** 2)))
    ring_rms = float(np.std(seg_v))
    fit_ok = bool(sol.success) and rms_err < 0.5 * ring_rms
    if not sol.success:
        fit_reason = f"optimiser did not converge: {sol.message}"
    elif not fit_ok:
        fit_reason = (
            f"residual {rms_err:.4g} V rms is large against the ring ({ring_rms:.4g} V rms); "
            "the waveform is probably not a single damped sinusoid - adjust start_index or duration_s"
        )
    else:
        fit_reason = f"converged: {sol.message}"
    k_pk = int(np.argmax(np.abs(seg_v - c)))
    ph_wrapped = float((ph + math.pi) % (2 * math.pi) - math.pi)
    logger.debug("ring fit: f=%g Hz zeta=%g rms err=%g V", f, zeta, rms_err)
    return RingingFit(
        f_ring_hz=f,
        f_natural_hz=math.hypot(alpha, wd) / (2 * math.pi),
        damping_ratio=zeta,
        decay_rate_per_s=alpha,
        tau_s=math.inf if alpha == 0 else 1.0 / alpha,
        q_factor=math.inf if zeta == 0 else 1.0 / (2.0 * zeta),
        amplitude_v=a,
        phase_rad=ph_wrapped,
        offset_v=c,
        peak_v=float(seg_v[k_pk]),
        peak_time_s=float(seg_t[k_pk]),
        fit_rms_error_v=rms_err,
        start_index=int(start_index),
        start_time_s=t0,
        samples_used=int(seg_t.size),
        fit_ok=fit_ok,
        fit_reason=fit_reason,
    )


def parasitics_from_two_frequencies(f1_hz: float, f2_hz: float, c_add_f: float) -> ParasiticLC:
    """Parasitic C and L from the ring frequency without (``f1_hz``) and with
    (``f2_hz``) an added known capacitance ``c_add_f``.

    C_par = C_add/((f1/f2)² − 1); L_par = 1/((2π·f1)²·C_par). Two-capacitor method,
    common practice in snubber application notes (e.g. R. Severns, "Design of Snubbers
    for Power Circuits", Cornell Dubilier — from memory).
    """
    for name, value in (("f1_hz", f1_hz), ("f2_hz", f2_hz), ("c_add_f", c_add_f)):
        if not (math.isfinite(value) and value > 0):
            raise AnalysisInputError(f"{name} must be a positive finite number, got {value!r}")
    if not f2_hz < f1_hz:
        raise AnalysisInputError(
            f"f2_hz ({f2_hz:.6g} Hz, with C_add) must be below f1_hz ({f1_hz:.6g} Hz, without it); "
            "adding capacitance lowers the ring frequency - check the order of the arguments"
        )
    c_par = c_add_f / ((f1_hz / f2_hz) ** 2 - 1.0)
    l_par = 1.0 / ((2 * math.pi * f1_hz) ** 2 * c_par)
    return ParasiticLC(
        c_par_f=c_par,
        l_par_h=l_par,
        z0_ohm=math.sqrt(l_par / c_par),
        f1_hz=float(f1_hz),
        f2_hz=float(f2_hz),
        c_add_f=float(c_add_f),
    )


def rc_snubber(
    c_par_f: float,
    l_par_h: float,
    *,
    v_switch_v: float,
    fsw_hz: float,
    c_multiple: float = 3.0,
) -> RcSnubberDesign:
    """Suggest an RC snubber for a ring of parasitic ``c_par_f`` and ``l_par_h``.

    R = √(L_par/C_par) (the tank's characteristic impedance, for damping near ζ ≈ 0.5);
    C = ``c_multiple`` × C_par (3–4 usual) so that R, not C_par, dominates at the ring
    frequency; loss P = C·V²·fs. Mohan, Undeland & Robbins, Power Electronics, 3rd ed.,
    ch. 27 "Snubber Circuits", and R. Severns, "Design of Snubbers for Power Circuits"
    (both from memory).
    """
    for name, value in (("c_par_f", c_par_f), ("l_par_h", l_par_h), ("fsw_hz", fsw_hz), ("c_multiple", c_multiple)):
        if not (math.isfinite(value) and value > 0):
            raise AnalysisInputError(f"{name} must be a positive finite number, got {value!r}")
    if not (math.isfinite(v_switch_v) and v_switch_v >= 0):
        raise AnalysisInputError(f"v_switch_v must be zero or positive volts, got {v_switch_v!r}")
    c = c_multiple * c_par_f
    return RcSnubberDesign(
        r_ohm=math.sqrt(l_par_h / c_par_f),
        c_f=c,
        c_multiple=float(c_multiple),
        loss_w=c * v_switch_v**2 * fsw_hz,
        v_switch_v=float(v_switch_v),
        fsw_hz=float(fsw_hz),
    )


def ring_start_index(v: ArrayLike, tail_fraction: float = 0.2, drop: float = 0.05) -> int:
    """First sample after the peak (and any flat clamp plateau) that has fallen ``drop`` of the
    way toward the settled value (median of the last ``tail_fraction`` of the record)."""
    v = np.asarray(v, dtype=float)
    k = int(np.argmax(v))
    settled = float(np.median(v[-max(4, int(tail_fraction * v.size)):]))
    limit = v[k] - drop * (v[k] - settled)
    after = np.flatnonzero(v[k:] < limit)
    return k + int(after[0]) if after.size else k
