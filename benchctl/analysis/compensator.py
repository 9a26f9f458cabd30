"""Type 2 and type 3 error-amplifier design by the K factor, with E-series parts.

Method: H. D. Venable, "The K Factor: A New Mathematical Tool for Stability
Analysis and Synthesis," Proc. Powercon 10, 1983 (formulas from memory):

* boost = PM - P - 90 deg, P = plant phase at the target crossover fc;
  G = 1/|plant(fc)| is the compensator gain needed at fc.
* Type 2: K = tan(boost/2 + 45 deg), zero at fc/K, pole at fc*K;
  C2 = 1/(2 pi fc G K R1), C1 = C2 (K^2 - 1), R2 = K/(2 pi fc C1).
* Type 3: K = tan^2(boost/4 + 45 deg), double zero at fc/sqrt(K), double pole at
  fc*sqrt(K); C2 = 1/(2 pi fc G R1), C1 = C2 (K - 1), R2 = sqrt(K)/(2 pi fc C1),
  R3 = R1/(K - 1), C3 = 1/(2 pi fc sqrt(K) R3).

Network (inverting op-amp, R1 from the output sense node to the inverting
input): feedback Z_f = (R2 + 1/(s C1)) || 1/(s C2); input Z_in = R1 (type 2) or
R1 || (R3 + 1/(s C3)) (type 3). The op-amp itself gives V_out/V_in = -Z_f/Z_in.
Sign convention: the inversion *is* the loop's negative-feedback summing point,
so the factor that enters the loop gain is Gc = Z_f/Z_in and T = Gc * plant,
with margins taken on T for the closed loop T/(1 + T) (see margins.py).

Rounding: resistors R2, R3 to ``resistor_series`` (default E96), capacitors to
``capacitor_series`` (default E12), by nearest log distance (IEC 60063); R1 is
the user's choice and is kept. The predicted loop with the rounded parts is
evaluated on a dense grid and analysed with :func:`benchctl.analysis.margins.loop_margins`:
by default fc/1000 .. 100*fc (200 points/decade) for a model or callable plant --
a fitted model is then used beyond its measured band, so pass ``grid_freq_hz`` to
stay inside it -- and the measured band itself for a :class:`MeasuredPlant`.

Warnings (common practice): boost outside what the type can give (type 2:
0..90 deg, type 3: 0..180 deg; the design then uses the nearest achievable
boost, 5 deg inside the limit, and says so); fc > fsw/5; fc > f_RHPz/3;
rounded-part phase margin more than 5 deg from the target; parts in
impractical ranges (C < 10 pF, R < 100 ohm or > 10 Mohm).
"""

from __future__ import annotations

import logging
import math
from collections.abc import Callable
from dataclasses import dataclass
from typing import Union

import numpy as np
from numpy.typing import ArrayLike, NDArray

from benchctl.analysis.eseries import nearest_preferred, series_values
from benchctl.analysis.frequency_response import (
    check_response,
    interpolate_response,
    unwrapped_phase_deg,
)
from benchctl.analysis.margins import LoopMargins, NotFound, loop_margins
from benchctl.analysis.plant_fit import PlantFit
from benchctl.errors import AnalysisInputError

__all__ = [
    "CompensatorParts",
    "MeasuredPlant",
    "CompensatorDesign",
    "compensator_response",
    "design_type2",
    "design_type3",
]

logger = logging.getLogger(__name__)

_PM_TOLERANCE_DEG = 5.0
_BOOST_INSET_DEG = 5.0


@dataclass(frozen=True)
class CompensatorParts:
    """Component values of a type 2 or type 3 network (ohms, farads).

    ``r3_ohm`` and ``c3_f`` are None for type 2 and required for type 3.
    """

    kind: int
    r1_ohm: float
    r2_ohm: float
    c1_f: float
    c2_f: float
    r3_ohm: float | None = None
    c3_f: float | None = None

    def __post_init__(self) -> None:
        if self.kind not in (2, 3):
            raise AnalysisInputError(f"CompensatorParts: kind must be 2 or 3, got {self.kind}")
        values = {"r1_ohm": self.r1_ohm, "r2_ohm": self.r2_ohm, "c1_f": self.c1_f, "c2_f": self.c2_f}
        if self.kind == 3:
            if self.r3_ohm is None or self.c3_f is None:
                raise AnalysisInputError(
                    "CompensatorParts: a type 3 network needs r3_ohm and c3_f; "
                    "give both or use kind=2"
                )
            values.update(r3_ohm=self.r3_ohm, c3_f=self.c3_f)
        for name, v in values.items():
            if not (isinstance(v, (int, float)) and math.isfinite(v) and v > 0.0):
                raise AnalysisInputError(
                    f"CompensatorParts: {name} must be a finite value > 0, got {v!r}"
                )


@dataclass(frozen=True, eq=False)
class MeasuredPlant:
    """A plant given as measured arrays: ``freq_hz`` (Hz) and complex ``response``.

    Values between samples are interpolated (log-magnitude and unwrapped phase,
    linear in log-frequency); nothing is extrapolated outside the band.
    """

    freq_hz: NDArray[np.float64]
    response: NDArray[np.complex128]

    def __post_init__(self) -> None:
        f, h = check_response(self.freq_hz, self.response, min_points=2, where="MeasuredPlant")
        object.__setattr__(self, "freq_hz", f)
        object.__setattr__(self, "response", h)


PlantInput = Union[PlantFit, MeasuredPlant, Callable[[NDArray[np.float64]], NDArray[np.complex128]]]


@dataclass(frozen=True)
class CompensatorDesign:
    """Result of a K-factor design.

    ``boost_required_deg`` is PM - P - 90; ``boost_deg`` is the boost designed
    for (equal unless outside what the type can give, see ``warnings``).
    ``zero_hz``/``pole_hz`` are the (double, for type 3) zero and pole.
    ``predicted_ideal``/``predicted_rounded`` are the margins of Gc * plant with
    the exact and the E-series parts.
    """

    kind: int
    crossover_hz: float
    target_phase_margin_deg: float
    plant_gain_db: float
    plant_phase_deg: float
    boost_required_deg: float
    boost_deg: float
    k_factor: float
    zero_hz: float
    pole_hz: float
    ideal_parts: CompensatorParts
    rounded_parts: CompensatorParts
    predicted_ideal: LoopMargins
    predicted_rounded: LoopMargins
    warnings: tuple[str, ...]

    @property
    def predicted_crossover_hz(self) -> float | None:
        """Crossover with rounded parts (Hz), or None (reason in predicted_rounded)."""
        return self.predicted_rounded.crossover_hz

    @property
    def predicted_phase_margin_deg(self) -> float | None:
        """Worst phase margin with rounded parts (deg), or None."""
        return self.predicted_rounded.worst_phase_margin_deg

    @property
    def predicted_gain_margin_db(self) -> float | None:
        """Gain margin closest to 0 dB with rounded parts (dB), or None if unbounded in band."""
        return self.predicted_rounded.worst_gain_margin_db


def compensator_response(
    freq_hz: ArrayLike, parts: CompensatorParts, *, inverting: bool = False
) -> NDArray[np.complex128]:
    """Response of the network at ``freq_hz`` (Hz).

    Returns Gc = Z_f/Z_in, the factor entering the loop gain (phase near fc is
    -90 + boost deg), or with ``inverting=True`` the op-amp's own
    V_out/V_in = -Z_f/Z_in (what an analyzer across the amplifier shows).
    """
    s = 2j * math.pi * np.asarray(freq_hz, dtype=float)
    z_f = _parallel(parts.r2_ohm + 1.0 / (s * parts.c1_f), 1.0 / (s * parts.c2_f))
    if parts.kind == 2:
        z_in: NDArray[np.complex128] | float = parts.r1_ohm
    else:
        assert parts.r3_ohm is not None and parts.c3_f is not None
        z_in = _parallel(parts.r1_ohm, parts.r3_ohm + 1.0 / (s * parts.c3_f))
    gc = z_f / z_in
    return -gc if inverting else gc


def design_type2(
    plant: PlantInput,
    *,
    crossover_hz: float,
    phase_margin_deg: float,
    r1_ohm: float = 10e3,
    fsw_hz: float | None = None,
    rhp_zero_hz: float | None = None,
    resistor_series: str = "E96",
    capacitor_series: str = "E12",
    grid_freq_hz: ArrayLike | None = None,
) -> CompensatorDesign:
    """K-factor type 2 design (Venable 1983) for crossover ``crossover_hz`` (Hz) and
    ``phase_margin_deg`` (deg); see the module docstring for formulas and warnings."""
    return _design(
        2, plant, crossover_hz, phase_margin_deg, r1_ohm, fsw_hz, rhp_zero_hz,
        resistor_series, capacitor_series, grid_freq_hz,
    )


def design_type3(
    plant: PlantInput,
    *,
    crossover_hz: float,
    phase_margin_deg: float,
    r1_ohm: float = 10e3,
    fsw_hz: float | None = None,
    rhp_zero_hz: float | None = None,
    resistor_series: str = "E96",
    capacitor_series: str = "E12",
    grid_freq_hz: ArrayLike | None = None,
) -> CompensatorDesign:
    """K-factor type 3 design (Venable 1983) for crossover ``crossover_hz`` (Hz) and
    ``phase_margin_deg`` (deg); see the module docstring for formulas and warnings."""
    return _design(
        3, plant, crossover_hz, phase_margin_deg, r1_ohm, fsw_hz, rhp_zero_hz,
        resistor_series, capacitor_series, grid_freq_hz,
    )


def _design(
    kind: int,
    plant: PlantInput,
    fc: float,
    pm_deg: float,
    r1: float,
    fsw_hz: float | None,
    rhp_zero_hz: float | None,
    resistor_series: str,
    capacitor_series: str,
    grid_freq_hz: ArrayLike | None,
) -> CompensatorDesign:
    """Venable's K-factor design: plant at fc -> boost -> K -> parts -> rounding -> checks."""
    where = f"design_type{kind}"
    _check_inputs(where, fc, pm_deg, r1, fsw_hz, rhp_zero_hz, resistor_series, capacitor_series)
    evaluate, grid, rhp_from_fit = _plant_access(plant, fc, grid_freq_hz, where)
    gain_fc, phase_fc = _plant_at(evaluate, plant, fc)

    boost_required = pm_deg - phase_fc - 90.0
    boost, warnings = _feasible_boost(kind, boost_required)
    k, ideal, zero_hz, pole_hz = _ideal_parts(kind, boost, fc, 1.0 / gain_fc, r1)
    rounded = _rounded_parts(ideal, resistor_series, capacitor_series)

    plant_grid = evaluate(grid)
    predicted_ideal = loop_margins(grid, compensator_response(grid, ideal) * plant_grid)
    predicted_rounded = loop_margins(grid, compensator_response(grid, rounded) * plant_grid)

    warnings += _rule_of_thumb_warnings(fc, fsw_hz, [*rhp_from_fit, *([rhp_zero_hz] if rhp_zero_hz else [])])
    warnings += _rounding_warnings(predicted_rounded, pm_deg, limited=boost != boost_required)
    warnings += _practical_range(rounded)
    for w in warnings:
        logger.debug("%s: %s", where, w)

    return CompensatorDesign(
        kind=kind,
        crossover_hz=float(fc),
        target_phase_margin_deg=float(pm_deg),
        plant_gain_db=float(20.0 * math.log10(gain_fc)),
        plant_phase_deg=float(phase_fc),
        boost_required_deg=float(boost_required),
        boost_deg=float(boost),
        k_factor=float(k),
        zero_hz=float(zero_hz),
        pole_hz=float(pole_hz),
        ideal_parts=ideal,
        rounded_parts=rounded,
        predicted_ideal=predicted_ideal,
        predicted_rounded=predicted_rounded,
        warnings=tuple(warnings),
    )


def _check_inputs(where: str, fc: float, pm_deg: float, r1: float, fsw_hz: float | None,
                  rhp_zero_hz: float | None, resistor_series: str, capacitor_series: str) -> None:
    """Refuse a design request that cannot mean anything (AnalysisInputError naming the argument)."""
    if not (isinstance(fc, (int, float)) and math.isfinite(fc) and fc > 0.0):
        raise AnalysisInputError(f"{where}: crossover_hz must be a finite value > 0, got {fc!r}")
    if not (isinstance(pm_deg, (int, float)) and 0.0 < pm_deg < 180.0):
        raise AnalysisInputError(
            f"{where}: phase_margin_deg must lie in (0, 180) deg, got {pm_deg!r}; 45..70 is usual"
        )
    if not (isinstance(r1, (int, float)) and math.isfinite(r1) and r1 > 0.0):
        raise AnalysisInputError(f"{where}: r1_ohm must be a finite value > 0, got {r1!r}")
    if fsw_hz is not None and not (math.isfinite(fsw_hz) and fsw_hz > 0.0):
        raise AnalysisInputError(f"{where}: fsw_hz must be a finite value > 0, got {fsw_hz!r}")
    if rhp_zero_hz is not None and not (math.isfinite(rhp_zero_hz) and rhp_zero_hz > 0.0):
        raise AnalysisInputError(f"{where}: rhp_zero_hz must be a finite value > 0, got {rhp_zero_hz!r}")
    series_values(resistor_series)
    series_values(capacitor_series)


def _feasible_boost(kind: int, boost_required: float) -> tuple[float, list[str]]:
    """The boost a type 2 (< 90 deg) or type 3 (< 180 deg) can give, with a warning when limited."""
    limit = 90.0 if kind == 2 else 180.0
    if boost_required >= limit:
        boost = limit - _BOOST_INSET_DEG
        return boost, [
            f"required boost {boost_required:.1f} deg is impossible for a type {kind} "
            f"(< {limit:.0f} deg): designed for {boost:.1f} deg, so the phase margin target "
            f"is not met; {'use a type 3, ' if kind == 2 else ''}lower fc or the target PM"
        ]
    if boost_required <= 0.0:
        boost = _BOOST_INSET_DEG
        return boost, [
            f"required boost {boost_required:.1f} deg is <= 0: the plant already gives the "
            f"target phase margin at fc; designed for a minimal {boost:.1f} deg boost "
            "(a type 1 integrator would also do)"
        ]
    return boost_required, []


def _ideal_parts(kind: int, boost: float, fc: float, g: float, r1: float
                 ) -> tuple[float, CompensatorParts, float, float]:
    """(K, ideal parts, zero Hz, pole Hz) by Venable's formulas for the gain ``g`` needed at fc."""
    if kind == 2:
        k = math.tan(math.radians(boost / 2.0 + 45.0))
        c2 = 1.0 / (2.0 * math.pi * fc * g * k * r1)
        c1 = c2 * (k * k - 1.0)
        r2 = k / (2.0 * math.pi * fc * c1)
        return k, CompensatorParts(kind=2, r1_ohm=r1, r2_ohm=r2, c1_f=c1, c2_f=c2), fc / k, fc * k
    k = math.tan(math.radians(boost / 4.0 + 45.0)) ** 2
    sk = math.sqrt(k)
    c2 = 1.0 / (2.0 * math.pi * fc * g * r1)
    c1 = c2 * (k - 1.0)
    r2 = sk / (2.0 * math.pi * fc * c1)
    r3 = r1 / (k - 1.0)
    c3 = 1.0 / (2.0 * math.pi * fc * sk * r3)
    parts = CompensatorParts(kind=3, r1_ohm=r1, r2_ohm=r2, c1_f=c1, c2_f=c2, r3_ohm=r3, c3_f=c3)
    return k, parts, fc / sk, fc * sk


def _rounded_parts(ideal: CompensatorParts, resistor_series: str, capacitor_series: str) -> CompensatorParts:
    """The ideal parts rounded to the nearest preferred values (IEC 60063); R1 is kept as chosen."""
    def r(value: float) -> float:
        return nearest_preferred(value, resistor_series)

    def c(value: float) -> float:
        return nearest_preferred(value, capacitor_series)

    return CompensatorParts(kind=ideal.kind, r1_ohm=ideal.r1_ohm, r2_ohm=r(ideal.r2_ohm), c1_f=c(ideal.c1_f),
                            c2_f=c(ideal.c2_f), r3_ohm=None if ideal.r3_ohm is None else r(ideal.r3_ohm),
                            c3_f=None if ideal.c3_f is None else c(ideal.c3_f))


def _rule_of_thumb_warnings(fc: float, fsw_hz: float | None, rhp_zeros_hz: list[float]) -> list[str]:
    """fc <= fsw/5 and fc <= f_RHPz/3 (common practice)."""
    warnings = []
    if fsw_hz is not None and fc > fsw_hz / 5.0:
        warnings.append(
            f"fc {fc:g} Hz is above fsw/5 = {fsw_hz / 5.0:g} Hz: the averaged plant model is "
            "unreliable there; fc <= fsw/5..fsw/10 is common practice"
        )
    if rhp_zeros_hz:
        f_rhp = min(rhp_zeros_hz)
        if fc > f_rhp / 3.0:
            warnings.append(
                f"fc {fc:g} Hz is above f_RHPz/3 = {f_rhp / 3.0:g} Hz (RHP zero at {f_rhp:g} Hz): "
                "its phase lag makes the margin fragile; fc <= f_RHPz/3..f_RHPz/5 is common practice"
            )
    return warnings


def _rounding_warnings(predicted_rounded: LoopMargins, pm_deg: float, *, limited: bool) -> list[str]:
    """A warning when the rounded parts miss the target phase margin by more than the tolerance."""
    pm_r = predicted_rounded.worst_phase_margin
    if isinstance(pm_r, NotFound):
        return [f"with rounded parts: {pm_r.reason}"]
    if abs(pm_r.phase_margin_deg - pm_deg) > _PM_TOLERANCE_DEG:
        cause = "because the boost was limited (see above)" if limited else "from rounding; try a finer series"
        return [
            f"with rounded parts the phase margin is {pm_r.phase_margin_deg:.1f} deg at "
            f"{pm_r.freq_hz:g} Hz, more than {_PM_TOLERANCE_DEG:g} deg from the {pm_deg:g} deg "
            f"target, {cause}"
        ]
    return []


def _plant_access(
    plant: PlantInput, fc: float, grid_freq_hz: ArrayLike | None, where: str
) -> tuple[Callable[[NDArray[np.float64]], NDArray[np.complex128]], NDArray[np.float64], tuple[float, ...]]:
    """(evaluate(freq_hz), analysis grid, RHP-zero frequencies known from a fit)."""
    rhp: tuple[float, ...] = ()
    if isinstance(plant, MeasuredPlant):
        f0, f1 = float(plant.freq_hz[0]), float(plant.freq_hz[-1])
        if not (f0 <= fc <= f1):
            raise AnalysisInputError(
                f"{where}: crossover {fc:g} Hz lies outside the measured plant band "
                f"{f0:g}..{f1:g} Hz; measure a wider band or choose fc inside it"
            )

        def evaluate(freq_hz: NDArray[np.float64]) -> NDArray[np.complex128]:
            return interpolate_response(plant.freq_hz, plant.response, freq_hz)

        decades = math.log10(f1 / f0)
        default_grid = np.logspace(
            math.log10(f0), math.log10(f1), max(plant.freq_hz.size, int(200 * decades) + 1)
        )
    elif isinstance(plant, PlantFit):
        evaluate = plant.response
        rhp = plant.rhp_zero_freqs_hz
        default_grid = np.logspace(math.log10(fc) - 3.0, math.log10(fc) + 2.0, 1001)
    elif callable(plant):

        def evaluate(freq_hz: NDArray[np.float64]) -> NDArray[np.complex128]:
            return np.asarray(plant(freq_hz), dtype=complex)

        default_grid = np.logspace(math.log10(fc) - 3.0, math.log10(fc) + 2.0, 1001)
    else:
        raise AnalysisInputError(
            f"{where}: plant must be a PlantFit, a MeasuredPlant or a callable "
            f"freq_hz -> complex response, got {type(plant).__name__}"
        )
    if grid_freq_hz is None:
        grid = np.asarray(default_grid, dtype=float)
    else:
        grid = np.asarray(grid_freq_hz, dtype=float)
        check_response(grid, np.ones(grid.size), min_points=3, where=f"{where} (grid_freq_hz)")
        if not (grid[0] < fc < grid[-1]):
            raise AnalysisInputError(
                f"{where}: grid_freq_hz {grid[0]:g}..{grid[-1]:g} Hz must contain fc {fc:g} Hz"
            )
    return evaluate, grid, rhp


def _plant_at(
    evaluate: Callable[[NDArray[np.float64]], NDArray[np.complex128]],
    plant: PlantInput,
    fc: float,
) -> tuple[float, float]:
    """|plant(fc)| and its phase in degrees, unwrapped from low frequency."""
    if isinstance(plant, MeasuredPlant):
        f = plant.freq_hz
        phase = unwrapped_phase_deg(plant.response)
        p_fc = float(np.interp(math.log10(fc), np.log10(f), phase))
        mag = float(abs(interpolate_response(f, plant.response, fc)))
    else:
        path = np.logspace(math.log10(fc) - 4.0, math.log10(fc), 801)
        h = evaluate(path)
        if not np.all(np.isfinite(h)) or np.any(h == 0.0):
            raise AnalysisInputError(
                "plant response is zero or not finite between fc/1e4 and fc; "
                "check the plant model"
            )
        p_fc = float(unwrapped_phase_deg(h)[-1])
        mag = float(abs(h[-1]))
    return mag, p_fc


def _practical_range(parts: CompensatorParts) -> list[str]:
    out: list[str] = []
    for name in ("c1_f", "c2_f", "c3_f"):
        v = getattr(parts, name)
        if v is not None and v < 10e-12:
            out.append(f"{name} = {v:.3g} F is below 10 pF, comparable to stray capacitance; raise R1")
    for name in ("r2_ohm", "r3_ohm"):
        v = getattr(parts, name)
        if v is not None and v < 100.0:
            out.append(f"{name} = {v:.3g} ohm is below 100 ohm and loads the op-amp; raise R1")
        if v is not None and v > 10e6:
            out.append(f"{name} = {v:.3g} ohm is above 10 Mohm, prone to leakage and noise; lower R1")
    return out


def _parallel(a: NDArray[np.complex128] | float, b: NDArray[np.complex128] | float) -> NDArray[np.complex128]:
    """Two impedances in parallel (ohms), as a complex array."""
    return np.asarray(a * b / (a + b), dtype=complex)
