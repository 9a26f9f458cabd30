"""Stability margins of a measured loop gain T(j2*pi*f).

Definitions (Erickson & Maksimovic, Fundamentals of Power Electronics, 2nd ed.,
ch. 9, from memory): a gain crossover fc is where |T| = 1 and its phase margin is
PM = 180 deg + angle T(fc); a phase crossover is where the phase of T crosses
-180 deg (or -180 - 360k deg, or +180 deg: any crossing of the negative real
axis) and its gain margin is GM = -20*log10|T| there. The modulus (vector) margin
min |1 + T| over the band is common practice in control texts. Margins assume the
negative-feedback closed loop T/(1 + T).

How the data are read:

* Between samples log|T| and the unwrapped phase are linear in log-frequency
  (as on a Bode plot); crossings are interpolated on that model.
* Phase margins are wrapped to [-180, 180) deg, the same convention as
  python-control ``stability_margins``; the unwrapped phase at fc is kept too.
* Every crossing present in the data is reported. Noise can make |T| chatter
  around 1; by default nothing is hidden, and a note is written when two
  crossings of the same kind lie closer than 0.05 decade. Two opt-in remedies:
  ``smooth_points`` (centred moving average of log|T| and unwrapped phase over
  that many samples) and ``merge_decades`` (consecutive crossings of the same
  kind closer than this are one cluster: an odd cluster is reported once, at its
  middle crossing, with ``multiplicity`` = cluster size; an even cluster has no
  net crossing and is dropped, with a note).
* A crossing is flagged ``near_band_edge`` when it lies less than
  ``edge_decades`` (default 1/3 decade) from either end of the band, or within
  the first/last ``edge_points`` sample intervals: a partner crossing may lie
  just outside the measured band, and analyzer data are least trustworthy there.
* "Not found in the measured band" is an explicit :class:`NotFound` value with
  its reason, never an invented number.
* Unwrapping needs neighbouring samples closer than 180 deg in phase; from the
  first interval whose step exceeds ``unwrap_step_limit_deg`` (default 90 deg,
  :func:`benchctl.analysis.frequency_response.large_phase_steps`) on, phase
  crossings may be invented or missed: they carry ``unwrap_ambiguous``, the
  result says from where (``unwrap_ambiguous_from_hz``) and a note asks for a
  denser sweep.

Phase convention: ``"loop"`` means the data are T itself. ``"inverted"`` means
the analyzer shows -T (it reports the inverting error amplifier's 180 deg, so the
displayed phase at crossover reads directly as the phase margin); the data are
negated before analysis (common practice).
"""

from __future__ import annotations

import logging
import math
from dataclasses import dataclass
from typing import Any, Literal

import numpy as np
from numpy.typing import ArrayLike, NDArray

from benchctl.analysis.frequency_response import (
    UNWRAP_STEP_LIMIT_DEG,
    check_response,
    large_phase_steps,
    response_from_gain_phase,
    unwrapped_phase_deg,
)
from benchctl.errors import AnalysisInputError

__all__ = [
    "NotFound",
    "GainCrossover",
    "PhaseCrossover",
    "LoopMargins",
    "checked_phase_convention",
    "loop_margins",
    "response_from_gain_phase",
    "closed_loop_q",
]

logger = logging.getLogger(__name__)

PhaseConvention = Literal["loop", "inverted"]

_CHATTER_NOTE_DECADES = 0.05
_MIN_POINTS = 3


@dataclass(frozen=True)
class NotFound:
    """An explicit "not found" result; ``reason`` says why, in plain words."""

    reason: str


@dataclass(frozen=True)
class GainCrossover:
    """A frequency where |T| = 1.

    ``phase_deg`` is the unwrapped phase of T there; ``phase_margin_deg`` is
    180 + phase_deg wrapped to [-180, 180). ``direction`` is "falling" when |T|
    goes from above 1 to below 1 as frequency rises, else "rising".
    """

    freq_hz: float
    phase_deg: float
    phase_margin_deg: float
    direction: str
    near_band_edge: bool
    multiplicity: int = 1
    unwrap_ambiguous: bool = False


@dataclass(frozen=True)
class PhaseCrossover:
    """A frequency where the phase of T crosses ``phase_level_deg`` (-180 + 360k).

    ``gain_db`` = 20*log10|T| there and ``gain_margin_db`` = -gain_db: positive
    means the loop gain may rise that much before instability, negative (a
    conditionally stable loop below crossover) means it may fall that much.
    """

    freq_hz: float
    phase_level_deg: float
    gain_db: float
    gain_margin_db: float
    near_band_edge: bool
    multiplicity: int = 1
    unwrap_ambiguous: bool = False


@dataclass(frozen=True)
class LoopMargins:
    """All margins found in the measured band.

    ``worst_phase_margin`` is the gain crossover with the smallest (signed)
    phase margin; ``worst_gain_margin`` the phase crossover whose gain margin is
    closest to 0 dB (smallest |GM|, as python-control picks it). Either is a
    :class:`NotFound` when the band holds no such crossing.
    ``modulus_margin`` = min |1 + T| (dimensionless) at ``modulus_margin_freq_hz``.
    ``unwrap_ambiguous_from_hz`` is the lower end of the first interval whose phase step
    is too large to unwrap without ambiguity (None when there is none); crossings from
    there up carry ``unwrap_ambiguous``. ``flags`` lists "unwrap_ambiguous" then.
    """

    gain_crossovers: tuple[GainCrossover, ...]
    phase_crossovers: tuple[PhaseCrossover, ...]
    worst_phase_margin: GainCrossover | NotFound
    worst_gain_margin: PhaseCrossover | NotFound
    modulus_margin: float
    modulus_margin_freq_hz: float
    band_min_hz: float
    band_max_hz: float
    phase_convention: str
    notes: tuple[str, ...]
    unwrap_ambiguous_from_hz: float | None = None

    @property
    def flags(self) -> tuple[str, ...]:
        return ("unwrap_ambiguous",) if self.unwrap_ambiguous_from_hz is not None else ()

    @property
    def worst_phase_margin_deg(self) -> float | None:
        """Smallest phase margin in degrees, or None (reason in ``worst_phase_margin``)."""
        w = self.worst_phase_margin
        return None if isinstance(w, NotFound) else w.phase_margin_deg

    @property
    def crossover_hz(self) -> float | None:
        """Frequency of the worst-phase-margin crossover in Hz, or None."""
        w = self.worst_phase_margin
        return None if isinstance(w, NotFound) else w.freq_hz

    @property
    def worst_gain_margin_db(self) -> float | None:
        """Gain margin closest to 0 dB, in dB, or None (reason in ``worst_gain_margin``)."""
        w = self.worst_gain_margin
        return None if isinstance(w, NotFound) else w.gain_margin_db

    def to_dict(self) -> dict[str, Any]:
        """Plain values for JSON, the store and reports: the worst margins (None where not found,
        with the reason under ``not_found``), every crossing, and the notes."""
        wpm, wgm = self.worst_phase_margin, self.worst_gain_margin
        return {
            "crossover_hz": self.crossover_hz,
            "phase_margin_deg": self.worst_phase_margin_deg,
            "phase_crossover_hz": None if isinstance(wgm, NotFound) else wgm.freq_hz,
            "gain_margin_db": self.worst_gain_margin_db,
            "modulus_margin": self.modulus_margin,
            "modulus_margin_freq_hz": self.modulus_margin_freq_hz,
            "not_found": {"phase_margin": wpm.reason if isinstance(wpm, NotFound) else None,
                          "gain_margin": wgm.reason if isinstance(wgm, NotFound) else None},
            "gain_crossovers": [{"freq_hz": g.freq_hz, "phase_margin_deg": g.phase_margin_deg,
                                 "direction": g.direction, "near_band_edge": g.near_band_edge,
                                 "multiplicity": g.multiplicity, "unwrap_ambiguous": g.unwrap_ambiguous}
                                for g in self.gain_crossovers],
            "phase_crossovers": [{"freq_hz": c.freq_hz, "gain_margin_db": c.gain_margin_db,
                                  "phase_level_deg": c.phase_level_deg, "near_band_edge": c.near_band_edge,
                                  "multiplicity": c.multiplicity, "unwrap_ambiguous": c.unwrap_ambiguous}
                                 for c in self.phase_crossovers],
            "band_min_hz": self.band_min_hz,
            "band_max_hz": self.band_max_hz,
            "phase_convention": self.phase_convention,
            "unwrap_ambiguous_from_hz": self.unwrap_ambiguous_from_hz,
            "flags": list(self.flags),
            "notes": list(self.notes),
        }


def closed_loop_q(phase_margin_deg: float) -> float:
    """Closed-loop Q of a loop with a single-pole-plus-integrator shape near crossover.

    Q = sqrt(cos(pm)) / sin(pm) for 0 < pm < 90 deg (Erickson & Maksimovic, 2nd ed.,
    sec. 9.4, from memory). Exact for T = 1/((s/w0)(1 + s/w2)); an estimate otherwise.
    """
    if not (0.0 < phase_margin_deg < 90.0):
        raise AnalysisInputError(
            f"closed_loop_q: phase margin {phase_margin_deg} deg is outside (0, 90) deg, "
            "where the relation holds"
        )
    phi = math.radians(phase_margin_deg)
    return math.sqrt(math.cos(phi)) / math.sin(phi)


@dataclass(frozen=True)
class _Crossing:
    index: int  # interval between sample index and index + 1
    frac: float  # position inside the interval, 0..1, in log-frequency
    log_f: float
    rising: bool
    level: float


def checked_phase_convention(value: str, where: str = "loop_margins") -> PhaseConvention:
    """``value`` (text from a caller, a file or the store) as a :data:`PhaseConvention`:
    ``"loop"`` when the data are T, ``"inverted"`` when the analyzer shows -T."""
    if value == "loop":
        return "loop"
    if value == "inverted":
        return "inverted"
    raise AnalysisInputError(
        f"{where}: phase_convention {value!r} is unknown; use 'loop' when "
        "the data are T, or 'inverted' when the analyzer shows -T"
    )


def loop_margins(
    freq_hz: ArrayLike,
    response: ArrayLike,
    *,
    phase_convention: PhaseConvention = "loop",
    smooth_points: int = 1,
    merge_decades: float = 0.0,
    edge_decades: float = 1.0 / 3.0,
    edge_points: int = 2,
    unwrap_step_limit_deg: float = UNWRAP_STEP_LIMIT_DEG,
) -> LoopMargins:
    """Gain and phase crossovers, phase/gain margins and modulus margin of T.

    ``freq_hz`` (Hz, strictly increasing) and complex ``response`` (T, or -T when
    ``phase_convention="inverted"``); build the complex array from Bode data with
    :func:`response_from_gain_phase`. See the module docstring for the
    interpolation, noise and band-edge rules.
    """
    f, h = check_response(freq_hz, response, min_points=_MIN_POINTS, where="loop_margins")
    t = -h if checked_phase_convention(phase_convention) == "inverted" else h
    if smooth_points < 1 or smooth_points % 2 == 0:
        raise AnalysisInputError(
            f"loop_margins: smooth_points must be an odd number >= 1, got {smooth_points}"
        )
    if smooth_points > f.size:
        raise AnalysisInputError(
            f"loop_margins: smooth_points={smooth_points} exceeds the {f.size} samples given"
        )
    if merge_decades < 0.0 or edge_decades < 0.0 or edge_points < 0:
        raise AnalysisInputError(
            "loop_margins: merge_decades, edge_decades and edge_points must be >= 0"
        )

    notes: list[str] = []
    x = np.log10(f)
    big_steps = large_phase_steps(t, unwrap_step_limit_deg)
    first_bad = int(big_steps[0]) if big_steps.size else None
    if first_bad is not None:
        steps = np.abs(np.diff(unwrapped_phase_deg(t)))
        per_decade = (f.size - 1) / (x[-1] - x[0]) if x[-1] > x[0] else float(f.size)
        need = per_decade * float(steps[big_steps].max()) / 45.0
        notes.append(
            f"the phase changes by up to {steps[big_steps].max():.0f} deg between neighbouring samples from "
            f"{f[first_bad]:g} Hz up ({big_steps.size} interval(s) above {unwrap_step_limit_deg:g} deg): too far apart "
            "to unwrap without ambiguity, so phase crossings there may be invented or missed; sweep with at "
            f"least {math.ceil(need)} points per decade (now {per_decade:.0f}) or stop below {f[first_bad]:g} Hz"
        )

    def ambiguous(c: _Crossing) -> bool:
        return first_bad is not None and c.index >= first_bad
    log_mag = _smooth(np.log10(np.abs(t)), smooth_points)
    phase = _smooth(unwrapped_phase_deg(t), smooth_points)
    if smooth_points > 1:
        notes.append(f"log|T| and phase smoothed over {smooth_points} samples before the search")

    def near_edge(c: _Crossing) -> bool:
        n_int = f.size - 1
        by_points = c.index < edge_points or c.index >= n_int - edge_points
        by_decades = (c.log_f - x[0]) < edge_decades or (x[-1] - c.log_f) < edge_decades
        return bool(by_points or by_decades)

    # --- gain crossovers -------------------------------------------------------
    raw_gain = _crossings(x, log_mag, 0.0)
    gain_groups = _group(raw_gain, merge_decades, notes, "gain")
    gain_crossovers: list[GainCrossover] = []
    for c, count in gain_groups:
        ph = _at(phase, c)
        gain_crossovers.append(
            GainCrossover(
                freq_hz=float(10.0**c.log_f),
                phase_deg=float(ph),
                phase_margin_deg=_wrap_pm(ph),
                direction="falling" if not c.rising else "rising",
                near_band_edge=near_edge(c),
                multiplicity=count,
                unwrap_ambiguous=ambiguous(c),
            )
        )

    # --- phase crossovers ------------------------------------------------------
    levels = _odd_180_levels(float(phase.min()), float(phase.max()))
    raw_phase: list[_Crossing] = []
    phase_groups: list[tuple[_Crossing, int]] = []
    for level in levels:
        found = _crossings(x, phase, level)
        raw_phase.extend(found)
        phase_groups.extend(_group(found, merge_decades, notes, f"{level:g} deg phase"))
    phase_groups.sort(key=lambda item: item[0].log_f)
    phase_crossovers: list[PhaseCrossover] = []
    for c, count in phase_groups:
        g_db = 20.0 * _at(log_mag, c)
        phase_crossovers.append(
            PhaseCrossover(
                freq_hz=float(10.0**c.log_f),
                phase_level_deg=float(c.level),
                gain_db=float(g_db),
                gain_margin_db=float(-g_db),
                near_band_edge=near_edge(c),
                multiplicity=count,
                unwrap_ambiguous=ambiguous(c),
            )
        )

    if merge_decades == 0.0:
        _note_chatter(raw_gain, notes, "gain crossovers")
        by_level: dict[float, list[_Crossing]] = {}
        for c in raw_phase:
            by_level.setdefault(c.level, []).append(c)
        for level, group in by_level.items():
            _note_chatter(group, notes, f"{level:g} deg phase crossovers")

    # --- worst values and not-found reasons -------------------------------------
    worst_pm: GainCrossover | NotFound
    if gain_crossovers:
        worst_pm = min(gain_crossovers, key=lambda g: g.phase_margin_deg)
    else:
        lo, hi = 20.0 * float(log_mag.min()), 20.0 * float(log_mag.max())
        side = "above 1 (0 dB)" if lo > 0.0 else "below 1 (0 dB)"
        worst_pm = NotFound(
            f"no gain crossover in the measured band {f[0]:g}..{f[-1]:g} Hz: |T| stays "
            f"{side}, between {lo:.2f} and {hi:.2f} dB; extend the sweep "
            f"{'upward' if lo > 0.0 else 'downward'} to find it"
        )
    worst_gm: PhaseCrossover | NotFound
    if phase_crossovers:
        worst_gm = min(phase_crossovers, key=lambda p: abs(p.gain_margin_db))
    else:
        worst_gm = NotFound(
            f"no phase crossover of -180 deg (mod 360) in the measured band "
            f"{f[0]:g}..{f[-1]:g} Hz: the unwrapped phase stays between "
            f"{phase.min():.1f} and {phase.max():.1f} deg, so the gain margin is unbounded "
            "within this band"
        )
    for g in gain_crossovers:
        if g.near_band_edge:
            notes.append(
                f"gain crossover at {g.freq_hz:g} Hz lies near the band edge: "
                "extend the sweep to confirm it and to see any crossover beyond"
            )
    for p in phase_crossovers:
        if p.near_band_edge:
            notes.append(
                f"phase crossover at {p.freq_hz:g} Hz lies near the band edge: "
                "extend the sweep to confirm it"
            )

    mm, mm_f = _modulus_margin(x, log_mag, phase)
    if mm_f <= f[0] * (1.0 + 1e-12) or mm_f >= f[-1] * (1.0 - 1e-12):
        notes.append(
            f"min |1 + T| is at the band edge ({mm_f:g} Hz): the true modulus margin may be "
            "smaller outside the measured band"
        )
    for n in notes:
        logger.debug("loop_margins: %s", n)
    return LoopMargins(
        gain_crossovers=tuple(gain_crossovers),
        phase_crossovers=tuple(phase_crossovers),
        worst_phase_margin=worst_pm,
        worst_gain_margin=worst_gm,
        modulus_margin=mm,
        modulus_margin_freq_hz=mm_f,
        band_min_hz=float(f[0]),
        band_max_hz=float(f[-1]),
        phase_convention=phase_convention,
        notes=tuple(notes),
        unwrap_ambiguous_from_hz=None if first_bad is None else float(f[first_bad]),
    )


def _smooth(y: NDArray[np.float64], points: int) -> NDArray[np.float64]:
    """Centred moving average; the window shrinks symmetrically at the ends."""
    if points == 1:
        return y
    half = points // 2
    c = np.concatenate(([0.0], np.cumsum(y)))
    out = np.empty_like(y)
    n = y.size
    for i in range(n):
        k = min(half, i, n - 1 - i)
        out[i] = (c[i + k + 1] - c[i - k]) / (2 * k + 1)
    return out


def _crossings(x: NDArray[np.float64], y: NDArray[np.float64], level: float) -> list[_Crossing]:
    """Every crossing of ``level`` by piecewise-linear y(x); a sample equal to the level
    counts as above it."""
    above = y >= level
    idx = np.flatnonzero(above[:-1] != above[1:])
    out: list[_Crossing] = []
    for i in idx:
        y0, y1 = y[i] - level, y[i + 1] - level
        frac = float(y0 / (y0 - y1)) if y0 != y1 else 0.0
        frac = min(max(frac, 0.0), 1.0)
        out.append(
            _Crossing(
                index=int(i),
                frac=frac,
                log_f=float(x[i] + frac * (x[i + 1] - x[i])),
                rising=bool(y1 > y0),
                level=level,
            )
        )
    return out


def _group(
    crossings: list[_Crossing], merge_decades: float, notes: list[str], what: str
) -> list[tuple[_Crossing, int]]:
    """Merge consecutive crossings closer than ``merge_decades`` (see module docstring)."""
    if merge_decades == 0.0 or len(crossings) < 2:
        return [(c, 1) for c in crossings]
    clusters: list[list[_Crossing]] = [[crossings[0]]]
    for c in crossings[1:]:
        if c.log_f - clusters[-1][-1].log_f < merge_decades:
            clusters[-1].append(c)
        else:
            clusters.append([c])
    out: list[tuple[_Crossing, int]] = []
    for cl in clusters:
        if len(cl) % 2 == 1:
            out.append((cl[len(cl) // 2], len(cl)))
            if len(cl) > 1:
                notes.append(
                    f"{len(cl)} {what} crossings within {merge_decades:g} decade near "
                    f"{10.0 ** cl[len(cl) // 2].log_f:g} Hz merged into one"
                )
        else:
            notes.append(
                f"{len(cl)} {what} crossings between {10.0 ** cl[0].log_f:g} and "
                f"{10.0 ** cl[-1].log_f:g} Hz cancel out (even count within {merge_decades:g} "
                "decade) and were dropped as noise"
            )
    return out


def _note_chatter(crossings: list[_Crossing], notes: list[str], what: str) -> None:
    for a, b in zip(crossings, crossings[1:]):
        if b.log_f - a.log_f < _CHATTER_NOTE_DECADES:
            notes.append(
                f"{what} at {10.0 ** a.log_f:g} and {10.0 ** b.log_f:g} Hz are less than "
                f"{_CHATTER_NOTE_DECADES:g} decade apart: possibly noise; consider "
                "smooth_points or merge_decades"
            )


def _at(y: NDArray[np.float64], c: _Crossing) -> float:
    return float(y[c.index] + c.frac * (y[c.index + 1] - y[c.index]))


def _wrap_pm(phase_deg: float) -> float:
    """180 + phase wrapped to [-180, 180) degrees."""
    return float(((180.0 + phase_deg + 180.0) % 360.0) - 180.0)


def _odd_180_levels(lo: float, hi: float) -> list[float]:
    """All levels 180 + 360k (k integer) within [lo, hi]."""
    k_min = math.ceil((lo - 180.0) / 360.0)
    k_max = math.floor((hi - 180.0) / 360.0)
    return [180.0 + 360.0 * k for k in range(k_max, k_min - 1, -1)]


def _modulus_margin(
    x: NDArray[np.float64], log_mag: NDArray[np.float64], phase: NDArray[np.float64]
) -> tuple[float, float]:
    """min |1 + T| on the samples, refined on the interpolation model around the minimum."""
    t = (10.0**log_mag) * np.exp(1j * np.deg2rad(phase))
    k = int(np.argmin(np.abs(1.0 + t)))
    lo, hi = max(k - 1, 0), min(k + 1, x.size - 1)
    xs = np.linspace(x[lo], x[hi], 201)
    ts = (10.0 ** np.interp(xs, x, log_mag)) * np.exp(1j * np.deg2rad(np.interp(xs, x, phase)))
    d = np.abs(1.0 + ts)
    j = int(np.argmin(d))
    return float(d[j]), float(10.0 ** xs[j])
