"""Output protection and hold-up: hiccup over-current, latching over-voltage, the input dropping out.

A converter built with ``ProtectionFeatures`` (``ConverterModel(protection=...)``; off by
default, when the model keeps its plain constant-current limit and an open feedback loop
runs to the open-loop voltage) protects itself as controllers of this class do
(controller data-sheet practice, from memory):

* **Over-current, hiccup.** The output current is held at the design's
  ``current_limit_a`` (the OCP threshold).  When the load needs more and the output,
  held at the limit, sits below ``hiccup_fraction`` of its set point (a short, or a CC load
  above the limit, which drains the output to the load's minimum voltage), the fault timer
  stops switching after ``fault_blank_s`` and the converter retries ``hiccup_off_s`` later:
  on for ``fault_blank_s``, off for ``hiccup_off_s``, period = their sum, duty =
  blank/period.  The output capacitance between: C·dv/dt = i_conv − i_load(v), with
  i_conv = I_lim while switching and 0 while off.  The first on-time starts from the
  state at the overload (the output capacitance discharges into the load at the load's
  own current, which is the peak current into the short).  When the overload goes
  away the converter restarts with its soft start at its next retry (``recovery_delay_s``).
* **Over-voltage, latched.** With the feedback open the amplifier rails and the converter
  charges the output at its current limit, C·dv/dt = I_lim − i_load(v), toward the
  open-loop voltage; when the output crosses ``ovp_v`` the comparator stops switching
  after ``ovp_delay_s`` (so the peak is ovp_v + slope·delay) and latches: the output
  then discharges into the load, C·dv/dt = −i_load(v).  The latch holds until the input
  falls below the UVLO off threshold (a power cycle).
* **Hold-up.** With the input disconnected from the source (the fixture's dropout switch,
  ``ConverterModel.set_input_connected``) the input capacitance — the DUT's own plus a
  fixture's bulk capacitor — feeds the running converter: C·v·dv/dt = −P_in(v) −
  v²/R_bleed, P_in(v) the DUT's input power at input v (its efficiency at that line).  The
  output stays regulated until v reaches the UVLO off threshold; then it stops: the output
  capacitance discharges into the load, C_out·dv/dt = −i_load(v) (a CC load drains it at a
  constant rate, a CR load exponentially with R·C_out), and the input runs down through the
  start-up bleed resistor.

Each is integrated on a grid (explicit Euler, the step well inside the fastest time
constant C·v_min/I of the load) and read back by interpolation, so the scope and the
meters see the same waveform.  The input current while the output is in hiccup or latched
is the cycle's quasi-static value (no input-filter lag).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field, replace
from typing import Any

import numpy as np
from numpy.typing import ArrayLike, NDArray

from .design import ConverterDesign
from .dynamics import INPUT_A, INPUT_V, LOAD_A, OUTPUT_A, OUTPUT_V, SOURCE_A, SOURCE_V

_GRID = 6000


@dataclass(frozen=True)
class ProtectionFeatures:
    """Protection behaviour of a DUT (model seconds, volts); see the module docstring.

    ocp_tolerance: the data sheet's ± tolerance of the OCP threshold (a fraction), for
    limits; the model's threshold is the design's ``current_limit_a`` exactly.
    """

    hiccup_fraction: float = 0.5
    fault_blank_s: float = 3e-3
    hiccup_off_s: float = 27e-3
    ovp_v: float = 6.25
    ovp_delay_s: float = 20e-6
    ocp_tolerance: float = 0.10

    @property
    def hiccup_period_s(self) -> float:
        """On plus off time of one hiccup cycle, s."""
        return self.fault_blank_s + self.hiccup_off_s

    @property
    def hiccup_duty(self) -> float:
        """Fraction of the hiccup period spent switching."""
        return self.fault_blank_s / self.hiccup_period_s

    @classmethod
    def for_design(cls, design: ConverterDesign) -> "ProtectionFeatures":
        """Defaults for ``design``: OVP at 125 % of the nominal output (common practice)."""
        return cls(ovp_v=1.25 * design.vout_nom_v)


def load_current(mode: str, setting: float, enabled: bool, v: NDArray[np.float64], v_min: float,
                 short_ohm: float | None) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """(current out of the output terminals, current in the electronic load) at output ``v``, A.

    A CC load collapses in proportion below its minimum voltage ``v_min``; an
    ``output_short`` (``short_ohm``) conducts v/R beside it.
    """
    v = np.maximum(v, 0.0)
    if not enabled:
        i_load = np.zeros_like(v)
    elif mode == "CR":
        i_load = v / setting
    else:
        i_load = setting * np.minimum(1.0, v / v_min)
    total = i_load + (v / short_ohm if short_ohm else 0.0)
    return total, i_load


@dataclass(frozen=True)
class _Output:
    """What the output side needs: capacitance, load, converter limit."""

    c_f: float
    mode: str
    setting: float
    enabled: bool
    v_min: float
    short_ohm: float | None
    i_lim_a: float
    v_ref_v: float

    def step(self, v: float, i_conv: float, h: float) -> tuple[float, float, float]:
        """One Euler step: (new v, terminal current, load current)."""
        tot, il = load_current(self.mode, self.setting, self.enabled, np.array([v]), self.v_min, self.short_ohm)
        v_new = v + (i_conv - float(tot[0])) * h / self.c_f
        return max(min(v_new, self.v_ref_v), 0.0), float(tot[0]), float(il[0])


def _phase(out: _Output, v0: float, duration_s: float, switching: bool, n: int) -> dict[str, NDArray[np.float64]]:
    """The output over one phase (switching at the limit, or off), on ``n`` + 1 points."""
    t = np.linspace(0.0, duration_s, n + 1)
    h = t[1] - t[0]
    v = np.empty_like(t)
    i_out = np.empty_like(t)
    i_load = np.empty_like(t)
    v[0] = v0
    for k in range(t.size):
        tot, il = load_current(out.mode, out.setting, out.enabled, np.array([v[k]]), out.v_min, out.short_ohm)
        i_out[k], i_load[k] = float(tot[0]), float(il[0])
        if k + 1 < t.size:
            i_conv = out.i_lim_a if switching else 0.0
            v[k + 1] = max(min(v[k] + (i_conv - i_out[k]) * h / out.c_f, out.v_ref_v), 0.0)
    return {"t": t, "v": v, "i_out": i_out, "i_load": i_load}


def _steps_for(out: _Output, duration_s: float) -> int:
    """Grid points so the step stays within a tenth of the load's fastest time constant."""
    fastest = out.c_f * out.v_min / max(out.setting if out.mode == "CC" else 1.0, 1e-9)
    if out.mode == "CR":
        fastest = out.c_f * out.setting
    if out.short_ohm:
        fastest = min(fastest, out.c_f * out.short_ohm)
    return int(min(max(_GRID, 10.0 * duration_s / max(fastest, 1e-12)), 200_000))


@dataclass(frozen=True)
class Hiccup:
    """Hiccup over-current protection from ``t0_s`` on (see module docstring).

    on / off: terminal vectors (source and input side) while switching and while off.
    """

    t0_s: float
    features: ProtectionFeatures
    output: _Output
    v0_v: float
    on: tuple[float, ...]
    off: tuple[float, ...]
    _grid: dict = field(default_factory=dict, init=False, repr=False, compare=False)

    def __post_init__(self) -> None:
        f, out = self.features, self.output
        first_on = _phase(out, self.v0_v, f.fault_blank_s, True, _steps_for(out, f.fault_blank_s))
        first_off = _phase(out, float(first_on["v"][-1]), f.hiccup_off_s, False, _steps_for(out, f.hiccup_off_s))
        cyc_on = _phase(out, float(first_off["v"][-1]), f.fault_blank_s, True, _steps_for(out, f.fault_blank_s))
        cyc_off = _phase(out, float(cyc_on["v"][-1]), f.hiccup_off_s, False, _steps_for(out, f.hiccup_off_s))
        self._grid.update(first=(first_on, first_off), cycle=(cyc_on, cyc_off))

    @property
    def period_s(self) -> float:
        return self.features.hiccup_period_s

    @property
    def tau_s(self) -> float:
        """Long: a hiccup goes on until a setting ends it (the scope reads it as free running)."""
        return 1e6

    @property
    def slowest_tau_s(self) -> float:
        return self.period_s

    @property
    def end_of_drive_s(self) -> float:
        return self.t0_s + 2.0 * self.period_s

    @property
    def sample_times_s(self) -> tuple[float, ...]:
        f = self.features
        return (self.t0_s, self.t0_s + f.fault_blank_s, self.t0_s + self.period_s,
                self.t0_s + self.period_s + f.fault_blank_s, self.t0_s + 2 * self.period_s)

    def recovery_delay_s(self, t_s: float) -> float:
        """Seconds from ``t_s`` to the next retry (0 while switching), s."""
        f = self.features
        x = (t_s - self.t0_s) % self.period_s
        return 0.0 if x < f.fault_blank_s else self.period_s - x

    def switching_at(self, t: NDArray[np.float64]) -> NDArray[np.bool_]:
        """True where the converter switches (the on part of each cycle)."""
        x = np.mod(np.maximum(t - self.t0_s, 0.0), self.period_s)
        return x < self.features.fault_blank_s

    def values_at(self, t_s: ArrayLike, target: ArrayLike) -> NDArray[np.float64]:
        t = np.atleast_1d(np.asarray(t_s, dtype=float))
        dt = np.maximum(t - self.t0_s, 0.0)
        f = self.features
        cycle = np.floor(dt / self.period_s)
        x = dt - cycle * self.period_s
        v = np.empty_like(t)
        i_out = np.empty_like(t)
        i_load = np.empty_like(t)
        for which, sel in (("first", cycle == 0), ("cycle", cycle > 0)):
            if not np.any(sel):
                continue
            ph_on, ph_off = self._grid[which]
            xs = x[sel]
            on = xs < f.fault_blank_s
            for key, arr in (("v", v), ("i_out", i_out), ("i_load", i_load)):
                vals = np.where(on, np.interp(xs, ph_on["t"], ph_on[key]),
                                np.interp(xs - f.fault_blank_s, ph_off["t"], ph_off[key]))
                arr[sel] = vals
        sw = self.switching_at(t)
        out = np.where(sw[None, :], np.asarray(self.on, dtype=float)[:, None],
                       np.asarray(self.off, dtype=float)[:, None])
        out[OUTPUT_V] = v
        out[OUTPUT_A] = i_out
        out[LOAD_A] = i_load
        return out


@dataclass(frozen=True)
class OvpTrip:
    """An open feedback loop caught by the latching over-voltage comparator (module docstring)."""

    t0_s: float
    features: ProtectionFeatures
    output: _Output
    v0_v: float
    v_open_v: float
    running: tuple[float, ...]
    latched: tuple[float, ...]
    settle_tau_s: float
    _grid: dict = field(default_factory=dict, init=False, repr=False, compare=False)

    def __post_init__(self) -> None:
        f = self.features
        out = replace(self.output, v_ref_v=self.v_open_v)
        # rise at the limit until the comparator trips (or the open-loop voltage is reached)
        spare = out.i_lim_a - float(load_current(out.mode, out.setting, out.enabled, np.array([f.ovp_v]),
                                                 out.v_min, out.short_ohm)[0][0])
        if self.v_open_v <= f.ovp_v or spare <= 0.0:
            self._grid.update(trip=None)
            return
        rise_s = out.c_f * max(f.ovp_v - self.v0_v, 0.0) / spare * 1.5 + 1e-6
        up = _phase(out, self.v0_v, rise_s, True, _steps_for(out, rise_s))
        k = int(np.flatnonzero(up["v"] >= f.ovp_v)[0]) if np.any(up["v"] >= f.ovp_v) else up["t"].size - 1
        if k > 0:
            a, b = up["v"][k - 1], up["v"][k]
            t_trip = float(up["t"][k - 1] + (f.ovp_v - a) / (b - a) * (up["t"][k] - up["t"][k - 1]))
        else:
            t_trip = 0.0
        late = _phase(out, f.ovp_v, f.ovp_delay_s, True, 200)
        v_peak = float(late["v"][-1])
        fall_s = 20.0 * self.settle_tau_s
        down = _phase(out, v_peak, fall_s, False, _steps_for(out, fall_s))
        self._grid.update(trip=t_trip, peak=v_peak, up=up, late=late, down=down)

    @property
    def trip_s(self) -> float | None:
        """Model time the output crossed the OVP threshold, or None if it never reaches it."""
        t = self._grid["trip"]
        return None if t is None else self.t0_s + t

    @property
    def peak_v(self) -> float | None:
        """The highest output voltage (at the end of the comparator's delay), V."""
        return None if self._grid["trip"] is None else float(self._grid["peak"])

    @property
    def tau_s(self) -> float:
        return (self._end() + 10.0 * self.settle_tau_s) / 10.0

    @property
    def slowest_tau_s(self) -> float:
        return self.settle_tau_s

    @property
    def end_of_drive_s(self) -> float:
        return self.t0_s + self._end()

    @property
    def sample_times_s(self) -> tuple[float, ...]:
        if self._grid["trip"] is None:
            return (self.t0_s,)
        t_trip = self.t0_s + float(self._grid["trip"])
        return (self.t0_s, t_trip, t_trip + self.features.ovp_delay_s, self.end_of_drive_s)

    def _end(self) -> float:
        g = self._grid
        if g["trip"] is None:
            return 0.0
        return float(g["trip"]) + self.features.ovp_delay_s + float(g["down"]["t"][-1])

    def values_at(self, t_s: ArrayLike, target: ArrayLike) -> NDArray[np.float64]:
        t = np.atleast_1d(np.asarray(t_s, dtype=float))
        g = self._grid
        dt = np.maximum(t - self.t0_s, 0.0)
        if g["trip"] is None:
            return np.repeat(np.asarray(self.running, dtype=float)[:, None], t.size, axis=1)
        t_trip, d = float(g["trip"]), self.features.ovp_delay_s
        t_off = t_trip + d
        out = np.where((dt < t_off)[None, :], np.asarray(self.running, dtype=float)[:, None],
                       np.asarray(self.latched, dtype=float)[:, None])
        for key, row in (("v", OUTPUT_V), ("i_out", OUTPUT_A), ("i_load", LOAD_A)):
            vals = np.where(dt < t_trip, np.interp(dt, g["up"]["t"], g["up"][key]),
                            np.where(dt < t_off, np.interp(dt - t_trip, g["late"]["t"], g["late"][key]),
                                     np.interp(dt - t_off, g["down"]["t"], g["down"][key])))
            out[row] = vals
        return out


@dataclass(frozen=True)
class HoldUp:
    """The input disconnected at ``t0_s`` while the converter runs (module docstring).

    p_in_w(v) is given on ``v_grid_v`` (ascending); vout_grid_v the regulated output there.
    """

    t0_s: float
    c_in_f: float
    v0_v: float
    uvlo_off_v: float
    bleed_ohm: float
    v_grid_v: tuple[float, ...]
    p_in_grid_w: tuple[float, ...]
    vout_grid_v: tuple[float, ...]
    start: tuple[float, ...]
    settle_tau_s: float
    source_v: float
    output: _Output | None = None
    _grid: dict = field(default_factory=dict, init=False, repr=False, compare=False)

    def __post_init__(self) -> None:
        vg, pg = np.asarray(self.v_grid_v), np.asarray(self.p_in_grid_w)
        g_bleed = 0.0 if math.isinf(self.bleed_ohm) else 1.0 / self.bleed_ohm
        # energy form: d(v²)/dt = −2·(P_in(v) + v²/R)/C, integrated in v² (smooth, no stiffness)
        n = _GRID
        v = np.linspace(self.v0_v, self.uvlo_off_v, n + 1) if self.v0_v > self.uvlo_off_v else np.array([self.v0_v])
        p = np.interp(v, vg, pg) + v * v * g_bleed
        # t(v) = ∫ C·v dv / P(v) from v down to v0 (trapezoid on the fine v grid)
        integrand = self.c_in_f * v / p
        t = np.concatenate([[0.0], np.cumsum(0.5 * (integrand[1:] + integrand[:-1]) * -np.diff(v))])
        self._grid.update(t=t, v=v, p=p, t_stop=float(t[-1]))
        if self.output is not None:   # after the stop: C_out·dv/dt = −i_load(v), the converter off
            v_stop = float(np.interp(self.uvlo_off_v, vg, np.asarray(self.vout_grid_v)))
            out = self.output
            i0 = float(load_current(out.mode, out.setting, out.enabled, np.array([v_stop]), out.v_min,
                                    out.short_ohm)[0][0])
            drain_s = 5.0 * out.c_f * v_stop / i0 if i0 > 0.0 else 5.0 * self.settle_tau_s
            phase = _phase(out, v_stop, drain_s, False, _steps_for(out, drain_s))
            self._grid.update(discharge_t=phase["t"], discharge_v=phase["v"])

    @property
    def stop_s(self) -> float:
        """Model time at which the input reached the UVLO off threshold and switching stopped."""
        return self.t0_s + float(self._grid["t_stop"])

    @property
    def tau_s(self) -> float:
        return (float(self._grid["t_stop"]) + 10.0 * self.slowest_tau_s) / 10.0

    @property
    def slowest_tau_s(self) -> float:
        return max(self.settle_tau_s, self.c_in_f * self.bleed_ohm if math.isfinite(self.bleed_ohm) else 0.0)

    @property
    def end_of_drive_s(self) -> float:
        return self.stop_s

    @property
    def sample_times_s(self) -> tuple[float, ...]:
        return (self.t0_s, self.stop_s)

    def input_v_at(self, t: NDArray[np.float64]) -> NDArray[np.float64]:
        """Input voltage at model times ``t``, V."""
        g = self._grid
        dt = np.maximum(t - self.t0_s, 0.0)
        v = np.interp(dt, g["t"], g["v"])
        after = dt > g["t_stop"]
        if np.any(after) and math.isfinite(self.bleed_ohm):
            v[after] = self.uvlo_off_v * np.exp(-(dt[after] - g["t_stop"]) / (self.c_in_f * self.bleed_ohm))
        return v

    def values_at(self, t_s: ArrayLike, target: ArrayLike) -> NDArray[np.float64]:
        t = np.atleast_1d(np.asarray(t_s, dtype=float))
        g = self._grid
        dt = np.maximum(t - self.t0_s, 0.0)
        running = dt <= g["t_stop"]
        v_in = self.input_v_at(t)
        vg = np.asarray(self.v_grid_v)
        p = np.interp(v_in, vg, np.asarray(self.p_in_grid_w))
        g_bleed = 0.0 if math.isinf(self.bleed_ohm) else 1.0 / self.bleed_ohm
        out = np.repeat(np.asarray(self.start, dtype=float)[:, None], t.size, axis=1)
        out[SOURCE_V] = self.source_v
        out[SOURCE_A] = 0.0
        out[INPUT_V] = v_in
        out[INPUT_A] = np.where(running, p / np.maximum(v_in, 1e-9), 0.0) + v_in * g_bleed
        v_reg = np.interp(v_in, vg, np.asarray(self.vout_grid_v))
        v_at_stop = float(np.interp(self.uvlo_off_v, vg, np.asarray(self.vout_grid_v)))
        after_stop = np.maximum(dt - g["t_stop"], 0.0)
        if "discharge_t" in g:
            stopped = np.interp(after_stop, g["discharge_t"], g["discharge_v"])
        else:
            stopped = v_at_stop * np.exp(-after_stop / self.settle_tau_s)
        vout = np.where(running, v_reg, stopped)
        scale = np.divide(vout, self.start[OUTPUT_V], out=np.zeros_like(vout), where=self.start[OUTPUT_V] > 0)
        out[OUTPUT_V] = vout
        if self.output is not None:   # the load's own current at the falling output
            o = self.output
            i_out, i_load = load_current(o.mode, o.setting, o.enabled, vout, o.v_min, o.short_ohm)
            out[OUTPUT_A] = np.where(running, self.start[OUTPUT_A], i_out)
            out[LOAD_A] = np.where(running, self.start[LOAD_A], i_load)
            return out
        out[OUTPUT_A] = np.where(running, self.start[OUTPUT_A], self.start[OUTPUT_A] * scale)
        out[LOAD_A] = np.where(running, self.start[LOAD_A], self.start[LOAD_A] * scale)
        return out


def output_side(model: Any, c_out_f: float) -> _Output:
    """The output as the protection transients see it (the model's present load and limit)."""
    d = model.design
    load = model._load
    short = d.faults.short_ohm if "output_short" in model._faults else None
    return _Output(c_out_f, load.mode, load.setting, load.enabled, d.start_up.load_min_v, short,
                   d.protection.current_limit_a, model.design.vout_setpoint_v)


def _idle_vector(bench: Any) -> tuple[float, ...]:
    return (bench.source_v, bench.source_a, bench.input_v, bench.input_a, 0.0, 0.0, 0.0)


def latched_bench(model: Any, bench: Any) -> Any:
    """``bench`` with the DUT held off by the OVP latch, or ``bench`` itself when the latch is
    not set; the latch clears once the DUT is unpowered (input off or under its lockout)."""
    from .operating_point import BenchPoint, _unpowered

    if not model._ovp_latched:
        return bench
    if bench.op.state in ("off", "uvlo"):
        model._ovp_latched = False
        return bench
    d = model.design
    rb = d.losses.input_bleed_ohm
    rc = d.bench.cable_r_ohm
    vs = bench.source_v
    v_idle = vs if math.isinf(rb) else vs * rb / (rb + rc)
    op = _unpowered(d, v_idle, "off", "latched off by the over-voltage protection; take the input below the "
                    "UVLO off threshold to restart", bench.op.faults)
    return BenchPoint(vs, op.iin_a, False, v_idle, op.iin_a, op)


def protection_transient(model: Any, t: float, present: tuple[float, ...], prev: Any, bench: Any,
                         was_running: bool, transient: Any) -> Any:
    """The transient a protected DUT follows after the event at ``t`` (``transient`` when no
    protection feature applies): hiccup, the OVP trip, the recovery from a hiccup, a hold-up."""
    from .start_up import StartUp

    f: ProtectionFeatures | None = model._protection
    d = model.design
    op = bench.op
    if (not model._input_connected and was_running and present[INPUT_V] > d.protection.uvlo_off_v
            and not isinstance(prev.transient, HoldUp)):
        return _hold_up(model, t, present)
    if f is None:
        return transient
    c_out = model.output_capacitance_f
    if op.state == "current_limit" and op.vout_v < f.hiccup_fraction * d.vout_setpoint_v:
        if isinstance(prev.transient, Hiccup):      # a new overload setting: the cycle goes on
            return Hiccup(prev.transient.t0_s, f, output_side(model, c_out), prev.transient.v0_v,
                          _vector_of(bench), _idle_vector(bench))
        return Hiccup(t, f, output_side(model, c_out), present[OUTPUT_V], _vector_of(bench), _idle_vector(bench))
    if op.state == "feedback_open" and op.vout_v > f.ovp_v and not model._ovp_latched:
        model._ovp_latched = True
        latched = latched_bench(model, bench)
        pin = present[INPUT_V] * present[INPUT_A]
        running = list(_vector_of(bench))
        return OvpTrip(t, f, output_side(model, c_out), present[OUTPUT_V], op.vout_v, tuple(running),
                       _idle_vector(latched), d.bench.settle_tau_s) if pin >= 0.0 else transient
    if isinstance(prev.transient, Hiccup) and op.state == "regulating":
        start = model._start_up(t, present, bench)
        return StartUp(t, replace(start.inputs, delay_s=prev.transient.recovery_delay_s(t)), present, start.final)
    return transient


def _vector_of(bench: Any) -> tuple[float, ...]:
    op = bench.op
    return (bench.source_v, bench.source_a, bench.input_v, bench.input_a, op.vout_v, op.iout_a, op.load_a)


def _hold_up(model: Any, t: float, present: tuple[float, ...]) -> HoldUp:
    from .operating_point import solve_dut

    d = model.design
    v0 = present[INPUT_V]
    grid = np.linspace(d.protection.uvlo_off_v, max(v0, d.protection.uvlo_off_v + 1e-6), 17)
    # just above the threshold: at it exactly the DUT is already locked out
    ops = [solve_dut(d, max(float(v), d.protection.uvlo_off_v * (1.0 + 1e-9)), model._load, was_running=True,
                     faults=tuple(sorted(model._faults))) for v in grid]
    bleed = d.losses.input_bleed_ohm
    p_conv = [o.pin_w - (0.0 if math.isinf(bleed) else float(v) ** 2 / bleed) for o, v in zip(ops, grid)]
    return HoldUp(t, d.start_up.input_capacitance_f + model._extra_input_c_f, v0, d.protection.uvlo_off_v, bleed,
                  tuple(float(v) for v in grid), tuple(float(p) for p in p_conv),
                  tuple(o.vout_v for o in ops), present, d.bench.settle_tau_s, model._source.voltage_v,
                  output_side(model, model.output_capacitance_f))
