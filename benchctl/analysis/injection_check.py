"""Quality of a loop-gain measurement: trace summaries and the half/double injection check.

Injection (R. D. Middlebrook, "Measurement of loop gain in feedback systems", Int. J.
Electronics 38(4):485-512, 1975; MIDDLEBROOK-1975 in :mod:`benchctl.references`) must be
small enough to keep the loop linear and large enough to beat the noise. The rule of thumb
(common practice) is that halving or doubling a good injection changes nothing: a change
with a systematic loss of gain at the larger amplitude means the loop is compressed
(injection too large); a change without one, or a rough trace near crossover, means the
measurement is noise-limited (injection too small). Pure functions: arrays in, values out.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any, Mapping

import numpy as np


@dataclass(frozen=True)
class CheckTolerances:
    """How far the margins may move when the injection is halved or doubled, and the noise limit."""

    crossover_rel: float = 0.05   # relative change of the crossover frequency
    phase_margin_deg: float = 2.0
    gain_margin_db: float = 1.0
    noise_limit_db: float = 0.2   # gain scatter near crossover, dB rms


@dataclass(frozen=True)
class TraceSummary:
    """Margins of one trace and its quality, as stored on the point (None = not found)."""

    crossover_hz: float | None
    phase_margin_deg: float | None
    phase_crossover_hz: float | None
    gain_margin_db: float | None
    modulus_margin: float
    modulus_margin_freq_hz: float
    gain_crossover_count: int
    phase_crossover_count: int
    pm_reason: str
    gm_reason: str
    notes: tuple[str, ...]
    #: The full result these figures were taken from (a :class:`~benchctl.analysis.margins.LoopMargins`).
    margins: Any = None


def scatter_db(freq_hz: np.ndarray, small: np.ndarray, large: np.ndarray, centre_hz: float | None,
               decades: float = 0.5) -> float:
    """Noise of the larger-injection sweep, dB rms, from two sweeps of the same loop.

    The difference d = 20·log10|large/small| cancels every real feature of the response
    (resonances included), leaving the two sweeps' noise. Noise scales as 1/amplitude
    (see the simulated analyzer and Middlebrook's injection), so with amplitudes A and A/2,
    var d = σ_A² + (2σ_A)² = 5σ_A². σ of d is taken robustly as 1.4826·MAD (common robust
    statistics) within ±``decades`` of ``centre_hz`` (the whole band when None).
    """
    d = 20.0 * np.log10(np.abs(large) / np.abs(small))
    x = np.log10(freq_hz)
    sel = np.ones(x.size, bool) if centre_hz is None else np.abs(x - math.log10(centre_hz)) <= decades
    if sel.sum() < 5:
        sel = np.ones(x.size, bool)
    w = d[sel]
    return float(1.4826 * np.median(np.abs(w - np.median(w))) / math.sqrt(5.0))


def summarize(freq_hz: np.ndarray, response: np.ndarray, phase_convention: str) -> TraceSummary:
    """Margins of one trace (benchctl.analysis.margins.loop_margins), None where not found."""
    from benchctl.analysis.margins import NotFound, checked_phase_convention, loop_margins

    m = loop_margins(freq_hz, response, phase_convention=checked_phase_convention(phase_convention))
    fc = m.crossover_hz
    wpm, wgm = m.worst_phase_margin, m.worst_gain_margin
    return TraceSummary(
        crossover_hz=fc,
        phase_margin_deg=m.worst_phase_margin_deg,
        phase_crossover_hz=None if isinstance(wgm, NotFound) else wgm.freq_hz,
        gain_margin_db=m.worst_gain_margin_db,
        modulus_margin=m.modulus_margin,
        modulus_margin_freq_hz=m.modulus_margin_freq_hz,
        gain_crossover_count=len(m.gain_crossovers),
        phase_crossover_count=len(m.phase_crossovers),
        pm_reason=wpm.reason if isinstance(wpm, NotFound) else "",
        gm_reason=wgm.reason if isinstance(wgm, NotFound) else "",
        notes=m.notes,
        margins=m,
    )


def compression_db(freq_hz: np.ndarray, small: np.ndarray, large: np.ndarray, window: int = 7,
                   min_db: float = 0.5, z_min: float = 4.0) -> tuple[float, float]:
    """(dip dB, at Hz): the most negative significant running median of 20·log10|large/small|.

    A dip means the larger injection reads less gain over several neighbouring points —
    the signature of a compressed (saturating) loop — while noise averages out. A window
    counts when its median is below −``min_db`` and more than ``z_min`` standard errors of
    the median (1.253·σ/√n, σ from the window's MAD × 1.4826; common robust statistics)
    below zero. Returns (0.0, nan) when no window qualifies.
    """
    d = 20.0 * np.log10(np.abs(large) / np.abs(small))
    half = window // 2
    best, at = 0.0, float("nan")
    for i in range(half, d.size - half):
        w = d[i - half:i + half + 1]
        med = float(np.median(w))
        sigma = 1.4826 * float(np.median(np.abs(w - med)))
        stderr = 1.253 * sigma / math.sqrt(w.size)
        if med < -min_db and med < -z_min * stderr and med < best:
            best, at = med, float(freq_hz[i])
    return best, at


@dataclass(frozen=True)
class InjectionVerdict:
    """Outcome of the half/double injection check. ``verdict``: ok, too_small, too_large
    or near_compression (linear at the chosen amplitude, compressed at double)."""

    verdict: str
    flagged: bool
    reason: str
    max_pm_change_deg: float | None
    changes: tuple[str, ...]


def _compare(name: str, base: Mapping[str, Any], other: Mapping[str, Any], tol: CheckTolerances) -> list[str]:
    out = []
    for key, limit, unit, rel in (("crossover_hz", tol.crossover_rel, "Hz", True),
                                  ("phase_margin_deg", tol.phase_margin_deg, "deg", False),
                                  ("gain_margin_db", tol.gain_margin_db, "dB", False)):
        a, b = number_or_none(base.get(key)), number_or_none(other.get(key))
        if a is None and b is None:
            continue
        if a is None or b is None:
            out.append(f"{name}: {key} found in one sweep only ({a} vs {b})")
            continue
        change = abs(b - a) / abs(a) if rel else abs(b - a)
        if change > limit:
            shown = f"{100 * change:.1f} %" if rel else f"{change:.2f} {unit}"
            allowed = f"{100 * limit:g} %" if rel else f"{limit:g} {unit}"
            out.append(f"{name}: {key} {a:.4g} -> {b:.4g} ({shown} > {allowed})")
    return out


def injection_verdict(base: Mapping[str, Any], half: Mapping[str, Any] | None, double: Mapping[str, Any] | None,
                      tol: CheckTolerances) -> InjectionVerdict:
    """Judge the injection from the base, half and double sweeps' stored values.

    Each mapping holds crossover_hz, phase_margin_deg and gain_margin_db; ``base`` also
    ``gain_noise_db``, the chosen sweep's noise near crossover (:func:`scatter_db` of the
    half sweep against it); half/double also ``gain_shift_db``, the compression dip of the larger against the
    smaller amplitude (:func:`compression_db`, 0 when none). In this order: a rough trace
    near crossover is noise-limited (too_small); a dip between half and chosen amplitude
    means the chosen one compresses (too_large); margins that move only on doubling with a
    dip there are near_compression; margins that move otherwise are noise (too_small).
    """
    half_changes = _compare("half", base, half, tol) if half is not None else []
    double_changes = _compare("double", base, double, tol) if double is not None else []
    changes = half_changes + double_changes
    pm_changes = []
    for other in (half, double):
        a = number_or_none(base.get("phase_margin_deg"))
        b = number_or_none(other.get("phase_margin_deg")) if other is not None else None
        if a is not None and b is not None:
            pm_changes.append(abs(a - b))
    max_pm = max(pm_changes) if pm_changes else None
    noise = number_or_none(base.get("gain_noise_db")) or 0.0
    shift_half = (number_or_none(half.get("gain_shift_db")) or 0.0) if half is not None else 0.0
    shift_double = (number_or_none(double.get("gain_shift_db")) or 0.0) if double is not None else 0.0
    if noise > tol.noise_limit_db:
        verdict, reason = "too_small", (
            f"the measurement is noise-limited: gain scatter near crossover {noise:.3g} dB rms is above "
            f"{tol.noise_limit_db:g} dB; raise the injection (more where the loop gain is high), narrow the "
            "bandwidth or average more")
    elif shift_half < 0.0:
        verdict, reason = "too_large", (
            f"the loop is compressed at the chosen injection: it reads {-shift_half:.2f} dB less gain than with "
            "half the injection; lower the injection (or its profile near and above crossover)")
    elif double_changes and not half_changes and shift_double < 0.0:
        verdict, reason = "near_compression", (
            f"linear at the chosen injection, but doubling it compresses the loop ({-shift_double:.2f} dB less "
            "gain) and moves the margins: little headroom, consider a smaller injection")
    elif changes:
        verdict, reason = "too_small", (
            "the margins move when the injection is halved or doubled without a systematic loss of gain, "
            "i.e. noise: " + "; ".join(changes))
    else:
        verdict, reason = "ok", "halving and doubling the injection changes nothing beyond the tolerances"
    return InjectionVerdict(verdict, verdict != "ok", reason, max_pm, tuple(changes))


def number_or_none(value: Any) -> float | None:
    """A finite float, or None for None, text that is not a number, NaN and infinities."""
    if value is None:
        return None
    try:
        v = float(value)
    except (TypeError, ValueError):
        return None
    return v if math.isfinite(v) else None
