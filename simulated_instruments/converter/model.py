"""The converter under test as seen by every simulated instrument.

One ``ConverterModel`` sits between a DC source (feeding the DUT input through the
cable) and an electronic load (on the output terminals); meters, a loop analyzer and
a scope observe it.  Each setting call is an event at ``clock.now_s()``: the model
solves the new steady state (``operating_point.solve_bench``) and every terminal
quantity relaxes toward it exponentially (``dynamics.Relaxation``).  Values are true
(noise-free); instruments add their own noise from ``model.rng``.  Thread-safe.
"""

from __future__ import annotations

import logging
import math
import threading
from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike, NDArray

from .clock import ModelClock, ScaledClock
from .design import ConverterDesign
from .dynamics import Relaxation, settling_time
from .errors import NotRegulatingError, SettingError
from .margins import LoopTruth, loop_margins
from .operating_point import (FAULT_NAMES, BenchPoint, LoadMode, LoadSetting, OperatingPoint, SourceSetting,
                              solve_bench, solve_dut)
from .small_signal import RationalTF, closed_loop_output_impedance, control_chain, plant_gvd, plant_zout_open

log = logging.getLogger(__name__)


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


def _vector(bp: BenchPoint) -> tuple[float, ...]:
    op = bp.op
    return (bp.source_v, bp.source_a, bp.input_v, bp.input_a, op.vout_v, op.iout_a, op.load_a)


class ConverterModel:
    """Physical model of one converter on a bench (see module docstring)."""

    def __init__(self, design: ConverterDesign, clock: ModelClock | None = None, seed: int = 0) -> None:
        self.design = design
        self.clock: ModelClock = ScaledClock() if clock is None else clock
        self.rng = np.random.default_rng(seed)
        self._lock = threading.RLock()
        self._source = SourceSetting(0.0, 0.0, False)
        self._load = LoadSetting("CC", 0.0, False)
        self._faults: dict[str, float] = {}
        self._running = False
        t = self.clock.now_s()
        self._bench = self._solve(t, was_running=False)
        v = _vector(self._bench)
        self._relax = Relaxation(t, design.bench.settle_tau_s, v, v)
        self._cache: tuple[float, BenchPoint] | None = None

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

    def set_load(self, mode: LoadMode, setting: float, enabled: bool) -> None:
        """Program the electronic load: "CC" (setting in A) or "CR" (setting in Ω), on/off."""
        if not math.isfinite(setting):
            raise SettingError(f"set_load: setting={setting!r} must be finite")
        with self._lock:
            self._load = LoadSetting(mode, float(setting), bool(enabled))
            self._event("load", f"{mode} {setting:g}, {'on' if enabled else 'off'}")

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

    # ---- observation ----------------------------------------------------------------
    def terminals(self) -> Terminals:
        """True terminal values at the present model time, dynamics included."""
        with self._lock:
            t = self.clock.now_s()
            bp = self._target(t)
            v = self._relax.value(t, _vector(bp))
            return Terminals(t, v[0], v[1], bp.source_limited, v[2], v[3], v[4], v[5], v[6])

    def operating_point(self) -> OperatingPoint:
        """Steady state the DUT is heading to at the present model time."""
        with self._lock:
            return self._target(self.clock.now_s()).op

    def steady_state(self, vin_v: float, load_mode: LoadMode, load_setting: float, *,
                     was_running: bool = False) -> OperatingPoint:
        """Truth for tests: the DUT at ``vin_v`` on its input terminals, load enabled, no dynamics.

        Active faults apply.  ``was_running`` selects the UVLO threshold (off if True, on if False).
        """
        with self._lock:
            t = self.clock.now_s()
            return solve_dut(self.design, float(vin_v), LoadSetting(load_mode, float(load_setting), True),
                             was_running=was_running, faults=self.faults, extra_loss_w=self._extra_loss_w(t))

    @property
    def time_constant_s(self) -> float:
        """Settling time constant after a change while running, model seconds."""
        return self.design.bench.settle_tau_s

    @property
    def soft_start_time_constant_s(self) -> float:
        """Settling time constant after a start from off/UVLO, model seconds."""
        return self.design.bench.soft_start_tau_s

    @property
    def active_time_constant_s(self) -> float:
        """Time constant of the transient in progress, model seconds."""
        with self._lock:
            return self._relax.tau_s

    def settling_time_s(self, step_fraction: float, rel_tol: float) -> float:
        """True time (model s) for a step of relative size ``step_fraction`` to stay within ``rel_tol``.

        τ·ln(step_fraction/rel_tol) with τ of the transient in progress.
        """
        return settling_time(self.active_time_constant_s, step_fraction, rel_tol)

    # ---- small signal -----------------------------------------------------------------
    def loop_transfer(self) -> RationalTF:
        """Loop gain T(s) = H·Gc(s)·Gvd(s)/Vm at the present operating point (CCM or DCM model)."""
        op = self.operating_point()
        if op.state != "regulating":
            raise NotRegulatingError(
                f"{self.design.name}: no closed loop in state {op.state!r} ({op.reason}); "
                "set the source and load so the converter regulates first")
        gvd = plant_gvd(self.design, op.conduction_mode, op.vin_v, op.vsense_v, op.duty, op.r_load_eff_ohm)
        return control_chain(self.design) * gvd

    def loop_gain(self, freq_hz: ArrayLike) -> NDArray[np.complex128]:
        """Complex loop gain T(j2πf) at ``freq_hz`` (Hz)."""
        return self.loop_transfer().response(freq_hz)

    def loop_truth(self) -> LoopTruth:
        """Exact crossover, phase margin and gain margin of the present loop (1 mHz … 100·fsw)."""
        return loop_margins(self.loop_transfer(), 1e-3, 100.0 * self.design.fsw_hz)

    def output_impedance_transfer(self) -> RationalTF:
        """Closed-loop output impedance Zout(s) = Zout_open(s)/(1 + T(s)), Ω."""
        op = self.operating_point()
        loop = self.loop_transfer()
        zo = plant_zout_open(self.design, op.conduction_mode, op.vin_v, op.vsense_v, op.duty, op.r_load_eff_ohm)
        return closed_loop_output_impedance(zo, loop)

    def output_impedance(self, freq_hz: ArrayLike) -> NDArray[np.complex128]:
        """Complex closed-loop output impedance at ``freq_hz`` (Hz), Ω."""
        return self.output_impedance_transfer().response(freq_hz)

    # ---- internals --------------------------------------------------------------------
    def _extra_loss_w(self, t_s: float) -> float:
        t_on = self._faults.get("overheat")
        if t_on is None:
            return 0.0
        f = self.design.faults
        return min(f.overheat_rate_w_per_s * max(t_s - t_on, 0.0), f.overheat_max_w)

    def _solve(self, t_s: float, was_running: bool) -> BenchPoint:
        return solve_bench(self.design, self._source, self._load, was_running=was_running,
                           faults=tuple(sorted(self._faults)), extra_loss_w=self._extra_loss_w(t_s))

    def _target(self, t_s: float) -> BenchPoint:
        if "overheat" not in self._faults or not self._bench.op.running:
            return self._bench
        if self._cache is not None and self._cache[0] == t_s:
            return self._cache[1]
        bp = self._solve(t_s, was_running=True)
        self._cache = (t_s, bp)
        return bp

    def _event(self, what: str, detail: str) -> None:
        t = self.clock.now_s()
        present = self._relax.value(t, _vector(self._target(t)))
        was_running = self._running
        self._cache = None
        self._bench = self._solve(t, was_running)
        self._running = self._bench.op.running
        tau = (self.design.bench.soft_start_tau_s if self._running and not was_running
               else self.design.bench.settle_tau_s)
        self._relax = Relaxation(t, tau, present, _vector(self._bench))
        log.debug("%s at t=%.6f s: %s -> state %s", what, t, detail, self._bench.op.state)
