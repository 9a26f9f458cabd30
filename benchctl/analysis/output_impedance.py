"""Closed-loop output impedance from a frequency-response ratio, and its figures.

Measurement (common practice): a current stimulus i is drawn from the output (an
electronic load's modulation input driven by the analyzer's source, or a current
injector); the analyzer's ch1 sees the load's current monitor, ch2 the output voltage,
and it reports H = (s2·v2)/(s1·v1). The current drawn out of the converter makes the
output fall, so Z_out = −v_out/i_load (the sign convention of Erickson & Maksimović,
*Fundamentals of Power Electronics*, 2nd ed., ch. 9, where the closed loop gives
Z_out = Z_out,open/(1 + T)). Whatever limits the stimulus's own bandwidth (the
modulator) divides out of the ratio; a single-pole current monitor of bandwidth f_mon
does not, and :func:`impedance_from_ratio` removes it: i = v1·(1 + jf/f_mon)/r_mon.

Figures (:func:`impedance_summary`): the peak |Z| and its frequency (a peak at either
end of the band is flagged ``at_band_edge``: the true peak may lie outside), |Z| at
the lowest frequency.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
from numpy.typing import ArrayLike, NDArray

from benchctl.analysis.frequency_response import check_response, unwrapped_phase_deg
from benchctl.errors import AnalysisInputError

__all__ = ["ImpedanceSummary", "closed_loop_impedance", "impedance_from_ratio", "impedance_summary",
           "magnitude_db_ohm", "monitor_correction", "phase_deg"]


def monitor_correction(freq_hz: ArrayLike, monitor_bandwidth_hz: float | None) -> NDArray[np.complex128]:
    """1 + jf/f_mon: what a single-pole monitor of bandwidth ``monitor_bandwidth_hz`` took away
    (1 everywhere for None or inf: an ideal monitor)."""
    f = np.asarray(freq_hz, dtype=float)
    if monitor_bandwidth_hz is None or math.isinf(monitor_bandwidth_hz):
        return np.ones(f.shape, dtype=np.complex128)
    if not monitor_bandwidth_hz > 0:
        raise AnalysisInputError(f"monitor bandwidth {monitor_bandwidth_hz!r} Hz must be > 0 (or None: ideal)")
    return (1.0 + 1j * f / float(monitor_bandwidth_hz)).astype(np.complex128)


def impedance_from_ratio(freq_hz: ArrayLike, ratio: ArrayLike, *, monitor_bandwidth_hz: float | None = None,
                         current_sign: float = -1.0) -> NDArray[np.complex128]:
    """Z_out (Ω, complex) from the analyzer's ratio H = v_out/i_monitored (ch1 scaled to amperes).

    ``current_sign`` −1: ch1 shows the current drawn by the load (out of the converter), so
    Z = −H; +1 for a monitor wired the other way. The monitor's pole is divided out.
    """
    f, h = check_response(freq_hz, ratio, min_points=1, where="output impedance ratio")
    if current_sign not in (-1.0, 1.0):
        raise AnalysisInputError(f"current_sign must be -1 or +1, not {current_sign!r}")
    return (current_sign * h / monitor_correction(f, monitor_bandwidth_hz)).astype(np.complex128)


def closed_loop_impedance(z_open: ArrayLike, loop_gain: ArrayLike) -> NDArray[np.complex128]:
    """Z_out,closed = Z_out,open/(1 + T) pointwise (Erickson & Maksimović 2nd ed., ch. 9)."""
    z = np.asarray(z_open, dtype=complex)
    t = np.asarray(loop_gain, dtype=complex)
    if z.shape != t.shape:
        raise AnalysisInputError(f"Z_open has {z.shape} samples and T has {t.shape}; give them on one grid")
    return (z / (1.0 + t)).astype(np.complex128)


def magnitude_db_ohm(z_ohm: ArrayLike) -> NDArray[np.float64]:
    """20·log10(|Z|/1 Ω), dBΩ."""
    return (20.0 * np.log10(np.abs(np.asarray(z_ohm, dtype=complex)))).astype(np.float64)


@dataclass(frozen=True)
class ImpedanceSummary:
    """Figures of one impedance trace. Ω, Hz, dB."""

    peak_ohm: float
    peak_freq_hz: float
    peak_at_band_edge: bool
    low_freq_ohm: float
    low_freq_hz: float
    band_min_hz: float
    band_max_hz: float
    notes: tuple[str, ...] = field(default=())

    @property
    def flags(self) -> tuple[str, ...]:
        return ("at_band_edge",) if self.peak_at_band_edge else ()


def impedance_summary(freq_hz: ArrayLike, z_ohm: ArrayLike, *, edge_points: int = 1) -> ImpedanceSummary:
    """Peak |Z| and where, and |Z| at the lowest frequency; see the module docstring.

    The peak is refined by a parabola through log|Z| against log f at the largest sample
    and its neighbours; it is ``at_band_edge`` within ``edge_points`` samples of either end.
    """
    f, z = check_response(freq_hz, z_ohm, min_points=3, where="output impedance")
    mag = np.abs(z)
    k = int(np.argmax(mag))
    edge = k < edge_points or k > f.size - 1 - edge_points
    peak, at = float(mag[k]), float(f[k])
    notes: list[str] = []
    if not edge and 0 < k < f.size - 1:
        x = np.log10(f[k - 1:k + 2])
        y = np.log10(mag[k - 1:k + 2])
        a, b, c = np.polyfit(x, y, 2)
        if a < 0:
            xv = -b / (2.0 * a)
            if x[0] <= xv <= x[2]:
                peak, at = float(10.0 ** (c - b * b / (4.0 * a))), float(10.0 ** xv)
    if edge:
        notes.append(f"largest |Z| at the band edge ({at:g} Hz): the peak may lie outside "
                     f"{f[0]:g}..{f[-1]:g} Hz; extend the sweep")
    return ImpedanceSummary(peak_ohm=peak, peak_freq_hz=at, peak_at_band_edge=edge, low_freq_ohm=float(mag[0]),
                            low_freq_hz=float(f[0]), band_min_hz=float(f[0]), band_max_hz=float(f[-1]),
                            notes=tuple(notes))


def phase_deg(z_ohm: ArrayLike) -> NDArray[np.float64]:
    """Unwrapped phase of Z, degrees (first sample in (−270, 90])."""
    return unwrapped_phase_deg(z_ohm)
