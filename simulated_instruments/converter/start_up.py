"""A start from off: inrush into the input capacitance, UVLO, delay, soft-start ramp.

When a setting starts the converter (``StartUp``), the terminal quantities follow the
physics of a start instead of one exponential:

* input: the DUT's input capacitance C_in charges from the source through the cable R.
  While (V_s − v)/R exceeds the source's current limit I_lim the source delivers I_lim and
  v rises linearly at I_lim/C_in; then i = (V_s − v)/R decays with τ = R·C_in (the RC
  charge of any circuits text; ∫i²dt = C·ΔV²/(2R) for the exponential part).  The source's
  terminal voltage is v + R·i.
* the controller: switching begins ``start_delay_s`` after the input crosses the UVLO on
  threshold; the reference ramps linearly from 0 to its final value over ``soft_start_s``
  and the output follows it (a pre-biased output is not pulled down: it waits for the
  ramp).  The converter's output current is C_out·dv/dt plus the load's current; it is
  held at the converter's current limit, so a large capacitive load stretches the rise
  to C·V/(I_lim − I_load).
* input current while switching: the charge current plus v_out·i_conv/(η·v_in), η the
  efficiency of the final operating point.
* after the ramp: every quantity relaxes from where it stands toward its steady state
  with the settle time constant (the input current with the input-filter one).

The output is integrated on a grid (explicit Euler, at least 4000 steps, well inside
R·C of any resistive load of the demo designs); the input charge is evaluated in closed form.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
from numpy.typing import ArrayLike, NDArray

from .dynamics import INPUT_A, INPUT_V, LOAD_A, OUTPUT_A, OUTPUT_V, SOURCE_A, SOURCE_V

_GRID = 4000


@dataclass(frozen=True)
class StartUpInputs:
    """What a start needs to know (SI units).  ``load_mode``: "CC" (A) or "CR" (Ω)."""

    source_v: float
    source_limit_a: float
    cable_r_ohm: float
    c_in_f: float
    v_in0_v: float
    uvlo_on_v: float
    delay_s: float
    soft_start_s: float
    v_out0_v: float
    c_out_f: float
    converter_limit_a: float
    load_mode: str
    load_setting: float
    load_enabled: bool
    load_min_v: float
    efficiency: float
    bleed_ohm: float
    settle_tau_s: float
    input_tau_s: float


def input_charge(inp: StartUpInputs, dt: NDArray[np.float64]) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """(capacitor voltage V, charge current A) at ``dt`` seconds after the source switched on."""
    vs, ilim, r, c, v0 = inp.source_v, inp.source_limit_a, inp.cable_r_ohm, inp.c_in_f, inp.v_in0_v
    dt = np.maximum(dt, 0.0)
    tau = r * c
    if vs <= v0:
        return np.full(dt.shape, v0), np.zeros(dt.shape)
    v1 = vs - ilim * r          # where the limit lets go
    if v1 > v0:
        t1 = c * (v1 - v0) / ilim
        lin = dt < t1
        v = np.where(lin, v0 + ilim * dt / c, 0.0)
        i = np.where(lin, ilim, 0.0)
        if tau > 0.0:
            w = np.exp(-np.maximum(dt - t1, 0.0) / tau)
            v = np.where(lin, v, vs - (vs - v1) * w)
            i = np.where(lin, i, ilim * w)
        else:
            v = np.where(lin, v, vs)
        return v, i
    if tau <= 0.0:
        return np.full(dt.shape, vs), np.zeros(dt.shape)
    w = np.exp(-dt / tau)
    return vs - (vs - v0) * w, (vs - v0) / r * w


def uvlo_crossing_s(inp: StartUpInputs) -> float:
    """Seconds after the source switched on at which the input crosses the UVLO on threshold."""
    vs, ilim, r, c, v0, von = inp.source_v, inp.source_limit_a, inp.cable_r_ohm, inp.c_in_f, inp.v_in0_v, inp.uvlo_on_v
    if v0 >= von:
        return 0.0
    v1 = vs - ilim * r
    tau = r * c
    if v1 > v0:
        t1 = c * (v1 - v0) / ilim
        if von <= v1:
            return c * (von - v0) / ilim
        return t1 + (tau * math.log((vs - v1) / (vs - von)) if tau > 0.0 else 0.0)
    return tau * math.log((vs - v0) / (vs - von)) if tau > 0.0 else 0.0


def load_current_a(inp: StartUpInputs, v: NDArray[np.float64]) -> NDArray[np.float64]:
    """Current the electronic load draws at output voltage ``v`` (A); collapses below ``load_min_v``."""
    if not inp.load_enabled:
        return np.zeros_like(v)
    v = np.maximum(v, 0.0)
    if inp.load_mode == "CR":
        return v / inp.load_setting
    return inp.load_setting * np.minimum(1.0, v / inp.load_min_v)


@dataclass(frozen=True)
class StartUp:
    """The transient of a start at ``t0_s`` (see module docstring).

    start / final: terminal vectors at the event and of the steady state it heads to.
    """

    t0_s: float
    inputs: StartUpInputs
    start: tuple[float, ...]
    final: tuple[float, ...]
    _grid: dict = field(default_factory=dict, init=False, repr=False, compare=False)

    def __post_init__(self) -> None:
        inp = self.inputs
        t_uv = uvlo_crossing_s(inp)
        t_on = t_uv + inp.delay_s
        v_final = self.final[OUTPUT_V]
        i_final = float(load_current_a(inp, np.array([max(v_final, 0.0)]))[0])
        spare = inp.converter_limit_a - i_final
        limited_s = inp.c_out_f * max(v_final, 0.0) / spare if spare > 0.0 else 10.0 * inp.soft_start_s
        span = t_on + 1.5 * max(inp.soft_start_s, limited_s) + 1e-6
        t = np.linspace(0.0, span, _GRID + 1)
        h = t[1] - t[0]
        v = np.empty_like(t)
        i_conv = np.zeros_like(t)
        v[0] = max(inp.v_out0_v, 0.0)
        cr = inp.load_mode == "CR"
        for k in range(1, t.size):
            prev = v[k - 1]
            if not inp.load_enabled:
                i_load = 0.0
            elif cr:
                i_load = prev / inp.load_setting
            else:
                i_load = inp.load_setting * min(1.0, prev / inp.load_min_v)
            if t[k] <= t_on:
                v[k] = max(prev - i_load * h / inp.c_out_f, 0.0)
                continue
            ref = v_final * min((t[k] - t_on) / inp.soft_start_s, 1.0)
            want = max(ref, prev)
            need = inp.c_out_f * (want - prev) / h + i_load
            if need > inp.converter_limit_a:
                i_conv[k] = inp.converter_limit_a
                v[k] = prev + (inp.converter_limit_a - i_load) * h / inp.c_out_f
            elif ref < prev:        # pre-biased above the ramp: not pulled down, the load drains it
                v[k] = max(prev - i_load * h / inp.c_out_f, ref)
                i_conv[k] = 0.0 if v[k] > ref else i_load
            else:
                v[k] = want
                i_conv[k] = need
        self._grid.update(t=t, v=v, i_conv=i_conv, t_uv=t_uv, t_on=t_on, span=span)

    # ---- what the model asks of a transient ------------------------------------------------
    @property
    def uvlo_crossing_s(self) -> float:
        """Model time at which the input crossed the UVLO on threshold."""
        return self.t0_s + float(self._grid["t_uv"])

    @property
    def switching_start_s(self) -> float:
        """Model time at which switching (and the reference ramp) began."""
        return self.t0_s + float(self._grid["t_on"])

    @property
    def end_of_drive_s(self) -> float:
        """End of the start-up grid; afterwards everything relaxes to the steady state, model s."""
        return self.t0_s + float(self._grid["span"])

    @property
    def tau_s(self) -> float:
        """A time constant such that 10·tau_s after ``t0_s`` the start is over (model s)."""
        return (float(self._grid["span"]) + 10.0 * self.slowest_tau_s) / 10.0

    @property
    def slowest_tau_s(self) -> float:
        """The longest time constant of the tail after the ramp, s."""
        return max(self.inputs.settle_tau_s, self.inputs.input_tau_s)

    @property
    def sample_times_s(self) -> tuple[float, ...]:
        """Moments where the dynamics change: source on, UVLO crossing, switching start, end of the ramp."""
        return (self.t0_s, self.uvlo_crossing_s, self.switching_start_s,
                self.switching_start_s + self.inputs.soft_start_s, self.end_of_drive_s)

    def _during(self, dt: NDArray[np.float64]) -> NDArray[np.float64]:
        inp = self.inputs
        g = self._grid
        v_c, i_ch = input_charge(inp, dt)
        v_out = np.interp(dt, g["t"], g["v"])
        i_conv = np.interp(dt, g["t"], g["i_conv"])
        i_load = load_current_a(inp, v_out)
        eff = inp.efficiency if inp.efficiency > 0.0 else 1.0
        p_conv = v_out * i_conv / eff
        i_dut = np.divide(p_conv, v_c, out=np.zeros_like(v_c), where=v_c > 0.0)
        if math.isfinite(inp.bleed_ohm):
            i_dut = i_dut + v_c / inp.bleed_ohm
        i_in = i_ch + i_dut
        out = np.empty((7, dt.size))
        out[SOURCE_A] = i_in
        out[INPUT_A] = i_in
        out[INPUT_V] = v_c
        out[SOURCE_V] = np.minimum(inp.source_v, v_c + inp.cable_r_ohm * i_in)
        out[OUTPUT_V] = v_out
        out[OUTPUT_A] = i_load
        out[LOAD_A] = i_load
        return out

    def values_at(self, t_s: ArrayLike, target: ArrayLike) -> NDArray[np.float64]:
        """Quantities (7 × n) at model times ``t_s``; ``target``: the steady state now (7,)."""
        t = np.atleast_1d(np.asarray(t_s, dtype=float))
        dt = np.maximum(t - self.t0_s, 0.0)
        span = float(self._grid["span"])
        out = self._during(np.minimum(dt, span))
        tail = dt > span
        if np.any(tail):
            tgt = np.asarray(target, dtype=float).reshape(-1)
            end = self._during(np.array([span]))[:, 0]
            after = dt[tail] - span
            taus = np.full(7, self.inputs.settle_tau_s)
            taus[[SOURCE_A, INPUT_A]] = self.inputs.input_tau_s
            w = np.exp(-after[None, :] / taus[:, None])
            out[:, tail] = tgt[:, None] + (end - tgt)[:, None] * w
        return out
