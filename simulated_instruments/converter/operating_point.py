"""Steady state of the DUT (and of the source/cable feeding it) for given settings.

Regulation (voltage mode, finite amplifier gain): the error amplifier holds
D·Vm = A0·(Vref − H·V_sense), with V_sense(D) from the power stage including its
drops; the static error is therefore D·Vm/(A0·H), which moves with line and load
(line and load regulation), and the small-signal equivalent is the open-loop output
resistance divided by (1 + T0), T0 = A0·H·Gd0/Vm (Erickson & Maksimović 2nd ed., ch. 9).
Input power from the energy balance Pin = Pout + Ploss, Iin = Pin/Vin at the DUT input.
The input cable is solved by the fixed point Vin = (Vs + √(Vs² − 4·Rc·Pin))/2 (the upper,
stable root for a constant-power load).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Literal

from scipy.optimize import brentq

from .design import ConverterDesign
from .errors import SettingError
from .losses import LossBreakdown, idle_losses, switching_losses
from .power_stage import ConductionMode, LoadLine, StagePoint, duty_for_output, stage_point
from .small_signal import plant_gvd

State = Literal["off", "uvlo", "regulating", "max_duty", "current_limit", "feedback_open"]
LoadMode = Literal["CC", "CR"]
FAULT_NAMES = ("feedback_open", "output_short", "overheat")
NO_INPUT_V = 0.5      # below this the DUT input counts as unpowered ("off")


@dataclass(frozen=True)
class SourceSetting:
    """DC source programming: voltage (V), current limit (A), output on/off."""

    voltage_v: float
    current_limit_a: float
    enabled: bool


@dataclass(frozen=True)
class LoadSetting:
    """Electronic load programming: mode CC (setting in A) or CR (setting in Ω), on/off."""

    mode: LoadMode
    setting: float
    enabled: bool

    def __post_init__(self) -> None:
        if self.mode not in ("CC", "CR"):
            raise SettingError(f"load mode {self.mode!r} is not supported; use 'CC' (A) or 'CR' (ohm)")
        if self.mode == "CC" and self.setting < 0.0:
            raise SettingError(f"CC load setting {self.setting!r} A is negative; give a current >= 0")
        if self.mode == "CR" and not self.setting > 0.0:
            raise SettingError(f"CR load setting {self.setting!r} ohm must be > 0")


@dataclass(frozen=True)
class OperatingPoint:
    """Steady state of the DUT.  Voltages V, currents A, powers W.

    vout_v/iout_a/pout_w are at the output terminals (what the load sees); vsense_v is
    the regulation sense point.  loop_gain_dc is T0 = T(0) of the small-signal loop,
    ``None`` when the loop is not closed (state not "regulating").  k/k_crit are the
    textbook CCM/DCM indicators 2L/(R·Ts) and K_crit(D) with R = r_load_eff_ohm (the
    resistance the power stage sees, divider included); conduction_mode is read from
    the current waveform (they agree exactly when the design is lossless).
    """

    state: State
    reason: str
    faults: tuple[str, ...]
    vin_v: float
    iin_a: float
    pin_w: float
    vout_v: float
    vsense_v: float
    iout_a: float
    pout_w: float
    loss_w: float
    losses: LossBreakdown
    efficiency: float
    duty: float
    conduction_mode: ConductionMode
    k: float
    k_crit: float
    r_load_eff_ohm: float
    fsw_hz: float
    loop_gain_dc: float | None
    vout_target_v: float
    i_peak_a: float
    load_a: float
    running: bool
    stage: StagePoint | None = None


def load_line(design: ConverterDesign, load: LoadSetting, short: bool) -> LoadLine:
    """Stage-current line I = i0 + g·V_sense for a load at the terminals plus the sense divider."""
    g_div = 1.0 / design.losses.sense_divider_ohm
    r_st = design.bench.sense_to_terminal_r_ohm
    if short:
        return LoadLine(0.0, g_div + 1.0 / (design.faults.short_ohm + r_st))
    if not load.enabled:
        return LoadLine(0.0, g_div)
    if load.mode == "CC":
        return LoadLine(load.setting, g_div)
    return LoadLine(0.0, g_div + 1.0 / (load.setting + r_st))


def _unpowered(design: ConverterDesign, vin_v: float, state: State, reason: str, faults: tuple[str, ...],
               losses: LossBreakdown | None = None, iin_a: float | None = None) -> OperatingPoint:
    lb = idle_losses(design, vin_v) if losses is None else losses
    pin = lb.total_w
    iin = (pin / vin_v if vin_v > 0.0 else 0.0) if iin_a is None else iin_a
    return OperatingPoint(state, reason, faults, vin_v, iin, pin, 0.0, 0.0, 0.0, 0.0, pin, lb, 0.0, 0.0,
                          "none", 0.0, 0.0, math.inf, design.fsw_hz, None, design.vout_setpoint_v, 0.0,
                          0.0, False)


def solve_dut(design: ConverterDesign, vin_v: float, load: LoadSetting, *, was_running: bool = False,
              faults: tuple[str, ...] = (), extra_loss_w: float = 0.0, aux_stage_a: float = 0.0) -> OperatingPoint:
    """Steady state of the DUT fed with ``vin_v`` at its input terminals (no cable, no source limit).

    ``aux_stage_a``: current of a further output winding referred to the main one (A); the
    stage delivers it at the sense voltage beside the main output, and the input power
    includes it (its rectifier drop stands in as the main rectifier's, a first-order split).
    """
    unknown = [f for f in faults if f not in FAULT_NAMES]
    if unknown:
        raise SettingError(f"unknown fault(s) {unknown}; known faults: {', '.join(FAULT_NAMES)}")
    pr = design.protection
    if vin_v <= NO_INPUT_V:
        return _unpowered(design, max(vin_v, 0.0), "off", "no input voltage", faults)
    threshold = pr.uvlo_off_v if was_running else pr.uvlo_on_v
    if vin_v <= threshold:
        which = "off" if was_running else "on"
        return _unpowered(design, vin_v, "uvlo",
                          f"input {vin_v:.3f} V is not above the UVLO {which} threshold {threshold:g} V", faults)
    c = design.control
    a0, vm = c.opamp_gain, c.ramp_vm_v
    h_eff = 0.0 if "feedback_open" in faults else c.divider_h
    short = "output_short" in faults
    line = load_line(design, load, short)
    if aux_stage_a:
        line = LoadLine(line.i0_a + aux_stage_a, line.g_s)
    dmax = design.stage.max_duty

    def loop_error(d: float) -> float:
        return d * vm - a0 * (c.vref_v - h_eff * stage_point(design, d, vin_v, line).v_v)

    if loop_error(dmax) < 0.0:
        sp = stage_point(design, dmax, vin_v, line)
        state: State = "feedback_open" if h_eff == 0.0 else "max_duty"
    else:
        sp = stage_point(design, brentq(loop_error, 0.0, dmax, xtol=1e-15, rtol=1e-14), vin_v, line)
        state = "regulating"
    r_st = design.bench.sense_to_terminal_r_ohm
    g_div = 1.0 / design.losses.sense_divider_ohm
    iout = sp.i_a - sp.v_v * g_div - aux_stage_a
    reason = ""
    ilim = pr.current_limit_a
    if iout > ilim:
        if short:
            v_term = ilim * design.faults.short_ohm
        elif load.mode == "CR":
            v_term = ilim * load.setting
        else:
            v_term = 0.0
        sp = duty_for_output(design, v_term + ilim * r_st, vin_v, LoadLine(ilim, g_div))
        iout = ilim
        state = "current_limit"
        reason = f"output current limited at {ilim:g} A"
    elif state == "max_duty":
        reason = f"duty clamped at {dmax:g}: input too low to regulate"
    elif state == "feedback_open":
        reason = "feedback open: amplifier railed, duty at its maximum"
    v_term = sp.v_v - iout * r_st
    load_a = 0.0 if short else iout
    fault_w = extra_loss_w if "overheat" in faults else 0.0
    lb = switching_losses(design, sp, iout, fault_w)
    pout = v_term * load_a
    pin = pout + lb.total_w + (sp.v_v * aux_stage_a if aux_stage_a else 0.0)
    r_eff = sp.v_v / sp.i_a if sp.i_a > 0.0 else math.inf
    k = design.k_value(r_eff) if sp.v_v > 0.0 else 0.0
    t0: float | None = None
    if state == "regulating":
        gvd = plant_gvd(design, sp.mode, vin_v, sp.v_v, sp.duty, r_eff)
        t0 = c.divider_h * a0 * gvd.dc_gain() / vm
    return OperatingPoint(state, reason, faults, vin_v, pin / vin_v, pin, v_term, sp.v_v, iout, pout, lb.total_w, lb,
                          pout / pin if pin > 0.0 else 0.0, sp.duty, sp.mode, k, design.k_crit(sp.duty), r_eff,
                          design.fsw_hz, t0, design.vout_setpoint_v, sp.l_peak_a, load_a, True, sp)


@dataclass(frozen=True)
class BenchPoint:
    """Steady state of source, cable and DUT together.  V, A."""

    source_v: float
    source_a: float
    source_limited: bool
    input_v: float
    input_a: float
    op: OperatingPoint


def solve_bench(design: ConverterDesign, source: SourceSetting, load: LoadSetting, *, was_running: bool,
                faults: tuple[str, ...] = (), extra_loss_w: float = 0.0, aux_stage_a: float = 0.0) -> BenchPoint:
    """Steady state with the source behind the cable resistance; handles source current limit."""
    rc = design.bench.cable_r_ohm
    if not source.enabled or source.voltage_v <= 0.0:
        op = solve_dut(design, 0.0, load, faults=faults)
        return BenchPoint(0.0, 0.0, False, 0.0, 0.0, op)
    vs = source.voltage_v
    rb = design.losses.input_bleed_ohm
    v_idle = vs if math.isinf(rb) else vs * rb / (rb + rc)
    pr = design.protection

    def idle_point(reason_state: bool) -> BenchPoint:
        op = solve_dut(design, v_idle, load, was_running=reason_state, faults=faults)
        i = op.iin_a
        if i > source.current_limit_a:      # a source limited below the bleed current
            i = source.current_limit_a
            v = i * rb                          # the bleed resistor is the only load
            op = solve_dut(design, v, load, was_running=False, faults=faults)
            return BenchPoint(v + i * rc, i, True, v, i, op)
        return BenchPoint(vs, i, False, v_idle, i, op)

    threshold = pr.uvlo_off_v if was_running else pr.uvlo_on_v
    if v_idle <= threshold:
        return idle_point(was_running)
    vin = vs
    collapse_reason = ""
    op = solve_dut(design, vin, load, was_running=True, faults=faults, extra_loss_w=extra_loss_w,
                   aux_stage_a=aux_stage_a)
    for _ in range(60):
        if op.state in ("off", "uvlo"):
            collapse_reason = f"input fell to {vin:.3f} V across the {rc:g} ohm cable"
            break
        if rc == 0.0:
            break
        disc = vs * vs - 4.0 * rc * op.pin_w
        if disc < 0.0:
            collapse_reason = (f"the cable ({rc:g} ohm) cannot pass {op.pin_w:.3f} W from {vs:g} V "
                               "(past the maximum-power point)")
            break
        new_vin = 0.5 * (vs + math.sqrt(disc))
        converged = abs(new_vin - vin) <= 1e-13 * vs
        vin = new_vin
        op = solve_dut(design, vin, load, was_running=True, faults=faults, extra_loss_w=extra_loss_w,
                       aux_stage_a=aux_stage_a)
        if converged:
            break
    if not collapse_reason and op.iin_a > source.current_limit_a:
        collapse_reason = (f"the source current limit {source.current_limit_a:g} A is below the "
                           f"{op.iin_a:.3f} A the DUT needs")
    if not collapse_reason:
        return BenchPoint(vs, op.iin_a, False, vin, op.iin_a, op)
    if v_idle <= pr.uvlo_on_v:
        # once stopped, the idle input is below the on threshold: it stays locked out
        return idle_point(False)
    # Hiccup: stop, input recovers above the on threshold, restart, collapse again.
    # Reported as its average picture: the source delivers what it can at the midpoint of the
    # UVLO band; all of it is burnt in the start attempts.
    i_h = source.current_limit_a if rc == 0.0 else min(source.current_limit_a, vs / (2.0 * rc))
    v_in = min(0.5 * (pr.uvlo_on_v + pr.uvlo_off_v), vs - i_h * rc)
    lb = LossBreakdown(restart_w=v_in * i_h)
    op = _unpowered(design, v_in, "uvlo", "hiccup: " + collapse_reason, faults, losses=lb, iin_a=i_h)
    limited = i_h >= source.current_limit_a
    return BenchPoint(v_in + i_h * rc if limited else vs, i_h, limited, v_in, i_h, op)
