"""The converter under test as seen by every simulated instrument.

One ``ConverterModel`` sits between a DC source (feeding the DUT input through the
cable) and an electronic load (on the output terminals); meters, a loop analyzer and
a scope observe it.  Each setting call is an event at ``clock.now_s()``: the model
solves the new steady state (``operating_point.solve_bench``) and the terminal
quantities move toward it with their own dynamics (``dynamics``):

* the load current ramps at the load's slew rate (``load_slew_a_per_s``, default
  ``DEFAULT_LOAD_SLEW_A_PER_S`` = 1 A/ms);
* the output voltage recovers through the closed loop (the closed-loop output
  impedance's response to that ramp, linearised at the heavier end of the step);
* the input current lags behind the DUT's demand with the bench's input-filter time
  constant ``design.bench.input_filter_tau_s`` (20 ms flyback, 5 ms buck), so input
  current and power settle after the output voltage;
* with ``thermal_drift=True`` the hot parts warm with the loss through the design's
  thermal path (τ = R·C = 3 min flyback, 100 s buck, model time) and the on-resistances
  rise with them, so the losses creep up and the efficiency falls a little.  Off by
  default: the parts then stay at the ambient and the losses are the design's.

Starts, stops, lock-outs, faults and protection take the simpler path of one
exponential for everything (soft-start or settle time constant).  Values are true
(noise-free); instruments add their own errors.  The truth functions for tests are
``steady_state`` (at the present temperature), ``terminals_at``/``mean_terminals``,
``temperature_c`` and ``true_settling_time_s``.  Thread-safe.

Ambient and hot spots: the ambient is the design's until a thermal chamber's air is
attached (``attach_chamber``, :class:`.thermal.ChamberAir`); from then on the lumped parts
and each part's own node (:mod:`.component_thermal`: switch, rectifier, transformer of the
flyback; switch, synchronous rectifier, inductor of the buck) follow that air.  The parts'
nodes follow their share of the loss with their own time constants whether or not
``thermal_drift`` is on (truth: ``component_temperatures_c``, ``component_losses_w``).
"""

from __future__ import annotations

import logging
import math
import threading
from collections import deque
from dataclasses import dataclass, field

import numpy as np
from numpy.typing import ArrayLike, NDArray
from scipy.optimize import brentq

from .clock import ModelClock, ScaledClock
from .design import ConverterDesign
from .dynamics import (INPUT_A, INPUT_V, LOAD_A, OUTPUT_A, OUTPUT_V, QUANTITIES, SOURCE_A, SOURCE_V,
                       RegulatedTransient, Relaxation, Transient, settling_time)
from .errors import NotRegulatingError, SettingError
from .load_response import ImpedanceExcess, LoadRamp
from .margins import LoopTruth, loop_margins
from .operating_point import (FAULT_NAMES, BenchPoint, LoadMode, LoadSetting, OperatingPoint, SourceSetting,
                              solve_bench, solve_dut)
from .start_up import StartUp, StartUpInputs
from .protection import Hiccup, HoldUp, OvpTrip, ProtectionFeatures, latched_bench, protection_transient
from .small_signal import RationalTF, closed_loop_output_impedance, control_chain, plant_gvd, plant_zout_open
from .line_disturbance import LineInjection, LineStep, closed_loop_line_to_output, line_to_output_open
from .thermal import ThermalState
from .thermal import ChamberAir, ThermalState
from .component_thermal import ComponentTemperatures, component_losses, network_for

log = logging.getLogger(__name__)

#: Slew rate of the electronic load's current after a static setting, A/s (1 A/ms).  The slow
#: end of a bench load's range, the setting used for static steps so that a step neither
#: trips the DUT's protection nor rings its loop (common practice).
DEFAULT_LOAD_SLEW_A_PER_S = 1e3
#: Quasi-static intervals along a load ramp (the targets are linear within each): eight per
#: input-filter time constant, at least RAMP_SAMPLES and at most RAMP_SAMPLES_MAX.
RAMP_SAMPLES = 2
RAMP_SAMPLES_MAX = 64
#: Quantities ``true_settling_time_s`` knows, beyond the terminal vector.
DERIVED_QUANTITIES = ("source_w", "input_w", "output_w", "load_w", "efficiency")
_HISTORY = 64
#: Spacing of the lumped temperatures at which the parts' loss shares are solved (K); linear in
#: between, an error second order in the spacing (the shares are smooth in temperature).
COMPONENT_GRID_K = 0.5
#: Spacing of the temperatures at which a warming steady state is solved; between them the
#: terminal targets and the loss are interpolated linearly (K).  The interpolation error is
#: second order in this spacing: below 1e-7 of any quantity.
THERMAL_GRID_K = 0.05
_GL_NODES, _GL_WEIGHTS = np.polynomial.legendre.leggauss(8)


@dataclass(frozen=True)
class Terminals:
    """True values at the terminals at model time ``t_s``.  V, A.

    source_*: at the source terminals; input_*: at the DUT input (after the cable);
    output_*: at the DUT output terminals; load_a: current drawn by the electronic
    load (equals output_a unless an ``output_short`` fault bypasses the load).
    """

    t_s: float
    source_v: float
    source_a: float
    source_limited: bool
    input_v: float
    input_a: float
    output_v: float
    output_a: float
    load_a: float


@dataclass(frozen=True)
class TerminalMeans:
    """Means of the true terminal values over model times ``t0_s`` … ``t1_s``.  V, A, W.

    Powers are means of the instantaneous products (what an integrating power meter
    reads), not products of the means.  load_w = output_v·load_a.
    """

    t0_s: float
    t1_s: float
    source_v: float
    source_a: float
    input_v: float
    input_a: float
    output_v: float
    output_a: float
    load_a: float
    source_w: float
    input_w: float
    output_w: float
    load_w: float


@dataclass(frozen=True)
class _Segment:
    """The settings and the transient in force from ``t0_s`` on.

    ``warm`` caches the steady state at temperatures on the ``THERMAL_GRID_K`` grid:
    grid index -> (terminal vector, DUT loss W).
    """

    t0_s: float
    transient: Transient | StartUp
    bench: BenchPoint
    source: SourceSetting
    load: LoadSetting
    faults: tuple[str, ...]
    warm: dict = field(default_factory=dict, compare=False, repr=False)


def _vector(bp: BenchPoint) -> tuple[float, ...]:
    op = bp.op
    return (bp.source_v, bp.source_a, bp.input_v, bp.input_a, op.vout_v, op.iout_a, op.load_a)


def _derived(v: NDArray[np.float64], name: str) -> NDArray[np.float64]:
    if name in QUANTITIES:
        return v[QUANTITIES.index(name)]
    if name == "source_w":
        return v[SOURCE_V] * v[SOURCE_A]
    if name == "input_w":
        return v[INPUT_V] * v[INPUT_A]
    if name == "output_w":
        return v[OUTPUT_V] * v[OUTPUT_A]
    if name == "load_w":
        return v[OUTPUT_V] * v[LOAD_A]
    if name == "efficiency":
        pin = v[INPUT_V] * v[INPUT_A]
        return np.divide(v[OUTPUT_V] * v[OUTPUT_A], pin, out=np.zeros_like(pin), where=pin > 0.0)
    raise ValueError(f"unknown quantity {name!r}; known: {', '.join(QUANTITIES + DERIVED_QUANTITIES)}")


class ConverterModel:
    """Physical model of one converter on a bench (see module docstring).

    ``thermal_drift`` turns the warming of the parts on (off by default, so a dry run's
    losses are the design's and do not creep).
    """

    def __init__(self, design: ConverterDesign, clock: ModelClock | None = None, seed: int = 0, *,
                 thermal_drift: bool = False, protection: ProtectionFeatures | None = None) -> None:
        self.design = design
        self.clock: ModelClock = ScaledClock() if clock is None else clock
        self.rng = np.random.default_rng(seed)
        self._lock = threading.RLock()
        self._source = SourceSetting(0.0, 0.0, False)
        self._load = LoadSetting("CC", 0.0, False)
        self._load_slew_a_per_s = DEFAULT_LOAD_SLEW_A_PER_S
        self._faults: dict[str, float] = {}
        self._running = False
        self._extra_output_c_f = 0.0
        self._aux_stage_a = 0.0
        # protection and hold-up (protection.py): the DUT's features (None: a plain current
        # limit, no OVP), the OVP latch, the fixture's dropout switch and bulk capacitor
        self._protection = protection
        self._ovp_latched = False
        self._input_connected = True
        self._extra_input_c_f = 0.0
        t = self.clock.now_s()
        self._chamber: ChamberAir | None = None
        self._thermal = ThermalState(design.thermal, t, enabled=thermal_drift, ambient=self._ambient_at)
        self._components = ComponentTemperatures(network_for(design), t, self._ambient_at)
        self._component_cache: dict[tuple[float, int, int], dict[str, float]] = {}
        self._cache: tuple[float, float, BenchPoint] | None = None
        self._small_signal: dict[tuple, tuple[ImpedanceExcess | None, float]] = {}
        # line disturbances (line_disturbance): the sine injected on the line, recent line steps
        self._injection: LineInjection | None = None
        self._line_steps: deque[LineStep] = deque(maxlen=_HISTORY)
        self._line_step_cache: dict[tuple, ImpedanceExcess | None] = {}
        bench = self._solve(t, was_running=False)
        v = _vector(bench)
        self._segments: deque[_Segment] = deque(maxlen=_HISTORY)
        self._segments.append(_Segment(t, Relaxation(t, design.bench.settle_tau_s, v, v), bench,
                                       self._source, self._load, ()))

    # ---- settings (events) ----------------------------------------------------------
    def set_source(self, voltage_v: float, current_limit_a: float, enabled: bool) -> None:
        """Program the DC source: voltage (V, ≥ 0), current limit (A, > 0), output on/off."""
        if not (math.isfinite(voltage_v) and voltage_v >= 0.0):
            raise SettingError(f"set_source: voltage_v={voltage_v!r} must be a finite value >= 0 V")
        if not (math.isfinite(current_limit_a) and current_limit_a > 0.0):
            raise SettingError(f"set_source: current_limit_a={current_limit_a!r} must be a finite value > 0 A")
        with self._lock:
            self._source = SourceSetting(float(voltage_v), float(current_limit_a), bool(enabled))
            self._event("source", f"{voltage_v:g} V, limit {current_limit_a:g} A, {'on' if enabled else 'off'}")

    def set_load(self, mode: LoadMode, setting: float, enabled: bool, *, slew_a_per_s: float | None = None) -> None:
        """Program the electronic load: "CC" (setting in A) or "CR" (setting in Ω), on/off.

        ``slew_a_per_s`` (A/s, > 0) is the rate at which the load's current moves to the new
        value; None keeps the present one (default ``DEFAULT_LOAD_SLEW_A_PER_S``).
        """
        if not math.isfinite(setting):
            raise SettingError(f"set_load: setting={setting!r} must be finite")
        if slew_a_per_s is not None and not (math.isfinite(slew_a_per_s) and slew_a_per_s > 0.0):
            raise SettingError(f"set_load: slew_a_per_s={slew_a_per_s!r} must be a finite value > 0 A/s")
        with self._lock:
            load = LoadSetting(mode, float(setting), bool(enabled))
            if slew_a_per_s is not None:
                self._load_slew_a_per_s = float(slew_a_per_s)
            self._load = load
            self._event("load", f"{mode} {setting:g}, {'on' if enabled else 'off'}")

    def set_output_capacitance(self, capacitance_f: float) -> None:
        """Capacitance added at the output terminals by the fixture (a capacitive load), F (≥ 0).

        It matters while the output moves on its own (a start: C·dV/dt drawn from the
        converter); it draws no DC current and is not part of the loop's small-signal model.
        """
        if not (math.isfinite(capacitance_f) and capacitance_f >= 0.0):
            raise SettingError(f"set_output_capacitance: capacitance_f={capacitance_f!r} must be a finite value >= 0 F")
        with self._lock:
            self._extra_output_c_f = float(capacitance_f)

    @property
    def output_capacitance_f(self) -> float:
        """Output capacitance a start charges: the design's bank plus the fixture's, F."""
        with self._lock:
            return self.design.stage.c_out_f + self._extra_output_c_f

    # ---- protection and hold-up (protection.py) ----------------------------------------
    @property
    def protection(self) -> ProtectionFeatures | None:
        """The DUT's protection features (hiccup OCP, latching OVP), or None."""
        return self._protection

    def set_input_connected(self, connected: bool) -> None:
        """Close or open the fixture's series switch between the source and the DUT input.

        Opened while the converter runs, the input capacitance holds the converter up
        (``protection.HoldUp``): a dropout of the input, nothing sinking current from it.
        """
        with self._lock:
            self._input_connected = bool(connected)
            self._event("fixture", f"input {'connected' if connected else 'disconnected'}")

    @property
    def input_connected(self) -> bool:
        """Whether the fixture's dropout switch connects the source to the DUT input."""
        with self._lock:
            return self._input_connected

    def set_input_capacitance(self, capacitance_f: float) -> None:
        """Bulk capacitance the fixture adds at the DUT input (a hold-up capacitor), F (≥ 0)."""
        if not (math.isfinite(capacitance_f) and capacitance_f >= 0.0):
            raise SettingError(f"set_input_capacitance: capacitance_f={capacitance_f!r} must be a finite value >= 0 F")
        with self._lock:
            self._extra_input_c_f = float(capacitance_f)

    @property
    def input_capacitance_f(self) -> float:
        """Capacitance at the DUT input that a dropout discharges: the DUT's plus the fixture's, F."""
        with self._lock:
            return self.design.start_up.input_capacitance_f + self._extra_input_c_f

    @property
    def ovp_latched(self) -> bool:
        """Whether the over-voltage protection holds the DUT off."""
        with self._lock:
            return self._ovp_latched

    def protection_truth(self) -> Hiccup | OvpTrip | HoldUp | None:
        """The latest hiccup, OVP trip or hold-up transient (its times and levels), or None; for tests."""
        with self._lock:
            for seg in reversed(self._segments):
                if isinstance(seg.transient, (Hiccup, OvpTrip, HoldUp)):
                    return seg.transient
            return None

    def start_up_truth(self) -> StartUp | None:
        """The start in force (its UVLO crossing, switching start, inputs), or None; for tests."""
        with self._lock:
            for seg in reversed(self._segments):
                if isinstance(seg.transient, StartUp):
                    return seg.transient
            return None

    def inject_fault(self, name: str) -> None:
        """Start a fault: "feedback_open", "output_short" or "overheat"."""
        if name not in FAULT_NAMES:
            raise SettingError(f"inject_fault: unknown fault {name!r}; known faults: {', '.join(FAULT_NAMES)}")
        with self._lock:
            if name not in self._faults:
                self._faults[name] = self.clock.now_s()
                self._event("fault", name)

    def clear_faults(self) -> None:
        """Remove every injected fault."""
        with self._lock:
            self._faults.clear()
            self._event("fault", "cleared")

    @property
    def faults(self) -> tuple[str, ...]:
        """Names of the active faults."""
        with self._lock:
            return tuple(sorted(self._faults))

    @property
    def load_slew_a_per_s(self) -> float:
        """Slew rate of the load current after a setting, A/s."""
        with self._lock:
            return self._load_slew_a_per_s

    @property
    def thermal_drift(self) -> bool:
        """Whether the parts warm with their loss (see module docstring)."""
        return self._thermal.enabled

    # ---- ambient and hot spots ------------------------------------------------------
    def attach_chamber(self, chamber: ChamberAir | None) -> None:
        """Put the DUT in ``chamber``: from now on its air is the ambient (None: the design's again)."""
        with self._lock:
            now = self.clock.now_s()
            self._temperature(now)
            self._advance_components(now)
            self._chamber = chamber
            self._cache = None

    @property
    def chamber(self) -> ChamberAir | None:
        return self._chamber

    def _ambient_at(self, t_s: float) -> float:
        chamber = getattr(self, "_chamber", None)
        return self.design.thermal.ambient_c if chamber is None else chamber.air_c(t_s)

    @property
    def component_names(self) -> tuple[str, ...]:
        """The parts with a hot-spot node (``component_temperatures_c`` keys)."""
        return self._components.names

    def component_temperatures_c(self, t_s: float | None = None) -> dict[str, float]:
        """Each part's temperature (°C) at model time ``t_s`` (default now); truth for tests."""
        with self._lock:
            now = self.clock.now_s()
            t = now if t_s is None else float(t_s)
            self._temperature(min(t, now))
            self._advance_components(min(t, now))
            return self._components.temperatures_at(t)

    def component_losses_w(self) -> dict[str, float]:
        """Each part's loss now (W), at the present lumped temperature; truth for tests."""
        with self._lock:
            now = self.clock.now_s()
            self._temperature(now)
            return self._component_losses_at(now)

    def _advance_components(self, t_s: float) -> None:
        if t_s > self._components.latest_s:
            self._components.advance(t_s, self._component_losses_at)

    def _component_losses_at(self, t_s: float) -> dict[str, float]:
        seg = self._segment_at(t_s)
        if not seg.bench.op.running:
            return component_losses(self.design, seg.bench.op)
        if "overheat" in seg.faults:
            temp = self._temperature(t_s)
            op = self._solve_with(seg.source, seg.load, seg.faults, t_s, temp, was_running=True).op
            return component_losses(self._design_at(temp), op)
        if not self._thermal.enabled:        # the design's losses: the target of the settings
            return component_losses(self.design, seg.bench.op)
        x = self._thermal.temperature_at(t_s) / COMPONENT_GRID_K
        k = math.floor(x)
        w = x - k
        p0, p1 = self._component_point(seg, k), self._component_point(seg, k + 1)
        return {name: (1.0 - w) * p0[name] + w * p1[name] for name in p0}

    def _component_point(self, seg: _Segment, k: int) -> dict[str, float]:
        key = (seg.t0_s, id(seg), k)
        hit = self._component_cache.get(key)
        if hit is None:
            temp = k * COMPONENT_GRID_K
            op = self._solve_with(seg.source, seg.load, seg.faults, seg.t0_s, temp, was_running=True).op
            hit = component_losses(self._design_at(temp), op)
            if len(self._component_cache) > 4096:
                self._component_cache.clear()
            self._component_cache[key] = hit
        return hit

    # ---- observation ----------------------------------------------------------------
    def terminals(self) -> Terminals:
        """True terminal values at the present model time, dynamics included."""
        with self._lock:
            return self.terminals_at(self.clock.now_s())

    def terminals_at(self, t_s: float) -> Terminals:
        """True terminal values at model time ``t_s``.

        ``t_s`` may lie in the recent past (the last settings are remembered) or ahead
        (assuming no further setting and the present temperature).
        """
        with self._lock:
            seg = self._segment_at(t_s)
            v = seg.transient.values_at(t_s, self._target_vector(seg, t_s))[:, 0]
            if self._injection is not None:
                v = v.copy()
                v[INPUT_V] += float(self._injection.input_v(t_s)[0])
                v[OUTPUT_V] += float(self._injection.output_v(t_s)[0])
            return Terminals(float(t_s), float(v[0]), float(v[1]), seg.bench.source_limited, float(v[2]),
                             float(v[3]), float(v[4]), float(v[5]), float(v[6]))

    def mean_terminals(self, t0_s: float, t1_s: float) -> TerminalMeans:
        """Means of the true terminal values (and powers) over model times ``t0_s`` … ``t1_s``.

        Gauss–Legendre quadrature (8 nodes) on sub-intervals split at every setting, at
        the ramp samples and geometrically after each setting, so fast loop dynamics are
        resolved; exact to well below the instruments' resolution.  ``t1_s == t0_s``
        gives the values at that moment.
        """
        if not t1_s >= t0_s:
            raise ValueError(f"mean_terminals: t1_s={t1_s!r} must not be before t0_s={t0_s!r}")
        with self._lock:
            if t1_s == t0_s:
                v = self._values_at(np.array([t0_s]))[:, 0]
                sums = np.concatenate([v, self._powers(v.reshape(-1, 1))[:, 0]])
            else:
                t, w = self._quadrature(t0_s, t1_s)
                v = self._values_at(t)
                sums = np.concatenate([v @ w, self._powers(v) @ w]) / (t1_s - t0_s)
                if self._injection is not None:   # its means are analytic (a sine over many nodes' spans)
                    d_in = self._injection.mean_input_v(t0_s, t1_s)
                    d_out = self._injection.mean_output_v(t0_s, t1_s)
                    sums[INPUT_V] += d_in
                    sums[OUTPUT_V] += d_out
                    sums[7 + 1] += d_in * sums[INPUT_A]      # input_w, first order in the sine
                    sums[7 + 2] += d_out * sums[OUTPUT_A]    # output_w
                    sums[7 + 3] += d_out * sums[LOAD_A]      # load_w
            return TerminalMeans(float(t0_s), float(t1_s), *(float(x) for x in sums))

    def terminal_series(self, t_s: ArrayLike) -> NDArray[np.float64]:
        """True terminal vectors (7 × n, order ``QUANTITIES``) at increasing model times ``t_s``.

        What a scope sees of the slow quantities (no switching ripple); times in the recent
        past or ahead as for :meth:`terminals_at`.
        """
        t = np.atleast_1d(np.asarray(t_s, dtype=float))
        with self._lock:
            v = self._values_at(t)
            if self._injection is not None:
                v[INPUT_V] += self._injection.input_v(t)
                v[OUTPUT_V] += self._injection.output_v(t)
            return v

    def free_running_mask(self, t_s: ArrayLike) -> NDArray[np.bool_]:
        """True at the model times ``t_s`` (increasing) that lie in a start, stop, lock-out or fault
        transient still moving (not a regulated load or line change, and within 10 τ of its event)."""
        t = np.atleast_1d(np.asarray(t_s, dtype=float))
        out = np.zeros(t.shape, dtype=bool)
        with self._lock:
            segs = list(self._segments)
            for k, seg in enumerate(segs):
                if isinstance(seg.transient, RegulatedTransient):
                    continue
                end = segs[k + 1].t0_s if k + 1 < len(segs) else math.inf
                moving_until = seg.t0_s + 10.0 * seg.transient.tau_s
                out |= (t >= seg.t0_s) & (t < min(end, moving_until))
        return out

    def event_times_between(self, t0_s: float, t1_s: float) -> list[float]:
        """Model times of the settings (events) in (t0_s, t1_s]."""
        with self._lock:
            return [seg.t0_s for seg in self._segments if t0_s < seg.t0_s <= t1_s]

    def operating_point(self) -> OperatingPoint:
        """Steady state the DUT is heading to at the present model time (and temperature)."""
        with self._lock:
            return self._target(self.clock.now_s()).op

    def steady_state(self, vin_v: float, load_mode: LoadMode, load_setting: float, *,
                     was_running: bool = False) -> OperatingPoint:
        """Truth for tests: the DUT at ``vin_v`` on its input terminals, load enabled, no dynamics.

        At the present temperature of the parts; active faults apply.  ``was_running``
        selects the UVLO threshold (off if True, on if False).
        """
        with self._lock:
            t = self.clock.now_s()
            return solve_dut(self._design_at(self._temperature(t)), float(vin_v),
                             LoadSetting(load_mode, float(load_setting), True),
                             was_running=was_running, faults=self.faults, extra_loss_w=self._extra_loss_w(t),
                             aux_stage_a=self._aux_stage_a)

    def temperature_c(self) -> float:
        """Temperature of the hot parts now, °C (the ambient while thermal drift is off)."""
        with self._lock:
            return self._temperature(self.clock.now_s())

    @property
    def ambient_c(self) -> float:
        """Ambient temperature now, °C: the design's (where its loss coefficients hold) or the chamber air."""
        return self._ambient_at(self.clock.now_s())

    @property
    def thermal_time_constant_s(self) -> float:
        """Thermal time constant R·C of the hot parts, model seconds."""
        return self.design.thermal.tau_s

    @property
    def time_constant_s(self) -> float:
        """Input-filter time constant: the slowest electrical lag after a change while running, model s."""
        return self.design.bench.input_filter_tau_s

    @property
    def soft_start_time_constant_s(self) -> float:
        """Settling time constant after a start from off/UVLO, model seconds."""
        return self.design.bench.soft_start_tau_s

    @property
    def active_time_constant_s(self) -> float:
        """Slowest time constant of the transient in progress, model seconds."""
        with self._lock:
            return self._segments[-1].transient.slowest_tau_s

    @property
    def transient_start_s(self) -> float:
        """Model time of the last setting (the start of the transient in progress)."""
        with self._lock:
            return self._segments[-1].t0_s

    def loop_time_constant_s(self) -> float:
        """τ_loop = 1/(2π·f_c) of the present loop (model s): how the output follows a line step."""
        with self._lock:
            op = self.operating_point()
            return self._small_signal_at(op)[1]

    def settling_time_s(self, step_fraction: float, rel_tol: float) -> float:
        """First-order estimate τ·ln(step_fraction/rel_tol), τ = ``active_time_constant_s`` (model s).

        The model's exact figure, with the load ramp and every lag, is ``true_settling_time_s``.
        """
        return settling_time(self.active_time_constant_s, step_fraction, rel_tol)

    def true_settling_time_s(self, quantity: str = "input_w", *, abs_tol: float | None = None,
                             rel_tol: float | None = None) -> float:
        """Model seconds from the last setting until ``quantity`` stays within tolerance of its final value.

        quantity: a terminal quantity (``Terminals`` field names) or one of
        ``DERIVED_QUANTITIES`` ("input_w", "output_w", "efficiency", ...).  The tolerance is
        ``abs_tol`` (the quantity's unit) or ``rel_tol`` × |final value| (the larger when both are
        given).  The final value is the steady state at the present temperature: the slow
        thermal drift is the stability criterion's business, not the settling's.  Assumes no
        further setting.  0 when the quantity never leaves the band.
        """
        if abs_tol is None and rel_tol is None:
            raise ValueError("true_settling_time_s: give abs_tol or rel_tol (or both)")
        with self._lock:
            seg = self._segments[-1]
            target = np.asarray(self._target_vector(seg, self.clock.now_s()), dtype=float)
            final = float(_derived(target.reshape(-1, 1), quantity)[0])
            tol = max(abs_tol or 0.0, (rel_tol or 0.0) * abs(final))
            if not tol > 0.0:
                raise ValueError(f"true_settling_time_s: the tolerance for {quantity!r} must be > 0 "
                                 f"(final value {final!r})")
            tr = seg.transient
            t0 = seg.t0_s
            horizon = (tr.end_of_drive_s - t0) + 60.0 * tr.slowest_tau_s + 1e-6

            def deviation(t: NDArray[np.float64]) -> NDArray[np.float64]:
                return np.abs(_derived(tr.values_at(t, target), quantity) - final) - tol

            grid = np.unique(np.concatenate([
                t0 + np.geomspace(1e-9, horizon, 4000), t0 + np.linspace(0.0, horizon, 4001),
                np.asarray(getattr(tr, "sample_times_s", (t0,)))]))
            dev = deviation(grid)
            outside = np.nonzero(dev > 0.0)[0]
            if outside.size == 0:
                return 0.0
            i = int(outside[-1])
            if i + 1 >= grid.size:
                return float(grid[-1] - t0)
            a, b = float(grid[i]), float(grid[i + 1])
            t_cross = brentq(lambda x: float(deviation(np.array([x]))[0]), a, b, xtol=1e-12, rtol=1e-12)
            return float(t_cross - t0)

    # ---- small signal -----------------------------------------------------------------
    def loop_transfer(self) -> RationalTF:
        """Loop gain T(s) = H·Gc(s)·Gvd(s)/Vm at the present operating point (CCM or DCM model)."""
        return self._loop_transfer(self.operating_point())

    def loop_gain(self, freq_hz: ArrayLike) -> NDArray[np.complex128]:
        """Complex loop gain T(j2πf) at ``freq_hz`` (Hz)."""
        return self.loop_transfer().response(freq_hz)

    def loop_truth(self) -> LoopTruth:
        """Exact crossover, phase margin and gain margin of the present loop (1 mHz … 100·fsw)."""
        return loop_margins(self.loop_transfer(), 1e-3, 100.0 * self.design.fsw_hz)

    def output_impedance_transfer(self) -> RationalTF:
        """Closed-loop output impedance Zout(s) = Zout_open(s)/(1 + T(s)), Ω."""
        return self._zout_transfer(self.operating_point())

    def output_impedance(self, freq_hz: ArrayLike) -> NDArray[np.complex128]:
        """Complex closed-loop output impedance at ``freq_hz`` (Hz), Ω."""
        return self.output_impedance_transfer().response(freq_hz)

    def terminal_output_impedance(self, freq_hz: ArrayLike) -> NDArray[np.complex128]:
        """Closed-loop output impedance seen at the output terminals, Ω: :meth:`output_impedance`
        (at the regulation sense point) plus the copper from there to the terminals."""
        return self.output_impedance(freq_hz) + self.design.bench.sense_to_terminal_r_ohm

    # ---- a second (auxiliary) output ----------------------------------------------------
    def set_auxiliary_stage_current(self, current_a: float) -> None:
        """Current a further winding draws, referred to the main winding by its turns (A, >= 0).

        The power stage delivers it beside the main output's (duty, losses, input power and
        the small-signal load all see it); it is not part of the main terminals' current.
        Set by :class:`~.second_output.SecondOutput`; 0 (the default) for a one-output DUT.
        """
        if not (math.isfinite(current_a) and current_a >= 0.0):
            raise SettingError(f"set_auxiliary_stage_current: current_a={current_a!r} must be a finite value >= 0 A")
        with self._lock:
            if float(current_a) == self._aux_stage_a:
                return
            self._aux_stage_a = float(current_a)
            self._event("load", f"auxiliary winding {current_a:g} A (main-referred)")

    @property
    def auxiliary_stage_current_a(self) -> float:
        """The auxiliary winding's main-referred current now in force, A."""
        with self._lock:
            return self._aux_stage_a
    # ---- line disturbances (line_disturbance) ---------------------------------------------
    def line_to_output_transfer(self) -> RationalTF:
        """Closed-loop line-to-output Gvg_cl(s) = Gvg(s)/(1 + T(s)) at the present operating point, V/V."""
        return self._gvg_transfer(self.operating_point())

    def line_to_output(self, freq_hz: ArrayLike) -> NDArray[np.complex128]:
        """Complex closed-loop line-to-output transfer at ``freq_hz`` (Hz), V/V."""
        return self.line_to_output_transfer().response(freq_hz)

    def set_line_injection(self, amplitude_v: float, frequency_hz: float, enabled: bool) -> None:
        """A sine of ``amplitude_v`` (V peak, at the DUT input) and ``frequency_hz`` on the input line
        from now on (``enabled``), or none. What a generator through an injection transformer does."""
        if not (math.isfinite(amplitude_v) and amplitude_v >= 0.0 and math.isfinite(frequency_hz)
                and frequency_hz > 0.0):
            raise SettingError(f"set_line_injection: amplitude_v={amplitude_v!r} must be >= 0 V and "
                               f"frequency_hz={frequency_hz!r} > 0 Hz")
        with self._lock:
            if not enabled or amplitude_v == 0.0:
                self._injection = None
                return
            self._injection = LineInjection(self.clock.now_s(), float(amplitude_v), float(frequency_hz),
                                            self._injection_response(float(frequency_hz)))

    @property
    def line_injection(self) -> LineInjection | None:
        """The sine on the line now (with its Gvg_cl at the operating point), or None."""
        with self._lock:
            return self._injection

    def line_step_truth(self) -> LineStep | None:
        """The last line step (its size and Gvg_cl step response), or None; for tests."""
        with self._lock:
            return self._line_steps[-1] if self._line_steps else None

    def line_output_excess_v(self, t_s: ArrayLike) -> NDArray[np.float64]:
        """What the line disturbances add to the output beyond its static value at model times ``t_s``
        (line-step responses and the injected sine's answer), V; for the scope's output probe."""
        t = np.atleast_1d(np.asarray(t_s, dtype=float))
        with self._lock:
            out = np.zeros(t.shape)
            for step in self._line_steps:
                out += step.output_excess_v(t)
            if self._injection is not None:
                out += self._injection.output_v(t)
            return out

    def _gvg_transfer(self, op: OperatingPoint) -> RationalTF:
        loop = self._loop_transfer(op)
        gvg = line_to_output_open(self.design, op.conduction_mode, op.vin_v, op.vsense_v, op.duty, op.r_load_eff_ohm)
        return closed_loop_line_to_output(gvg, loop)

    def _injection_response(self, frequency_hz: float) -> complex:
        op = self._target(self.clock.now_s()).op
        if op.state != "regulating" or not self._source.enabled:
            return 0j
        return complex(np.atleast_1d(self._gvg_transfer(op).response(frequency_hz))[0])

    def _line_step(self, t: float, dv_v: float, op: OperatingPoint) -> LineStep | None:
        key = (op.conduction_mode, round(op.vin_v, 3), round(op.load_a, 4))
        if key not in self._line_step_cache:
            try:
                self._line_step_cache[key] = ImpedanceExcess.from_tf(self._gvg_transfer(op))
            except (NotRegulatingError, ValueError) as exc:
                log.debug("no line-step response at %s: %s", key, exc)
                self._line_step_cache[key] = None
            if len(self._line_step_cache) > 256:
                self._line_step_cache.clear()
        response = self._line_step_cache[key]
        return None if response is None else LineStep(t, dv_v, response)

    # ---- internals: steady states -------------------------------------------------------
    def _loop_transfer(self, op: OperatingPoint) -> RationalTF:
        if op.state != "regulating":
            raise NotRegulatingError(
                f"{self.design.name}: no closed loop in state {op.state!r} ({op.reason}); "
                "set the source and load so the converter regulates first")
        gvd = plant_gvd(self.design, op.conduction_mode, op.vin_v, op.vsense_v, op.duty, op.r_load_eff_ohm)
        return control_chain(self.design) * gvd

    def _zout_transfer(self, op: OperatingPoint) -> RationalTF:
        loop = self._loop_transfer(op)
        zo = plant_zout_open(self.design, op.conduction_mode, op.vin_v, op.vsense_v, op.duty, op.r_load_eff_ohm)
        return closed_loop_output_impedance(zo, loop)

    def _small_signal_at(self, op: OperatingPoint) -> tuple[ImpedanceExcess | None, float]:
        """(decaying part of Zcl, τ_loop) at ``op``; cached."""
        key = (op.state, op.conduction_mode, round(op.vin_v, 3), round(op.load_a, 4))
        hit = self._small_signal.get(key)
        if hit is not None:
            return hit
        zout: ImpedanceExcess | None = None
        tau = self.design.bench.settle_tau_s
        try:
            zout = ImpedanceExcess.from_tf(self._zout_transfer(op))
            truth = loop_margins(self._loop_transfer(op), 1e-3, 100.0 * self.design.fsw_hz)
            if truth.crossover_hz:
                tau = 1.0 / (2.0 * math.pi * truth.crossover_hz)
        except (NotRegulatingError, ValueError) as exc:
            log.debug("no closed-loop response at %s: %s", key, exc)
        if len(self._small_signal) > 256:
            self._small_signal.clear()
        self._small_signal[key] = (zout, tau)
        return zout, tau

    def _extra_loss_w(self, t_s: float) -> float:
        t_on = self._faults.get("overheat")
        if t_on is None:
            return 0.0
        f = self.design.faults
        return min(f.overheat_rate_w_per_s * max(t_s - t_on, 0.0), f.overheat_max_w)

    def _design_at(self, temp_c: float) -> ConverterDesign:
        return self.design.at_temperature(temp_c) if self._thermal.enabled else self.design

    def _temperature(self, t_s: float) -> float:
        if not self._thermal.enabled:
            return self.design.thermal.ambient_c
        if t_s > self._thermal.latest_s:
            now = self.clock.now_s()
            self._thermal.advance(min(t_s, now), self._loss_at)
        return self._thermal.temperature_at(t_s)

    def _loss_at(self, t_s: float, temp_c: float) -> float:
        """DUT dissipation (W) with the present settings at ``temp_c``, for the thermal integration."""
        seg = self._segments[-1]
        if "overheat" in seg.faults or not seg.bench.op.running:
            return self._solve_with(seg.source, seg.load, seg.faults, t_s, temp_c, self._running).op.loss_w
        return float(self._warm_interpolated(seg, temp_c)[1])

    def _warm_point(self, seg: _Segment, k: int) -> tuple[NDArray[np.float64], float]:
        hit = seg.warm.get(k)
        if hit is None:
            bp = self._solve_with(seg.source, seg.load, seg.faults, seg.t0_s, k * THERMAL_GRID_K, was_running=True)
            hit = (np.asarray(_vector(bp), dtype=float), bp.op.loss_w)
            if len(seg.warm) > 4096:
                seg.warm.clear()
            seg.warm[k] = hit
        return hit

    def _warm_interpolated(self, seg: _Segment, temp_c: float) -> tuple[NDArray[np.float64], float]:
        """(terminal vector, loss W) of ``seg``'s settings at ``temp_c``, interpolated on the grid."""
        x = temp_c / THERMAL_GRID_K
        k = math.floor(x)
        w = x - k
        (v0, p0), (v1, p1) = self._warm_point(seg, k), self._warm_point(seg, k + 1)
        return (1.0 - w) * v0 + w * v1, (1.0 - w) * p0 + w * p1

    def _solve_with(self, source: SourceSetting, load: LoadSetting, faults: tuple[str, ...], t_s: float,
                    temp_c: float, was_running: bool) -> BenchPoint:
        extra = self._extra_loss_w(t_s) if "overheat" in faults else 0.0
        return solve_bench(self._design_at(temp_c), source, load, was_running=was_running, faults=faults,
                           extra_loss_w=extra, aux_stage_a=self._aux_stage_a)

    def _effective_source(self) -> SourceSetting:
        """The source as the DUT sees it: off while the fixture's dropout switch is open."""
        if self._input_connected:
            return self._source
        return SourceSetting(0.0, self._source.current_limit_a, False)

    def _solve(self, t_s: float, was_running: bool) -> BenchPoint:
        return self._solve_with(self._effective_source(), self._load, tuple(sorted(self._faults)), t_s,
                                self._temperature(t_s), was_running)

    def _moving(self, seg: _Segment) -> bool:
        """Whether the target of ``seg`` moves with time (warming parts, an overheat fault)."""
        return seg.bench.op.running and (self._thermal.enabled or "overheat" in seg.faults)

    def _target_at(self, seg: _Segment, t_s: float) -> BenchPoint:
        if not self._moving(seg):
            return seg.bench
        temp = self._temperature(t_s)
        if self._cache is not None and self._cache[0] == t_s and self._cache[1] == temp and seg is self._segments[-1]:
            return self._cache[2]
        bp = self._solve_with(seg.source, seg.load, seg.faults, t_s, temp, was_running=True)
        if seg is self._segments[-1]:
            self._cache = (t_s, temp, bp)
        return bp

    def _target(self, t_s: float) -> BenchPoint:
        return self._target_at(self._segments[-1], t_s)

    def _target_vector(self, seg: _Segment, t_s: float) -> tuple[float, ...]:
        if not self._moving(seg) or "overheat" in seg.faults:
            return _vector(self._target_at(seg, t_s))
        v, _ = self._warm_interpolated(seg, self._temperature(t_s))
        return tuple(float(x) for x in v)

    # ---- internals: time ------------------------------------------------------------------
    def _segment_at(self, t_s: float) -> _Segment:
        for seg in reversed(self._segments):
            if seg.t0_s <= t_s:
                return seg
        return self._segments[0]

    def _values_at(self, t: NDArray[np.float64]) -> NDArray[np.float64]:
        """Terminal vectors (7 × n) at sorted model times ``t`` across settings."""
        out = np.empty((7, t.size))
        segs = list(self._segments)
        starts = np.array([s.t0_s for s in segs])
        idx = np.clip(np.searchsorted(starts, t, side="right") - 1, 0, len(segs) - 1)
        for k in np.unique(idx):
            mask = idx == k
            seg = segs[int(k)]
            tk = t[mask]
            mid = 0.5 * (float(tk[0]) + float(tk[-1]))
            out[:, mask] = seg.transient.values_at(tk, self._target_vector(seg, mid))
        return out

    @staticmethod
    def _powers(v: NDArray[np.float64]) -> NDArray[np.float64]:
        return np.vstack([_derived(v, name) for name in ("source_w", "input_w", "output_w", "load_w")])

    def _quadrature(self, t0_s: float, t1_s: float) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
        """Nodes and weights over [t0_s, t1_s] split where the dynamics change fast."""
        cuts = {t0_s, t1_s}
        segs = list(self._segments)
        for k, seg in enumerate(segs):
            if seg.t0_s >= t1_s or (k + 1 < len(segs) and segs[k + 1].t0_s <= t0_s):
                continue            # not in force during the interval
            cuts.update(t for t in getattr(seg.transient, "sample_times_s", ()) if t0_s < t < t1_s)
            starts = {seg.t0_s}
            for ramp in getattr(seg.transient, "ramps", ()):
                starts.update((ramp.t_start_s, ramp.t_end_s))
            for base in starts:             # fast loop dynamics begin at each of these
                if t0_s < base < t1_s:
                    cuts.add(base)
                step = 1e-7
                while base + step < t1_s:
                    if base + step > t0_s:
                        cuts.add(base + step)
                    step *= 2.0
        edges = np.array(sorted(cuts))
        x, w = _GL_NODES, _GL_WEIGHTS
        a, b = edges[:-1], edges[1:]
        half = 0.5 * (b - a)
        nodes = (0.5 * (a + b))[:, None] + half[:, None] * x[None, :]
        weights = half[:, None] * w[None, :]
        return nodes.ravel(), weights.ravel()

    # ---- internals: events -------------------------------------------------------------
    def _event(self, what: str, detail: str) -> None:
        t = self.clock.now_s()
        self._temperature(t)
        self._advance_components(t)
        prev = self._segments[-1]
        present = tuple(float(x) for x in prev.transient.values_at(t, self._target_vector(prev, t))[:, 0])
        was_running = self._running
        self._cache = None
        bench = latched_bench(self, self._solve(t, was_running))    # protection.py: the OVP latch
        self._running = bench.op.running
        transient: Transient | StartUp | None = None
        if (what in ("source", "load") and was_running and prev.bench.op.state == "regulating"
                and bench.op.state == "regulating" and self._recovered(prev.transient, t)):
            transient = self._regulated(t, present, prev, bench, line=what == "source")
        if transient is None:
            if self._running and not was_running and not self._faults:
                transient = self._start_up(t, present, bench)
            else:
                if self._running and not was_running:
                    tau = self.design.bench.soft_start_tau_s
                elif (self._running and isinstance(prev.transient, (Relaxation, StartUp))
                      and not self._recovered(prev.transient, t)):
                    tau = prev.transient.tau_s        # a change during a start continues the start
                else:
                    tau = self.design.bench.settle_tau_s
                transient = Relaxation(t, tau, present, _vector(bench))
        transient = protection_transient(self, t, present, prev, bench, was_running, transient)
        self._segments.append(_Segment(t, transient, bench, self._effective_source(), self._load,
                                       tuple(sorted(self._faults))))
        if not isinstance(transient, RegulatedTransient):
            self._line_steps.clear()       # a start, stop or fault: the scope reads the series then
        if self._injection is not None:   # the sine's answer at the new operating point
            inj = self._injection
            self._injection = LineInjection(inj.t_on_s, inj.amplitude_v, inj.frequency_hz,
                                            self._injection_response(inj.frequency_hz))
        log.debug("%s at t=%.6f s: %s -> state %s (%s)", what, t, detail, bench.op.state, type(transient).__name__)

    def _start_up(self, t: float, present: tuple[float, ...], bench: BenchPoint) -> StartUp:
        d = self.design
        op = bench.op
        pin = bench.input_v * bench.input_a
        eff = op.vout_v * op.iout_a / pin if pin > 0.0 else 1.0
        inputs = StartUpInputs(
            source_v=self._source.voltage_v, source_limit_a=self._source.current_limit_a,
            cable_r_ohm=d.bench.cable_r_ohm, c_in_f=d.start_up.input_capacitance_f, v_in0_v=present[INPUT_V],
            uvlo_on_v=d.protection.uvlo_on_v, delay_s=d.start_up.start_delay_s, soft_start_s=d.start_up.soft_start_s,
            v_out0_v=present[OUTPUT_V], c_out_f=d.stage.c_out_f + self._extra_output_c_f,
            converter_limit_a=d.protection.current_limit_a, load_mode=self._load.mode,
            load_setting=self._load.setting, load_enabled=self._load.enabled, load_min_v=d.start_up.load_min_v,
            efficiency=min(max(eff, 0.05), 1.0), bleed_ohm=d.losses.input_bleed_ohm,
            settle_tau_s=d.bench.settle_tau_s, input_tau_s=d.bench.input_filter_tau_s)
        return StartUp(t, inputs, present, _vector(bench))

    @staticmethod
    def _recovered(transient: Transient, t_s: float) -> bool:
        if isinstance(transient, RegulatedTransient):
            return True
        return t_s - transient.t0_s >= 10.0 * transient.tau_s

    def _regulated(self, t: float, present: tuple[float, ...], prev: _Segment,
                   bench: BenchPoint, *, line: bool = False) -> RegulatedTransient | None:
        i_from, i_to = present[LOAD_A], bench.op.load_a
        slew = self._load_slew_a_per_s
        duration = abs(i_to - i_from) / slew
        temp = self._temperature(t)
        faults = tuple(sorted(self._faults))
        if duration <= 1e-12:
            times = (t,)
            samples = (_vector(bench),)
            heavy = bench.op
        else:
            per_tau = math.ceil(8.0 * duration / self.design.bench.input_filter_tau_s)
            n = min(RAMP_SAMPLES_MAX, max(RAMP_SAMPLES, per_tau))
            times = tuple(t + duration * k / n for k in range(n + 1))
            samples_list: list[tuple[float, ...]] = []
            ops = []
            for k in range(n):
                i_k = i_from + (i_to - i_from) * k / n
                bp = self._solve_with(self._source, LoadSetting("CC", max(i_k, 0.0), True), faults, t, temp,
                                      was_running=True)
                if bp.op.state != "regulating":
                    return None
                samples_list.append(_vector(bp))
                ops.append(bp.op)
            samples_list.append(_vector(bench))
            ops.append(bench.op)
            samples = tuple(samples_list)
            heavy = max(ops, key=lambda op: op.load_a)   # linearised at the heavier end (module docstring)
        ramps: list[LoadRamp] = []
        if isinstance(prev.transient, RegulatedTransient):
            ramps = [r.cut_at(t) for r in prev.transient.ramps if not r.faded(t)]
        zout, _ = self._small_signal_at(heavy)
        _, loop_tau = self._small_signal_at(bench.op)
        if duration > 1e-12 and zout is not None:
            ramps.append(LoadRamp(t, t + duration, (i_to - i_from) / duration, zout))
        dv_line = bench.source_v - present[SOURCE_V]
        if line and abs(dv_line) > 1e-9:    # a line step: Gvg_cl's step response (line_disturbance)
            step = self._line_step(t, dv_line, bench.op)
            if step is not None:
                ramps.append(step)  # type: ignore[arg-type]  # a LineStep has a LoadRamp's interface
                self._line_steps.append(step)
        return RegulatedTransient(t, times, samples, present, self.design.bench.input_filter_tau_s, loop_tau,
                                  self.design.bench.cable_r_ohm, tuple(ramps))
