"""Rational transfer-function fit to frequency-response data, and the loop split.

Method:

1. Frequency normalization: s~ = s / w_n with w_n the geometric centre of the
   band (rad/s), and unit-norm columns, for a well-conditioned linear problem.
2. Levy's linearized least squares (E. C. Levy, "Complex-curve fitting," IRE
   Trans. Autom. Control AC-4:37-43, 1959): minimize sum |w_k (H_k D(s_k) - N(s_k))|^2,
   real and imaginary parts stacked, with D's constant term fixed to 1.
3. Sanathanan-Koerner iteration (IEEE Trans. Autom. Control AC-8(1):56-58, 1963):
   repeat step 2 with weights divided by |D_prev(s_k)|, so at convergence the
   error minimized is the true error H - N/D rather than Levy's H*D - N.
4. Refinement with ``scipy.optimize.least_squares`` on the weighted *relative*
   complex error N/(D*H) - 1 (real and imaginary parts). For small errors this is
   the log error ln|N/(DH)| + j*angle(N/(DH)): log-magnitude in nepers and phase
   in radians, which matches how Bode data are judged, and is smooth where a
   wrapped phase error would not be.

The default weight is 1/|H_k| (relative error) times the user's optional
weights. Because D(0) = 1, a model with a pole at the origin cannot be fitted;
plants (control-to-output, duty-to-output) have none.

Automatic order choice (:func:`fit_plant_auto`): every proper model with
1 <= den_order <= max_order and 0 <= num_order <= den_order is fitted; the one
with the fewest coefficients (then the lowest error) whose rms relative error is
within ``tolerance`` (default 50 %) of the best error of all candidates, or below
``error_floor`` (default 1e-4, far below any measurement), is chosen. On clean
data the true order reaches the floor; on noisy data extra coefficients only fit
noise and improve the error by a few per cent, so they are not chosen.
"""

from __future__ import annotations

import logging
import math
from dataclasses import dataclass, field, replace
from typing import Any

import numpy as np
from numpy.typing import ArrayLike, NDArray
from scipy.optimize import least_squares

from benchctl.analysis.frequency_response import check_response
from benchctl.errors import AnalysisInputError

__all__ = [
    "Resonance",
    "FitError",
    "PlantFit",
    "fit_plant",
    "fit_plant_auto",
    "extract_plant",
]

logger = logging.getLogger(__name__)


@dataclass(frozen=True)
class Resonance:
    """A complex pole pair: natural frequency ``f0_hz`` = |p|/2pi and Q = |p|/(-2 Re p).

    Q is negative for a right-half-plane (unstable) pair.
    """

    f0_hz: float
    q: float


@dataclass(frozen=True)
class FitError:
    """How far the model is from the data, over all samples.

    ``rms_relative`` = sqrt(mean |H_fit/H - 1|^2) (dimensionless);
    ``max_gain_error_db`` = max |20 log10 |H_fit/H||; ``max_phase_error_deg`` =
    max |angle(H_fit/H)|.
    """

    rms_relative: float
    max_gain_error_db: float
    max_phase_error_deg: float


@dataclass(frozen=True)
class PlantFit:
    """A fitted rational model N(s)/D(s), s in rad/s.

    ``num`` and ``den`` hold coefficients in descending powers of s (the
    numpy.polyval / scipy.signal.freqs convention), with den[-1] = 1, so
    ``dc_gain`` = num[-1]. Poles and zeros are in rad/s (complex);
    ``rhp_zeros_rad_s`` are the zeros with positive real part (they limit the
    usable crossover), ``unstable_poles_rad_s`` the poles with Re >= 0.
    """

    num: tuple[float, ...]
    den: tuple[float, ...]
    num_order: int
    den_order: int
    dc_gain: float
    poles_rad_s: tuple[complex, ...]
    zeros_rad_s: tuple[complex, ...]
    rhp_zeros_rad_s: tuple[complex, ...]
    unstable_poles_rad_s: tuple[complex, ...]
    resonances: tuple[Resonance, ...]
    fit_error: FitError
    iterations: int
    notes: tuple[str, ...] = field(default=())

    @property
    def poles_hz(self) -> tuple[complex, ...]:
        """Poles divided by 2pi (Hz), complex."""
        return tuple(p / (2.0 * math.pi) for p in self.poles_rad_s)

    @property
    def zeros_hz(self) -> tuple[complex, ...]:
        """Zeros divided by 2pi (Hz), complex."""
        return tuple(z / (2.0 * math.pi) for z in self.zeros_rad_s)

    @property
    def rhp_zero_freqs_hz(self) -> tuple[float, ...]:
        """|z|/2pi of each right-half-plane zero, ascending (Hz)."""
        return tuple(sorted(abs(z) / (2.0 * math.pi) for z in self.rhp_zeros_rad_s))

    def response(self, freq_hz: ArrayLike) -> NDArray[np.complex128]:
        """Model response N(j2pi f)/D(j2pi f) at ``freq_hz`` (Hz)."""
        s = 2j * math.pi * np.asarray(freq_hz, dtype=float)
        return np.polyval(self.num, s) / np.polyval(self.den, s)


def fit_plant(
    freq_hz: ArrayLike,
    response: ArrayLike,
    *,
    num_order: int,
    den_order: int,
    weights: ArrayLike | None = None,
    max_iterations: int = 30,
    refine: bool = True,
) -> PlantFit:
    """Fit N(s)/D(s) with the given orders to complex ``response`` at ``freq_hz`` (Hz).

    Levy (1959) + Sanathanan-Koerner (1963) iteration, then least-squares
    refinement on the relative error (see module docstring). ``weights`` (one
    per sample, >= 0) multiply the default relative weighting.
    """
    if num_order < 0 or den_order < 1:
        raise AnalysisInputError(
            f"fit_plant: need num_order >= 0 and den_order >= 1, got {num_order} and {den_order}"
        )
    n_coef = num_order + den_order + 1
    f, h = check_response(freq_hz, response, min_points=n_coef, where="fit_plant")
    user_w = _check_weights(weights, f.size)
    if max_iterations < 1:
        raise AnalysisInputError(f"fit_plant: max_iterations must be >= 1, got {max_iterations}")

    w_n = math.sqrt(2.0 * math.pi * f[0] * 2.0 * math.pi * f[-1])
    s = 1j * (2.0 * math.pi * f) / w_n
    base_w = user_w / np.abs(h)
    m, n = num_order, den_order
    s_num = np.vander(s, m + 1, increasing=True)  # s^0..s^m
    s_den = np.vander(s, n + 1, increasing=True)[:, 1:]  # s^1..s^n

    notes: list[str] = []
    d_prev = np.ones_like(s)
    b = np.zeros(m + 1)
    a = np.zeros(n)
    iterations = 0
    for iterations in range(1, max_iterations + 1):
        wk = base_w / np.abs(d_prev)
        a_mat = np.hstack([s_num, -h[:, None] * s_den]) * wk[:, None]
        rhs = h * wk
        a_real = np.vstack([a_mat.real, a_mat.imag])
        r_real = np.concatenate([rhs.real, rhs.imag])
        scale = np.linalg.norm(a_real, axis=0)
        scale[scale == 0.0] = 1.0
        sol, *_ = np.linalg.lstsq(a_real / scale, r_real, rcond=None)
        sol = sol / scale
        b_new, a_new = sol[: m + 1], sol[m + 1 :]
        change = float(np.linalg.norm(sol - np.concatenate([b, a]))) / max(float(np.linalg.norm(sol)), 1e-300)
        b, a = b_new, a_new
        d_prev = 1.0 + s_den @ a
        if np.any(d_prev == 0.0):
            d_prev = np.where(d_prev == 0.0, 1e-300, d_prev)
        if change < 1e-10:
            break
    else:
        notes.append(
            f"Sanathanan-Koerner iteration stopped after {max_iterations} steps without settling"
        )

    x0 = np.concatenate([b, a])
    if refine:

        def residual(p: NDArray[np.float64]) -> NDArray[np.float64]:
            num_v = s_num @ p[: m + 1]
            den_v = 1.0 + s_den @ p[m + 1 :]
            e = user_w * (num_v / (den_v * h) - 1.0)
            return np.concatenate([e.real, e.imag])

        r0 = float(np.sum(residual(x0) ** 2))
        sol = least_squares(residual, x0, method="lm", x_scale="jac", xtol=1e-14, ftol=1e-14)
        if np.all(np.isfinite(sol.x)) and float(np.sum(sol.fun**2)) <= r0:
            x0 = sol.x
        else:
            notes.append("least-squares refinement did not improve the linear fit; kept the latter")
    b, a = x0[: m + 1], x0[m + 1 :]

    # back from s~ = s / w_n to s: coefficient of s^k is c_k / w_n^k
    b_s = b / w_n ** np.arange(m + 1)
    a_s = np.concatenate([[1.0], a / w_n ** np.arange(1, n + 1)])
    num = tuple(float(v) for v in b_s[::-1])
    den = tuple(float(v) for v in a_s[::-1])

    poles_n = np.roots(np.concatenate([a[::-1], [1.0]])) if n > 0 else np.array([])
    zeros_n = np.roots(b[::-1]) if m > 0 else np.array([])
    poles = tuple(complex(p) * w_n for p in _sorted_roots(poles_n))
    zeros = tuple(complex(z) * w_n for z in _sorted_roots(zeros_n))
    rhp_zeros = tuple(z for z in zeros if z.real > 0.0)
    unstable = tuple(p for p in poles if p.real >= 0.0)
    if unstable:
        notes.append(
            f"{len(unstable)} fitted pole(s) in the right half plane: check the orders "
            "or the data (an unstable plant is unusual)"
        )
    resonances = tuple(
        Resonance(f0_hz=abs(p) / (2.0 * math.pi), q=abs(p) / (-2.0 * p.real) if p.real != 0 else math.inf)
        for p in poles
        if p.imag > 0.0
    )
    model = np.polyval(num, 2j * math.pi * f) / np.polyval(den, 2j * math.pi * f)
    ratio = model / h
    err = FitError(
        rms_relative=float(np.sqrt(np.mean(np.abs(ratio - 1.0) ** 2))),
        max_gain_error_db=float(np.max(np.abs(20.0 * np.log10(np.abs(ratio))))),
        max_phase_error_deg=float(np.max(np.abs(np.rad2deg(np.angle(ratio))))),
    )
    logger.debug(
        "fit_plant: orders %d/%d, %d SK iterations, rms relative error %.3g",
        m, n, iterations, err.rms_relative,
    )
    return PlantFit(
        num=num,
        den=den,
        num_order=m,
        den_order=n,
        dc_gain=float(b_s[0]),
        poles_rad_s=poles,
        zeros_rad_s=zeros,
        rhp_zeros_rad_s=rhp_zeros,
        unstable_poles_rad_s=unstable,
        resonances=resonances,
        fit_error=err,
        iterations=iterations,
        notes=tuple(notes),
    )


def fit_plant_auto(
    freq_hz: ArrayLike,
    response: ArrayLike,
    *,
    max_order: int = 4,
    weights: ArrayLike | None = None,
    tolerance: float = 0.5,
    error_floor: float = 1e-4,
) -> PlantFit:
    """Fit every proper model up to ``max_order`` and choose the order by the rule in
    the module docstring; the chosen fit's ``notes`` list every candidate's error."""
    if max_order < 1:
        raise AnalysisInputError(f"fit_plant_auto: max_order must be >= 1, got {max_order}")
    if tolerance < 0.0 or error_floor < 0.0:
        raise AnalysisInputError("fit_plant_auto: tolerance and error_floor must be >= 0")
    f, h = check_response(freq_hz, response, min_points=2 * max_order + 1, where="fit_plant_auto")
    fits: list[PlantFit] = []
    for n in range(1, max_order + 1):
        for m in range(0, n + 1):
            fits.append(fit_plant(f, h, num_order=m, den_order=n, weights=weights))
    best = min(fit.fit_error.rms_relative for fit in fits)
    limit = max(best * (1.0 + tolerance), error_floor)
    acceptable = [fit for fit in fits if fit.fit_error.rms_relative <= limit]
    chosen = min(
        acceptable,
        key=lambda fit: (fit.num_order + fit.den_order, fit.fit_error.rms_relative),
    )
    table = ", ".join(
        f"{fit.num_order}/{fit.den_order}: {fit.fit_error.rms_relative:.3g}" for fit in fits
    )
    note = (
        f"order {chosen.num_order}/{chosen.den_order} chosen: fewest coefficients with rms "
        f"relative error <= max(best {best:.3g} x {1.0 + tolerance:g}, floor {error_floor:g}); "
        f"candidates (num/den: error) {table}"
    )
    return replace(chosen, notes=chosen.notes + (note,))


def extract_plant(
    freq_hz: ArrayLike,
    loop_response: ArrayLike,
    compensator_response: ArrayLike,
) -> NDArray[np.complex128]:
    """Plant response T/H from a measured loop gain T and a known compensator H.

    Both are complex, sampled at ``freq_hz`` (Hz), with the same sign
    convention (T = H * plant), as in Middlebrook's loop split (R. D.
    Middlebrook, Int. J. Electronics 38(4):485-512, 1975).
    """
    f, t = check_response(freq_hz, loop_response, min_points=1, where="extract_plant (loop)")
    _, hc = check_response(f, compensator_response, min_points=1, where="extract_plant (compensator)")
    return t / hc


def _check_weights(weights: ArrayLike | None, size: int) -> NDArray[np.float64]:
    if weights is None:
        return np.ones(size)
    w = np.asarray(weights, dtype=float)
    if w.shape != (size,):
        raise AnalysisInputError(
            f"fit_plant: weights has shape {w.shape}, expected ({size},): one weight per sample"
        )
    if not np.all(np.isfinite(w)) or np.any(w < 0.0) or not np.any(w > 0.0):
        raise AnalysisInputError(
            "fit_plant: weights must be finite, >= 0 and not all zero"
        )
    return w


def _sorted_roots(r: NDArray[np.floating[Any] | np.complexfloating[Any, Any]]) -> NDArray[np.complex128]:
    """Roots (real or complex, as ``numpy.roots`` returns them) by ascending magnitude, then imaginary part."""
    return np.array(sorted(r, key=lambda z: (abs(z), z.imag)), dtype=complex)
