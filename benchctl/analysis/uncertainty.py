"""Measurement uncertainty of readings and of the figures derived from them (first order).

The method is that of JCGM 100:2008, the GUM:

* type B from an instrument's accuracy specification (GUM 4.3): a reading ``x`` is within
  ``±a`` of the true value, ``a = pct_of_reading/100·|x| + offset`` (the term of the
  smallest range whose ``range_max`` is >= ``|x|``). With nothing else known the error is
  taken uniform over ``±a`` (rectangular, GUM 4.3.7): ``u = a/√3``; a triangular
  distribution gives ``a/√6`` (GUM 4.3.9); a specification stated as an expanded
  uncertainty at coverage factor ``k`` gives ``a/k`` (GUM 4.3.3, "normal");
* type A from the scatter of the N readings a recorded value is the mean of (GUM 4.2.2,
  4.2.3): ``u = s/√N`` with ``s`` the experimental standard deviation of the readings
  (stored as ``<base>_sd_<unit>`` beside ``<base>_<unit>``, with ``n_readings``);
* the law of propagation of uncertainty (GUM 5.1.2, and 5.2.2 with correlations):
  ``u_c²(y) = Σ c_i² u²(x_i) + 2 Σ_{i<j} c_i c_j u(x_i, x_j)`` with the sensitivity
  coefficients ``c_i = ∂f/∂x_i`` at the estimates;
* the expanded uncertainty ``U = k·u_c`` with ``k = 2`` (GUM 6.2.1, 6.3.3: about 95 %
  coverage for a near-normal output).

Correlation (GUM 5.2.2; F.1.2.3 on readings of one instrument, from memory). The
assumption made here, stated so that a reader can disagree with it: the
``pct_of_reading`` part of a specification is one gain (calibration) error of the
instrument for that quantity and range, common to every reading it takes of that
quantity on that range, so two such readings are fully correlated (r = 1) in that part;
the ``offset`` part (noise, linearity, zero drift) and the type A scatter are independent
between readings. Readings of different instruments are independent. An instrument is
identified by the ``instrument`` text given with its readings (the station takes its
resource string, so two roles served by one instrument share their gain errors). The
covariance ``u(x_i, x_j) = u_g,i·u_g,j`` with ``u_g = (pct/100·|x|)/divisor`` keeps the
covariance matrix positive semi-definite (it is ``g·gᵀ`` plus a non-negative diagonal).

For efficiency η = Pout/Pin from two separate meters the terms are independent, so
``(u(η)/η)² = (u(Pout)/Pout)² + (u(Pin)/Pin)²`` (GUM 5.1.6 for a product of powers).
For a difference of two readings of the same meter (line and load regulation) the shared
gain error largely cancels; for the four-point average efficiency it does not cancel
(every point is scaled by the same gain).

Pure functions: no I/O, no instruments, no database.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field

import numpy as np

#: Coverage factor of the expanded uncertainty (GUM 6.2.1, 6.3.3).
COVERAGE_FACTOR = 2.0

RECTANGULAR = "rectangular"
TRIANGULAR = "triangular"
NORMAL = "normal"
DISTRIBUTIONS = (RECTANGULAR, TRIANGULAR, NORMAL)

#: The measured quantities an accuracy is given for (what measure_voltage,
#: measure_current, measure_power and measure_temperature return; a temperature's offset is
#: in K and its % of reading is of the reading in °C, as thermocouple tolerances are stated).
MEASURED_QUANTITIES = ("voltage", "current", "power", "temperature")


# ---------------------------------------------------------------- specifications
@dataclass(frozen=True)
class AccuracyTerm:
    """``±(pct_of_reading % of reading + offset)`` on readings up to ``range_max``.

    ``offset`` and ``range_max`` are in the quantity's SI unit (V, A, W); ``range_max``
    None means every reading. ``distribution`` is how the error is spread over the bound
    (see the module docstring); ``coverage_factor`` is used by ``"normal"`` only.
    """

    pct_of_reading: float
    offset: float
    range_max: float | None = None
    distribution: str = RECTANGULAR
    coverage_factor: float = 2.0

    @property
    def divisor(self) -> float:
        """a / u: √3 rectangular (GUM 4.3.7), √6 triangular (GUM 4.3.9), k normal (GUM 4.3.3)."""
        if self.distribution == RECTANGULAR:
            return math.sqrt(3.0)
        if self.distribution == TRIANGULAR:
            return math.sqrt(6.0)
        if self.distribution == NORMAL:
            return float(self.coverage_factor)
        raise ValueError(f"distribution must be one of {', '.join(DISTRIBUTIONS)}, not {self.distribution!r}")

    def half_width(self, reading: float) -> float:
        """The bound a = pct/100·|x| + offset, in the reading's unit."""
        return self.pct_of_reading / 100.0 * abs(reading) + self.offset

    def standard(self, reading: float) -> float:
        """Type B standard uncertainty a/divisor of one reading."""
        return self.half_width(reading) / self.divisor

    def gain_standard(self, reading: float) -> float:
        """The part of :meth:`standard` due to the % of reading term (the shared gain error)."""
        return self.pct_of_reading / 100.0 * abs(reading) / self.divisor


@dataclass(frozen=True)
class QuantityAccuracy:
    """An instrument's accuracy for one measured quantity: one term, or one per range
    (ascending ``range_max``; a reading uses the smallest range >= |reading|)."""

    terms: tuple[AccuracyTerm, ...]

    def term_for(self, reading: float) -> tuple[int, AccuracyTerm] | None:
        """(range index, term) of a reading; None when it is above the largest range."""
        x = abs(float(reading))
        for k, term in enumerate(self.terms):
            if term.range_max is None or x <= term.range_max:
                return k, term
        return None


@dataclass(frozen=True)
class InstrumentAccuracy:
    """The accuracy of one instrument per measured quantity (``voltage``, ``current``,
    ``power``). ``instrument`` identifies it for correlation (readings of one instrument
    share gain errors); the station gives its resource string."""

    instrument: str
    quantities: Mapping[str, QuantityAccuracy] = field(default_factory=dict)


#: The accuracy of a station's instruments by role (``input_meter`` -> ...).
StationAccuracy = Mapping[str, InstrumentAccuracy]


# ---------------------------------------------------------------- readings
@dataclass(frozen=True)
class ReadingUncertainty:
    """The uncertainty of one recorded value (the mean of ``n_readings`` readings).

    ``u_type_a`` = s/√N (0 when no scatter was recorded); ``u_type_b`` from the
    specification (NaN when the instrument has no accuracy for the quantity or the value
    is above its largest range: ``note`` says which). ``u_gain`` is the part of
    ``u_type_b`` that is the instrument's gain error, shared by readings with the same
    ``gain_key``. ``u`` is the combined standard uncertainty √(u_A² + u_B²) (GUM 5.1.2).
    """

    value: float
    u_type_a: float
    u_type_b: float
    u_gain: float = 0.0
    gain_key: tuple[str, str, int] | None = None
    n_readings: int = 1
    note: str = ""

    @property
    def u(self) -> float:
        return math.hypot(self.u_type_a, self.u_type_b)

    @property
    def known(self) -> bool:
        return math.isfinite(self.u)


def type_a_standard(sd: float | None, n_readings: float | None) -> float:
    """s/√N, the standard uncertainty of a mean of N readings (GUM 4.2.3); 0 without scatter.

    ``sd`` is the experimental standard deviation of the readings (GUM 4.2.2). N < 2 or a
    missing ``sd`` give 0: one reading carries no type A information of its own.
    """
    if sd is None or n_readings is None:
        return 0.0
    s, n = float(sd), float(n_readings)
    if not (math.isfinite(s) and math.isfinite(n)) or n < 2:
        return 0.0
    return abs(s) / math.sqrt(n)


def reading_uncertainty(
    value: float,
    accuracy: QuantityAccuracy | None,
    *,
    instrument: str = "",
    quantity: str = "",
    sd: float | None = None,
    n_readings: float | None = None,
) -> ReadingUncertainty:
    """Type A and type B uncertainty of one recorded value (GUM 4.2.3, 4.3)."""
    x = float(value)
    n = int(n_readings) if n_readings is not None and math.isfinite(float(n_readings)) else 1
    u_a = type_a_standard(sd, n_readings)
    if accuracy is None:
        return ReadingUncertainty(x, u_a, math.nan, 0.0, None, n,
                                  f"no accuracy given for {quantity or 'this quantity'} of {instrument or 'the instrument'}")
    if not math.isfinite(x):
        return ReadingUncertainty(x, u_a, math.nan, 0.0, None, n, "no value")
    found = accuracy.term_for(x)
    if found is None:
        top = accuracy.terms[-1].range_max
        return ReadingUncertainty(x, u_a, math.nan, 0.0, None, n,
                                  f"{quantity or 'reading'} {x:g} is above the largest range ({top:g}) of "
                                  f"{instrument or 'the instrument'}'s accuracy")
    k, term = found
    return ReadingUncertainty(x, u_a, term.standard(x), term.gain_standard(x), (instrument, quantity, k), n)


# ---------------------------------------------------------------- propagation
def combined_standard_uncertainty(
    sensitivities: Sequence[float], u: Sequence[float], correlation: np.ndarray | Sequence[Sequence[float]] | None = None
) -> float:
    """u_c(y) by the law of propagation (GUM 5.1.2 Eq. 10; 5.2.2 Eq. 16 with ``correlation``).

    ``correlation`` is the matrix r(x_i, x_j) (identity when None: uncorrelated inputs).
    """
    c = np.asarray(sensitivities, dtype=float)
    s = np.asarray(u, dtype=float)
    if c.shape != s.shape:
        raise ValueError(f"{c.size} sensitivity coefficient(s) for {s.size} uncertainty(ies)")
    r = np.eye(c.size) if correlation is None else np.asarray(correlation, dtype=float)
    if r.shape != (c.size, c.size):
        raise ValueError(f"correlation matrix must be {c.size}x{c.size}, got {r.shape}")
    cu = c * s
    var = float(cu @ r @ cu)
    return math.sqrt(max(var, 0.0))


def covariance_matrix(readings: Sequence[ReadingUncertainty]) -> np.ndarray:
    """u(x_i, x_j) of recorded values under the module's correlation assumption."""
    n = len(readings)
    v = np.zeros((n, n))
    for i, a in enumerate(readings):
        v[i, i] = a.u ** 2
        for j in range(i + 1, n):
            b = readings[j]
            if a.gain_key is not None and a.gain_key == b.gain_key:
                v[i, j] = v[j, i] = a.u_gain * b.u_gain
    return v


@dataclass(frozen=True)
class Uncertain:
    """A derived figure with its combined standard uncertainty ``u`` (same unit) and the
    expanded uncertainty ``expanded`` = k·u. ``u`` is NaN when an input's uncertainty is
    unknown (``note`` names it)."""

    value: float
    u: float
    k: float = COVERAGE_FACTOR
    note: str = ""

    @property
    def expanded(self) -> float:
        return self.k * self.u

    @property
    def known(self) -> bool:
        return math.isfinite(self.u)


def propagate(value: float, sensitivities: Sequence[float], readings: Sequence[ReadingUncertainty],
              *, k: float = COVERAGE_FACTOR) -> Uncertain:
    """u_c of ``value`` = f(readings) from the sensitivity coefficients ∂f/∂x_i (GUM 5.2.2)."""
    c = np.asarray(sensitivities, dtype=float)
    if c.size != len(readings):
        raise ValueError(f"{c.size} sensitivity coefficient(s) for {len(readings)} reading(s)")
    unknown = [r.note or "uncertainty unknown" for r, ci in zip(readings, c) if ci != 0 and not r.known]
    if unknown:
        return Uncertain(float(value), math.nan, k, "; ".join(dict.fromkeys(unknown)))
    v = covariance_matrix(readings)
    var = float(c @ v @ c)
    return Uncertain(float(value), math.sqrt(max(var, 0.0)), k)


# ---------------------------------------------------------------- the figures of a converter
def efficiency_uncertainty(pout: ReadingUncertainty, pin: ReadingUncertainty, *, k: float = COVERAGE_FACTOR) -> Uncertain:
    """η = Pout/Pin: c_out = 1/Pin, c_in = −Pout/Pin² (GUM 5.1.3)."""
    eta = pout.value / pin.value
    return propagate(eta, [1.0 / pin.value, -pout.value / pin.value ** 2], [pout, pin], k=k)


def loss_uncertainty(pout: ReadingUncertainty, pin: ReadingUncertainty, *, k: float = COVERAGE_FACTOR) -> Uncertain:
    """Loss = Pin − Pout: c_in = 1, c_out = −1."""
    return propagate(pin.value - pout.value, [-1.0, 1.0], [pout, pin], k=k)


def _mean(group: Sequence[ReadingUncertainty]) -> float:
    return float(np.mean([r.value for r in group]))


def line_regulation_uncertainty(vout_at_vin_min: Sequence[ReadingUncertainty],
                                vout_at_vin_max: Sequence[ReadingUncertainty], vout_nom_v: float,
                                *, k: float = COVERAGE_FACTOR) -> Uncertain:
    """(mean Vo at Vin,max − mean Vo at Vin,min)/Vo,nom × 100 (%), repeated points averaged.

    Vo,nom is a nominal value without uncertainty.
    """
    lo, hi = list(vout_at_vin_min), list(vout_at_vin_max)
    value = (_mean(hi) - _mean(lo)) / vout_nom_v * 100.0
    c = [-100.0 / (vout_nom_v * len(lo))] * len(lo) + [100.0 / (vout_nom_v * len(hi))] * len(hi)
    return propagate(value, c, lo + hi, k=k)


def load_regulation_uncertainty(vout_at_min_load: Sequence[ReadingUncertainty],
                                vout_at_max_load: Sequence[ReadingUncertainty], *, convention: str,
                                vout_rated_v: float | None = None, k: float = COVERAGE_FACTOR) -> Uncertain:
    """Load regulation in % and its uncertainty, repeated points averaged.

    ``textbook``: (V_NL − V_FL)/V_FL × 100, c_NL = 100/V_FL, c_FL = −100·V_NL/V_FL²;
    ``rated``: (V_NL − V_FL)/V_rated × 100, c = ±100/V_rated (V_rated nominal, exact).
    """
    nl, fl = list(vout_at_min_load), list(vout_at_max_load)
    v_nl, v_fl = _mean(nl), _mean(fl)
    if convention == "textbook":
        value = (v_nl - v_fl) / v_fl * 100.0
        c_nl, c_fl = 100.0 / v_fl, -100.0 * v_nl / v_fl ** 2
    elif convention == "rated":
        if vout_rated_v is None:
            raise ValueError("the 'rated' convention needs vout_rated_v")
        value = (v_nl - v_fl) / vout_rated_v * 100.0
        c_nl, c_fl = 100.0 / vout_rated_v, -100.0 / vout_rated_v
    else:
        raise ValueError(f"convention must be 'textbook' or 'rated', not {convention!r}")
    c = [c_nl / len(nl)] * len(nl) + [c_fl / len(fl)] * len(fl)
    return propagate(value, c, nl + fl, k=k)


def average_efficiency_uncertainty(
    groups: Sequence[Sequence[tuple[ReadingUncertainty, ReadingUncertainty]]], *, k: float = COVERAGE_FACTOR
) -> Uncertain:
    """The mean over load levels of the mean efficiency at each level, and its uncertainty.

    ``groups`` holds, per load level (four for the 25/50/75/100 % average), the
    (Pout, Pin) pairs measured there. avg = 1/L Σ_l 1/n_l Σ_p Pout_p/Pin_p, so
    c(Pout_p) = 1/(L·n_l·Pin_p) and c(Pin_p) = −Pout_p/(L·n_l·Pin_p²).
    """
    readings: list[ReadingUncertainty] = []
    c: list[float] = []
    level_means = []
    n_levels = len(groups)
    if n_levels == 0:
        raise ValueError("no load level to average")
    for pairs in groups:
        if not pairs:
            raise ValueError("a load level without points")
        n = len(pairs)
        level_means.append(float(np.mean([po.value / pi.value for po, pi in pairs])))
        for po, pi in pairs:
            readings += [po, pi]
            c += [1.0 / (n_levels * n * pi.value), -po.value / (n_levels * n * pi.value ** 2)]
    return propagate(float(np.mean(level_means)), c, readings, k=k)


# ---------------------------------------------------------------- temperatures
def temperature_reading_uncertainty(value: float, accuracy: QuantityAccuracy | None, *, instrument: str = "",
                                    channel: str = "", sd: float | None = None,
                                    n_readings: float | None = None) -> ReadingUncertainty:
    """One thermocouple channel's reading (GUM 4.2.3, 4.3).

    A thermocouple's tolerance is a fixed error of that thermocouple (IEC 60584-1 states it per
    thermocouple; common practice): the whole type B part is shared by the readings of one
    channel (at two loads it cancels in a difference, and moves a derated load as one) and
    independent between channels.
    """
    r = reading_uncertainty(value, accuracy, instrument=instrument, quantity=f"temperature {channel}".strip(),
                            sd=sd, n_readings=n_readings)
    if not r.known or r.gain_key is None:
        return r
    return ReadingUncertainty(r.value, r.u_type_a, r.u_type_b, r.u_type_b, r.gain_key, r.n_readings, r.note)


def temperature_rise_uncertainty(part: ReadingUncertainty, ambient: ReadingUncertainty, *,
                                 k: float = COVERAGE_FACTOR) -> Uncertain:
    """ΔT = T_part − T_ambient: c = (1, −1) (GUM 5.1.3); two channels, so independent errors."""
    return propagate(part.value - ambient.value, [1.0, -1.0], [part, ambient], k=k)


def derated_load_uncertainty(load1_a: float, load2_a: float, t1: ReadingUncertainty, t2: ReadingUncertainty,
                             limit_c: float, *, k: float = COVERAGE_FACTOR) -> Uncertain:
    """I* = I₁ + (L − T₁)(I₂ − I₁)/(T₂ − T₁), the linear interpolation of a derated load.

    ∂I*/∂T₁ = −(I₂ − I₁)(T₂ − L)/(T₂ − T₁)², ∂I*/∂T₂ = −(I₂ − I₁)(L − T₁)/(T₂ − T₁)² (GUM 5.1.3).
    ``t1`` and ``t2`` are one channel at two loads: its fixed error moves I* by −δ·(I₂ − I₁)/(T₂ − T₁).
    The load currents' own uncertainty (a load's read-back, ~0.1 %) is neglected.
    """
    di, dt = load2_a - load1_a, t2.value - t1.value
    if not dt > 0:
        raise ValueError(f"derated_load_uncertainty: T₂ must exceed T₁, got {t1.value:g} and {t2.value:g} °C")
    value = load1_a + (limit_c - t1.value) * di / dt
    return propagate(value, [-di * (t2.value - limit_c) / dt ** 2, -di * (limit_c - t1.value) / dt ** 2], [t1, t2],
                     k=k)


def scatter_column(quantity: str) -> str:
    """The name under which the standard deviation of a recorded mean is stored:
    ``pin_w`` -> ``pin_sd_w`` (the unit suffix stays last). Names without a unit suffix
    get ``_sd`` appended."""
    base, sep, unit = quantity.rpartition("_")
    if not sep or not base:
        return quantity + "_sd"
    return f"{base}_sd_{unit}"


__all__ = [
    "COVERAGE_FACTOR", "DISTRIBUTIONS", "MEASURED_QUANTITIES", "NORMAL", "RECTANGULAR", "TRIANGULAR",
    "AccuracyTerm", "InstrumentAccuracy", "QuantityAccuracy", "ReadingUncertainty", "StationAccuracy", "Uncertain",
    "average_efficiency_uncertainty", "combined_standard_uncertainty", "covariance_matrix", "derated_load_uncertainty",
    "efficiency_uncertainty", "line_regulation_uncertainty", "load_regulation_uncertainty", "loss_uncertainty",
    "propagate", "reading_uncertainty", "scatter_column", "temperature_reading_uncertainty",
    "temperature_rise_uncertainty", "type_a_standard",
]
