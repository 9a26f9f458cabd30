"""Waveforms of the simulated converter, synthesised from the model (the scope's physics).

The simulated oscilloscope asks this module for the value of a probed signal at an
array of model times; nothing here is a stored shape. Signals (``SIGNALS``):

``vout``
    DC output of the operating point, plus the switching ripple of the output
    capacitor (its charge, (1/C)∫i_c dt, and its ESR, ESR·i_c, with i_c the
    rectifier/inductor current minus its mean, per cycle), plus the response to load
    steps: ΔI times the step (or slew-ramp) response of the closed-loop output
    impedance Zout(s) = Zout_open(s)/(1 + T(s)) built from the very small-signal model
    the loop analyzer uses (``converter.small_signal``), linearised at the operating
    point before the first step of the record. Step and ramp responses come from the
    partial-fraction expansion of Zout(s)/s and Zout(s)/s² over its poles
    (any linear-systems text; scipy.signal.step is the cross-check in the tests).
``switch_current``
    Main-switch current (flyback primary, buck high side): a ramp from the valley to
    the peak during the on-time in CCM (a trapezoid), from zero in DCM (a triangle),
    plus the leading-edge spike of the switch-node capacitance discharge
    (Q = C_oss·V_off spread over the rise time).
``drain``
    Switch (drain / switch-node) voltage. Flyback: at turn-off the leakage current
    charges the node to the RCD clamp level, holds it while the leakage resets, then
    the leakage inductance rings with the switch-node capacitance (plus any fixture
    capacitance) around Vin + V_reflected; without a clamp the ring starts from the
    turn-off with the leakage current as its initial condition. In DCM the
    magnetizing inductance rings with the same capacitance once the secondary stops.
    Buck: the node steps from −Vf (dead time) to Vin at turn-on and rings with the
    loop inductance and the node capacitance; in DCM it rings around Vout with the
    output inductor after the low side opens.
``output_current``
    The electronic load's current, including its dynamic-mode steps and slew.
``gate``
    Gate drive of the main switch: 0 V / gate_drive_v during the on-time.
``vin``, ``input_current``
    The DUT's input voltage and current, from the model's own time series
    (``ConverterModel.terminal_series``): the inrush into the input capacitance, the
    input filter's lag, starts and stops.  While the model is in a start, stop or
    lock-out (``free_running_mask``), ``vout`` and ``output_current`` also come from that
    series (the soft start, the discharge after a stop), without switching ripple.

Ring: f_n = 1/(2π√(L·C)) (LC resonance) with damping ζ = r_s/(2·Z0) + G·Z0/2, Z0 = √(L/C):
r_s the series loss (winding or switch resistance), G the conductance of the RC snubber
at f_n (referred through the transformer for the flyback, R/n² and C·n²). RCD clamp
level from the clamp's energy balance V_c²/R_c = ½·L_lk·I_pk²·fs·V_c/(V_c − V_r)
(power-supply application-note practice, from memory).

Load activity (dynamic mode of the electronic load) is shared between the load and
the scope through :func:`activity_for`, keyed on the one converter model both see.
Switching turn-on edges sit at whole multiples of Ts in model time.
"""

from __future__ import annotations

import math
import threading
import weakref
from collections import deque
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from numpy.typing import NDArray

from .converter.design import ConverterDesign
from .converter.operating_point import OperatingPoint
from .converter.small_signal import (RationalTF, closed_loop_output_impedance, control_chain, plant_gvd,
                                     plant_zout_open)

SIGNALS = ("vout", "drain", "switch_current", "output_current", "gate", "vin", "input_current")
SIGNAL_UNITS = {"vout": "V", "drain": "V", "switch_current": "A", "output_current": "A", "gate": "V",
                "vin": "V", "input_current": "A"}
#: Signals read from the model's terminal time series, and their index in its vector
#: (``converter.dynamics.QUANTITIES``: input_v 2, input_a 3, output_v 4, load_a 6).
SERIES_INDEX = {"vin": 2, "input_current": 3, "vout": 4, "output_current": 6}
#: Signals that always come from the series (the others only during starts and stops).
SERIES_ONLY = ("vin", "input_current")
_CYCLE_POINTS = 4096


def probed_signal(model: Any, synth: "RecordSynth", name: str, t: NDArray[np.float64]) -> NDArray[np.float64]:
    """Value of probed signal ``name`` at increasing model times ``t``: the switching
    synthesis, or the model's terminal series where the module docstring says so."""
    t = np.asarray(t, dtype=float)
    if name in SERIES_ONLY:
        return np.asarray(model.terminal_series(t)[SERIES_INDEX[name]], dtype=float)
    v = synth.signal(name, t)
    line = getattr(model, "line_output_excess_v", None)
    if name == "vout" and line is not None:     # line steps and line injection (converter.line_disturbance)
        v = np.asarray(v, dtype=float) + line(t)
    if name in SERIES_INDEX:
        mask = model.free_running_mask(t)
        if mask.any():
            v = np.array(v, dtype=float)
            v[mask] = model.terminal_series(t[mask])[SERIES_INDEX[name]]
    return v


# ---------------------------------------------------------------- load activity
@dataclass(frozen=True)
class LoadStep:
    """One current step of the electronic load at model time ``t_s`` (A, A/s).

    ``op_before`` / ``op_after`` are the model's steady states just before and after it;
    ``trigger_out`` tells whether the load pulsed its trigger output at the step.
    """

    t_s: float
    from_a: float
    to_a: float
    slew_a_per_s: float
    op_before: OperatingPoint
    op_after: OperatingPoint
    trigger_out: bool = True

    @property
    def ramp_s(self) -> float:
        """Duration of the slew ramp, s (0 for an instant step)."""
        if not math.isfinite(self.slew_a_per_s) or self.slew_a_per_s <= 0:
            return 0.0
        return abs(self.to_a - self.from_a) / self.slew_a_per_s


@dataclass(frozen=True)
class PulseTrain:
    """Continuous dynamic mode: a square wave between ``low_a`` and ``high_a`` (50 % duty),
    starting at model time ``t0_s`` on the low level, ``freq_hz`` repetitions per second."""

    t0_s: float
    low_a: float
    high_a: float
    freq_hz: float
    slew_a_per_s: float
    op_low: OperatingPoint
    op_high: OperatingPoint

    def edges(self, t_from_s: float, t_to_s: float, limit: int = 4000) -> list[LoadStep]:
        """The train's edges in [t_from_s, t_to_s] (at most ``limit``, the latest ones)."""
        half = 0.5 / self.freq_hz
        k0 = max(1, math.ceil((t_from_s - self.t0_s) / half))
        k1 = math.floor((t_to_s - self.t0_s) / half)
        k0 = max(k0, k1 - limit + 1)
        out = []
        for k in range(k0, k1 + 1):
            rising = k % 2 == 1
            out.append(LoadStep(self.t0_s + k * half, self.low_a if rising else self.high_a,
                                self.high_a if rising else self.low_a, self.slew_a_per_s,
                                self.op_low if rising else self.op_high, self.op_high if rising else self.op_low,
                                True))
        return out


class LoadActivity:
    """What the electronic load did recently: single steps and a running pulse train. Thread-safe."""

    def __init__(self, keep: int = 256) -> None:
        self._lock = threading.Lock()
        self._steps: deque[LoadStep] = deque(maxlen=keep)
        self._train: PulseTrain | None = None

    def add_step(self, step: LoadStep) -> None:
        with self._lock:
            self._steps.append(step)

    def set_train(self, train: PulseTrain | None) -> None:
        with self._lock:
            self._train = train

    @property
    def train(self) -> PulseTrain | None:
        with self._lock:
            return self._train

    def steps_between(self, t_from_s: float, t_to_s: float) -> list[LoadStep]:
        """Every step (single or of the train) with t_from_s <= t <= t_to_s, in time order."""
        with self._lock:
            steps = [s for s in self._steps if t_from_s <= s.t_s <= t_to_s]
            train = self._train
        if train is not None:
            steps += train.edges(max(t_from_s, train.t0_s), t_to_s)
        return sorted(steps, key=lambda s: s.t_s)


_ACTIVITY: "weakref.WeakKeyDictionary[Any, LoadActivity]" = weakref.WeakKeyDictionary()
_ACTIVITY_LOCK = threading.Lock()


def activity_for(model: Any) -> LoadActivity:
    """The load activity shared by every instrument on ``model`` (created on first use)."""
    with _ACTIVITY_LOCK:
        act = _ACTIVITY.get(model)
        if act is None:
            act = LoadActivity()
            _ACTIVITY[model] = act
        return act


# ---------------------------------------------------------------- small signal
def closed_loop_zout(design: ConverterDesign, op: OperatingPoint) -> RationalTF | None:
    """Zout(s) = Zout_open/(1 + T) at ``op`` (Ω), the model's own small-signal chain; None when not regulating."""
    if op.state != "regulating":
        return None
    gvd = plant_gvd(design, op.conduction_mode, op.vin_v, op.vsense_v, op.duty, op.r_load_eff_ohm)
    loop = control_chain(design) * gvd
    zo = plant_zout_open(design, op.conduction_mode, op.vin_v, op.vsense_v, op.duty, op.r_load_eff_ohm)
    return closed_loop_output_impedance(zo, loop)


@dataclass(frozen=True)
class ImpedanceResponse:
    """Step and ramp responses of an impedance from its poles (partial fractions).

    step(t) = Z(0) + Σ r_i·e^(p_i·t); ramp(t) = Z(0)·t + Σ (r_i/p_i)(e^(p_i·t) − 1),
    r_i the residues of Z(s)/s at its poles p_i (distinct poles assumed).
    """

    dc_ohm: float
    poles: NDArray[np.complex128]
    residues: NDArray[np.complex128]
    memory_s: float

    @classmethod
    def from_tf(cls, tf: RationalTF) -> "ImpedanceResponse":
        from .converter.load_response import step_partial_fractions

        dc, poles, res = step_partial_fractions(tf)
        if not np.any(np.asarray(tf.num, float)):
            return cls(0.0, poles, res, 0.0)
        slowest = float(np.min(np.abs(poles.real))) if poles.size else 1.0
        return cls(dc, poles, res, 12.0 / max(slowest, 1e-6))

    def step(self, t: NDArray[np.float64]) -> NDArray[np.float64]:
        tt = np.maximum(t, 0.0)
        e = np.exp(np.outer(tt, self.poles))
        y = self.dc_ohm + (e @ self.residues).real
        return np.where(t > 0, y, 0.0)

    def ramp(self, t: NDArray[np.float64]) -> NDArray[np.float64]:
        tt = np.maximum(t, 0.0)
        e = np.expm1(np.outer(tt, self.poles))
        y = self.dc_ohm * tt + (e @ (self.residues / self.poles)).real
        return np.where(t > 0, y, 0.0)


# ---------------------------------------------------------------- ring physics
@dataclass(frozen=True)
class RingParameters:
    """An LC ring: L (H), C (F), natural frequency (Hz), damping ratio, Z0 = √(L/C) (Ω)."""

    l_h: float
    c_f: float
    f_natural_hz: float
    damping_ratio: float
    z0_ohm: float

    @property
    def alpha_per_s(self) -> float:
        return self.damping_ratio * 2 * math.pi * self.f_natural_hz

    @property
    def omega_d_rad_s(self) -> float:
        return 2 * math.pi * self.f_natural_hz * math.sqrt(max(1.0 - self.damping_ratio ** 2, 1e-6))


def _ring(design: ConverterDesign, l_h: float, c_f: float) -> RingParameters | None:
    if not (l_h > 0 and c_f > 0):
        return None
    pa, ls = design.parasitics, design.losses
    w0 = 1.0 / math.sqrt(l_h * c_f)
    z0 = math.sqrt(l_h / c_f)
    if design.topology == "flyback":
        n = design.stage.turns_ratio
        r_sn, c_sn, r_s = pa.snubber_r_ohm / n ** 2, pa.snubber_c_f * n ** 2, ls.r_primary_ohm
    else:
        r_sn, c_sn, r_s = pa.snubber_r_ohm, pa.snubber_c_f, ls.r_switch_ohm
    g = 0.0
    if c_sn > 0 and math.isfinite(r_sn):
        y = 1.0 / (r_sn + 1.0 / (1j * w0 * c_sn))
        g = y.real
    zeta = min(r_s / (2 * z0) + g * z0 / 2, 0.9)
    return RingParameters(l_h, c_f, w0 / (2 * math.pi), zeta, z0)


def ring_parameters(design: ConverterDesign, extra_c_f: float = 0.0) -> RingParameters | None:
    """Turn-off ring of the switch node: leakage (loop) L with C_sw + ``extra_c_f``; None without parasitics."""
    return _ring(design, design.parasitics.leakage_h, design.parasitics.switch_node_c_f + extra_c_f)


def clamp_voltage_v(design: ConverterDesign, i_pk_a: float, v_reflected_v: float) -> float | None:
    """RCD clamp voltage across the primary (V), or None when the design has no clamp."""
    pa = design.parasitics
    if not (math.isfinite(pa.clamp_r_ohm) and pa.clamp_c_f > 0 and pa.leakage_h > 0):
        return None
    k = pa.clamp_r_ohm * 0.5 * pa.leakage_h * i_pk_a ** 2 * design.fsw_hz
    return 0.5 * (v_reflected_v + math.sqrt(v_reflected_v ** 2 + 4 * k))


def _damped(ring: RingParameters, s: NDArray[np.float64], v0: float, dv0: float) -> NDArray[np.float64]:
    """Deviation e^(−αs)(A cos ωd s + B sin ωd s) with value v0 and slope dv0 at s = 0."""
    a, wd = ring.alpha_per_s, ring.omega_d_rad_s
    b = (dv0 + a * v0) / wd
    return np.exp(-a * s) * (v0 * np.cos(wd * s) + b * np.sin(wd * s))


# ---------------------------------------------------------------- one cycle
@dataclass(frozen=True)
class CycleShape:
    """Everything needed to evaluate switching signals of one operating point."""

    op: OperatingPoint
    ts_s: float
    t_on_s: float
    t_end_s: float  # end of the freewheel interval ((D + D2)·Ts)
    ripple_grid_s: NDArray[np.float64]
    ripple_v: NDArray[np.float64]
    cycle_mean: dict[str, float] = field(default_factory=dict)


def _cap_current(design: ConverterDesign, op: OperatingPoint, tau: NDArray[np.float64]) -> NDArray[np.float64]:
    sp = op.stage
    assert sp is not None
    ts = design.ts_s
    t_on = sp.duty * ts
    t_off_end = min((sp.duty + sp.d2) * ts, ts)
    on = tau < t_on
    fw = (tau >= t_on) & (tau < t_off_end)
    dcm = sp.mode == "DCM"
    if design.topology == "buck":
        valley = 0.0 if dcm else sp.l_valley_a
        i = np.zeros_like(tau)
        if t_on > 0:
            i = np.where(on, valley + (sp.l_peak_a - valley) * tau / t_on, i)
        span = max(t_off_end - t_on, 1e-30)
        end_val = 0.0 if dcm else valley
        i = np.where(fw, sp.l_peak_a - (sp.l_peak_a - end_val) * (tau - t_on) / span, i)
    else:
        n = design.stage.turns_ratio
        valley = 0.0 if dcm else sp.l_valley_a
        span = max(t_off_end - t_on, 1e-30)
        i = np.where(fw, (sp.l_peak_a - (sp.l_peak_a - valley) * (tau - t_on) / span) / n, 0.0)
        if not dcm:
            i = np.where(on, 0.0, i)
    return i - i.mean()


def cycle_shape(design: ConverterDesign, op: OperatingPoint) -> CycleShape | None:
    """The switching cycle of ``op`` (None when the converter does not switch)."""
    sp = op.stage
    if sp is None or not op.running or sp.duty <= 0:
        return None
    ts = design.ts_s
    tau = (np.arange(_CYCLE_POINTS) + 0.5) * ts / _CYCLE_POINTS
    i_c = _cap_current(design, op, tau)
    dt = ts / _CYCLE_POINTS
    v_c = np.cumsum(i_c) * dt / design.stage.c_out_f
    ripple = v_c - v_c.mean() + design.stage.esr_ohm * i_c
    return CycleShape(op, ts, sp.duty * ts, min((sp.duty + sp.d2) * ts, ts), tau, ripple)


def _reflected_v(design: ConverterDesign, op: OperatingPoint) -> float:
    assert op.stage is not None
    return (op.stage.v_v + design.losses.rect_vf_v) / design.stage.turns_ratio


def switching_signal(design: ConverterDesign, shape: CycleShape | None, name: str, t: NDArray[np.float64],
                     extra_c_f: float = 0.0) -> NDArray[np.float64]:
    """``drain``, ``switch_current``, ``gate`` or the ripple part of ``vout`` at model times ``t``."""
    if shape is None:  # not switching: the node sits at 0 V and no current flows
        return np.zeros_like(t)
    op, sp = shape.op, shape.op.stage
    assert sp is not None
    ts, t_on = shape.ts_s, shape.t_on_s
    tau = np.mod(t, ts)
    on = tau < t_on
    ls = design.losses
    if name == "gate":
        return np.where(on, ls.gate_drive_v, 0.0)
    if name == "vout_ripple":
        return np.interp(tau, shape.ripple_grid_s, shape.ripple_v, period=ts)
    dcm = sp.mode == "DCM"
    valley = 0.0 if dcm else sp.l_valley_a
    if name == "switch_current":
        i = np.where(on, valley + (sp.l_peak_a - valley) * tau / max(t_on, 1e-30), 0.0)
        if ls.c_oss_f > 0 and ls.t_rise_s > 0:
            v_off = (op.vin_v + _reflected_v(design, op) * (0.0 if dcm else 1.0)) if design.topology == "flyback" \
                else op.vin_v
            q = ls.c_oss_f * v_off
            i = i + np.where(on, q / ls.t_rise_s * np.exp(-tau / ls.t_rise_s), 0.0)
        return i
    if name != "drain":
        raise ValueError(f"unknown switching signal {name!r}")
    ring = ring_parameters(design, extra_c_f)
    if design.topology == "flyback":
        return _flyback_drain(design, shape, tau, ring, extra_c_f)
    return _buck_node(design, shape, tau, ring, extra_c_f)


def _flyback_drain(design: ConverterDesign, shape: CycleShape, tau: NDArray[np.float64],
                   ring: RingParameters | None, extra_c_f: float) -> NDArray[np.float64]:
    op, sp = shape.op, shape.op.stage
    assert sp is not None
    t_on, t_end = shape.t_on_s, shape.t_end_s
    vin = op.vin_v
    vr = _reflected_v(design, op)
    vp = vin + vr
    i_pk = sp.l_peak_a
    valley = 0.0 if sp.mode == "DCM" else sp.l_valley_a
    v = np.where(tau < t_on, (valley + (i_pk - valley) * tau / max(t_on, 1e-30)) * design.losses.r_switch_ohm, vp)
    s = tau - t_on
    off = tau >= t_on
    if ring is not None and i_pk > 0:
        vc = clamp_voltage_v(design, i_pk, vr)
        natural_peak = vp + math.hypot(vp, i_pk * ring.z0_ohm)
        if vc is not None and vin + vc < natural_peak:
            t1 = (vin + vc) * ring.c_f / i_pk
            t2 = t1 + ring.l_h * i_pk / max(vc - vr, 1e-9)
            rise = off & (s < t1)
            hold = off & (s >= t1) & (s < t2)
            after = off & (s >= t2)
            v = np.where(rise, (vin + vc) * s / t1, v)
            v = np.where(hold, vin + vc, v)
            v = np.where(after, vp + _damped(ring, np.maximum(s - t2, 0.0), vc - vr, 0.0), v)
        else:
            v = np.where(off, vp + _damped(ring, np.maximum(s, 0.0), -vp, i_pk / ring.c_f), v)
    if sp.mode == "DCM" and t_end < shape.ts_s:
        mag = _ring(design, design.stage.inductance_h, design.parasitics.switch_node_c_f + extra_c_f)
        idle = tau >= t_end
        if mag is not None:
            v = np.where(idle, vin + _damped(mag, np.maximum(tau - t_end, 0.0), vr, 0.0), v)
        else:
            v = np.where(idle, vin, v)
    return v


def _buck_node(design: ConverterDesign, shape: CycleShape, tau: NDArray[np.float64],
               ring: RingParameters | None, extra_c_f: float) -> NDArray[np.float64]:
    op, sp = shape.op, shape.op.stage
    assert sp is not None
    ls = design.losses
    t_on, t_end = shape.t_on_s, shape.t_end_s
    vin = op.vin_v
    dcm = sp.mode == "DCM"
    valley = 0.0 if dcm else sp.l_valley_a
    i_on = valley + (sp.l_peak_a - valley) * tau / max(t_on, 1e-30)
    v_before = op.vout_v if dcm else -ls.body_diode_vf_v
    v_on = vin - i_on * ls.r_switch_ohm
    if ring is not None:
        v_on = v_on + _damped(ring, tau, v_before - vin, 0.0)
    fw = tau >= t_on
    span = max(t_end - t_on, 1e-30)
    i_fw = sp.l_peak_a - (sp.l_peak_a - (0.0 if dcm else valley)) * (tau - t_on) / span
    v_fw = np.where(tau - t_on < ls.dead_time_s, -ls.body_diode_vf_v, -i_fw * ls.r_sync_ohm)
    v = np.where(fw, v_fw, v_on)
    if dcm and t_end < shape.ts_s:
        lc = _ring(design, design.stage.inductance_h, design.parasitics.switch_node_c_f + extra_c_f)
        idle = tau >= t_end
        dev = _damped(lc, np.maximum(tau - t_end, 0.0), -op.vout_v, 0.0) if lc is not None else 0.0
        v = np.where(idle, op.vout_v + dev, v)
    return v


# ---------------------------------------------------------------- whole records
@dataclass(frozen=True)
class RecordContext:
    """What a record depends on: design, the base operating point and the load steps in view."""

    design: ConverterDesign
    op_base: OperatingPoint
    steps: tuple[LoadStep, ...]
    extra_c_f: float = 0.0


class RecordSynth:
    """Evaluates every signal of one record (cycle shapes and Zout computed once)."""

    def __init__(self, ctx: RecordContext) -> None:
        self.ctx = ctx
        d = ctx.design
        self._shapes: list[tuple[float, CycleShape | None]] = [(-math.inf, cycle_shape(d, ctx.op_base))]
        for st in ctx.steps:
            self._shapes.append((st.t_s, cycle_shape(d, st.op_after)))
        zt = closed_loop_zout(d, ctx.op_base)
        self.zout = None if zt is None else ImpedanceResponse.from_tf(zt)

    def _piecewise(self, name: str, t: NDArray[np.float64]) -> NDArray[np.float64]:
        out = np.empty_like(t)
        bounds = [b for b, _ in self._shapes[1:]] + [math.inf]
        for (t0, shape), t1 in zip(self._shapes, bounds):
            sel = (t >= t0) & (t < t1)
            if sel.any():
                out[sel] = switching_signal(self.ctx.design, shape, name, t[sel], self.ctx.extra_c_f)
        return out

    def load_current(self, t: NDArray[np.float64]) -> NDArray[np.float64]:
        steps = self.ctx.steps
        i = np.full_like(t, steps[0].from_a if steps else self.ctx.op_base.load_a)
        for st in steps:
            frac = np.clip((t - st.t_s) / st.ramp_s, 0.0, 1.0) if st.ramp_s > 0 else (t >= st.t_s).astype(float)
            i = i + (st.to_a - st.from_a) * frac
        return i

    def vout_dc(self, t: NDArray[np.float64]) -> NDArray[np.float64]:
        """Output voltage without ripple: base DC and the load-step responses."""
        v = np.full_like(t, self.ctx.op_base.vout_v)
        for st in self.ctx.steps:
            di = st.to_a - st.from_a
            tau = t - st.t_s
            if self.zout is None:
                tc = self.ctx.design.bench.settle_tau_s
                v = v + (st.op_after.vout_v - st.op_before.vout_v) * np.where(tau > 0, -np.expm1(-tau / tc), 0.0)
                continue
            if st.ramp_s > 0:
                g = (self.zout.ramp(tau) - self.zout.ramp(tau - st.ramp_s)) / st.ramp_s
            else:
                g = self.zout.step(tau)
            v = v - di * g
        return v

    def signal(self, name: str, t: NDArray[np.float64]) -> NDArray[np.float64]:
        """Value of signal ``name`` (one of SIGNALS) at model times ``t`` (V or A)."""
        t = np.asarray(t, dtype=float)
        if name == "output_current":
            return self.load_current(t)
        if name == "vout":
            return self.vout_dc(t) + self._piecewise("vout_ripple", t)
        if name in ("drain", "switch_current", "gate"):
            return self._piecewise(name, t)
        raise ValueError(f"unknown signal {name!r}; signals: {', '.join(SIGNALS)}")

    def dc_level(self, name: str) -> float:
        """Cycle-mean value of ``name`` at the base operating point (what AC coupling removes)."""
        if name == "vin":
            return self.ctx.op_base.vin_v
        if name == "input_current":
            return self.ctx.op_base.iin_a
        if name == "vout":
            return self.ctx.op_base.vout_v
        if name == "output_current":
            return self.ctx.steps[0].from_a if self.ctx.steps else self.ctx.op_base.load_a
        shape = self._shapes[0][1]
        if shape is None:
            return 0.0
        tau = shape.ripple_grid_s
        return float(np.mean(switching_signal(self.ctx.design, shape, name, tau, self.ctx.extra_c_f)))
