"""The description of a converter under test: parts values, control, protection, bench.

All values are SI base units.  A design is a frozen dataclass made of small frozen
groups; ``dataclasses.replace`` derives variants (``lossless()`` is one such variant).

Textbook quantities used throughout (Erickson & Maksimović, *Fundamentals of Power
Electronics*, 2nd ed., ch. 5 and 6):

* buck: conversion ratio M = D (CCM); inductance seen by the output L.
* flyback with turns ratio n = Ns/Np: M = n·D/(1−D) (CCM); the magnetizing
  inductance referred to the secondary is L′ = n²·Lm.
* CCM/DCM boundary: K = 2L/(R·Ts) against K_crit = 1 − D (buck) or (1 − D)²
  (flyback, with L′).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field, replace
from typing import Literal

from .errors import DesignError

Topology = Literal["buck", "flyback"]


@dataclass(frozen=True)
class PowerStage:
    """Energy-storage parts.

    inductance_h: buck output inductor, or flyback magnetizing inductance Lm
    referred to the primary.  turns_ratio: n = Ns/Np (1.0 for the buck).
    c_out_f / esr_ohm: output capacitor bank and its equivalent series resistance.
    max_duty: controller duty-cycle clamp.
    """

    inductance_h: float
    turns_ratio: float
    c_out_f: float
    esr_ohm: float
    max_duty: float


@dataclass(frozen=True)
class LossCoefficients:
    """Coefficients of the loss model (see ``losses.py`` for how each is used).

    r_switch_ohm: main (high-side / primary) switch on-resistance.
    r_sync_ohm: buck low-side switch on-resistance (0 for the flyback).
    r_primary_ohm: buck inductor DCR, or flyback primary winding resistance.
    r_secondary_ohm: flyback secondary winding resistance (0 for the buck).
    rect_vf_v / rect_r_ohm: rectifier diode knee voltage and slope resistance
    (0 V for a synchronous switch).
    body_diode_vf_v / dead_time_s: buck low-side body-diode drop and the dead
    time per edge during which it conducts.
    t_rise_s / t_fall_s: voltage-current overlap times of the main switch.
    c_oss_f: main-switch output capacitance discharged at every turn-on.
    gate_charge_c / gate_drive_v: total gate charge of all driven switches and drive voltage.
    controller_w: controller and bias supply, constant while switching.
    core_loss_ref_w / core_flux_ref_vs / core_beta: core loss at a reference
    volt-second product per cycle, and the exponent of its growth with flux swing
    (a Steinmetz-like law at fixed frequency).
    input_bleed_ohm: start-up resistor from the input (math.inf if none).
    sense_divider_ohm: total resistance of the output sense divider (an internal preload).
    """

    r_switch_ohm: float
    r_sync_ohm: float
    r_primary_ohm: float
    r_secondary_ohm: float
    rect_vf_v: float
    rect_r_ohm: float
    body_diode_vf_v: float
    dead_time_s: float
    t_rise_s: float
    t_fall_s: float
    c_oss_f: float
    gate_charge_c: float
    gate_drive_v: float
    controller_w: float
    core_loss_ref_w: float
    core_flux_ref_vs: float
    core_beta: float
    input_bleed_ohm: float
    sense_divider_ohm: float


@dataclass(frozen=True)
class Parasitics:
    """Parasitics that shape switching waveforms and snubber losses.

    leakage_h: flyback leakage inductance (primary) or buck loop inductance.
    switch_node_c_f: total capacitance at the switch node (Coss + winding/layout).
    clamp_r_ohm / clamp_c_f: RCD clamp across the primary (math.inf / 0 if none).
    snubber_r_ohm / snubber_c_f: RC snubber across the rectifier or low-side switch.
    diode_c_f: rectifier junction (or low-side Coss) capacitance.
    """

    leakage_h: float
    switch_node_c_f: float
    clamp_r_ohm: float
    clamp_c_f: float
    snubber_r_ohm: float
    snubber_c_f: float
    diode_c_f: float

    @property
    def ring_frequency_hz(self) -> float:
        """Turn-off ring frequency 1/(2π√(L_lk·C_sw)), Hz (LC resonance, common practice)."""
        lc = self.leakage_h * self.switch_node_c_f
        return math.inf if lc <= 0.0 else 1.0 / (2.0 * math.pi * math.sqrt(lc))


@dataclass(frozen=True)
class Type3Network:
    """Type-3 compensator around an inverting op-amp.

    Input network Zi = R1 ∥ (R3 + 1/(s·C3)); feedback Zf = (R2 + 1/(s·C1)) ∥ 1/(s·C2).
    Ideal gain Zf/Zi: an origin pole, zeros at 1/(2π R2 C1) and 1/(2π (R1+R3) C3),
    poles at 1/(2π R3 C3) and ≈ 1/(2π R2 C2).
    """

    r1_ohm: float
    r2_ohm: float
    r3_ohm: float
    c1_f: float
    c2_f: float
    c3_f: float


@dataclass(frozen=True)
class Control:
    """Voltage-mode control.

    vref_v: reference at the error-amplifier input.  divider_h: output sense gain H
    (the amplifier regulates H·V_sense to vref_v).  ramp_vm_v: PWM ramp amplitude
    (modulator gain 1/Vm).  opamp_gain_db / opamp_gbw_hz: error-amplifier open-loop
    DC gain and gain-bandwidth product (single-pole op-amp).
    """

    vref_v: float
    divider_h: float
    ramp_vm_v: float
    opamp_gain_db: float
    opamp_gbw_hz: float
    compensator: Type3Network

    @property
    def opamp_gain(self) -> float:
        """Error-amplifier open-loop DC gain A0 (ratio)."""
        return 10.0 ** (self.opamp_gain_db / 20.0)


@dataclass(frozen=True)
class Protection:
    """Under-voltage lockout thresholds (V, at the DUT input) and output current limit (A)."""

    uvlo_on_v: float
    uvlo_off_v: float
    current_limit_a: float


@dataclass(frozen=True)
class BenchWiring:
    """How the DUT sits on the bench and how fast its terminals move (model seconds).

    cable_r_ohm: source-to-DUT input cable (both leads).  sense_to_terminal_r_ohm:
    copper between the regulation sense point and the output terminals.
    input_filter_tau_s: time constant of the input current (and so of the input power)
    after the converter's input demand changes: the damped input filter, the bulk
    capacitance behind the cable and the source's output stage, lumped into one
    first-order lag (a bench figure of a few to tens of milliseconds, common practice).
    It is the slowest electrical time constant of the model.
    settle_tau_s: time constant of every terminal quantity after a change that takes the
    converter out of regulation or back (stop, lock-out, fault, protection), and the
    fallback of the waveform synthesis.  soft_start_tau_s: the slower time constant of a
    start from off.
    """

    cable_r_ohm: float
    sense_to_terminal_r_ohm: float
    settle_tau_s: float
    soft_start_tau_s: float
    input_filter_tau_s: float


@dataclass(frozen=True)
class ThermalPath:
    """One lumped thermal mass for the DUT's hot parts (switch, windings, copper).

    C·dT/dt = P_loss − (T − T_amb)/R, so T settles with τ = R·C (model seconds; minutes on
    a real board).  r_th_k_per_w: hot parts to ambient (K/W); c_th_j_per_k: their heat
    capacity (J/K); ambient_c: ambient, and the temperature at which the loss
    coefficients of the design are given (°C).  Resistances rise linearly with
    temperature: switch on-resistances by ``switch_tempco_per_k`` (a silicon MOSFET's
    Rds(on) rises about 0.5–0.7 %/K, common practice), windings and copper by
    ``copper_tempco_per_k`` (0.00393 /K, annealed copper at 20 °C, IEC 60028).  The
    diode's knee voltage falls with temperature; that is not modelled, so every loss
    term either rises or stays as the parts warm.
    """

    r_th_k_per_w: float = 12.0
    c_th_j_per_k: float = 15.0
    ambient_c: float = 25.0
    switch_tempco_per_k: float = 0.006
    copper_tempco_per_k: float = 0.00393

    @property
    def tau_s(self) -> float:
        """Thermal time constant R·C, s."""
        return self.r_th_k_per_w * self.c_th_j_per_k


@dataclass(frozen=True)
class StartUpSettings:
    """How the converter starts (model seconds, farads).

    input_capacitance_f: the DUT's input capacitance, charged through the cable and the
    source's current limit when the source switches on (the inrush).  start_delay_s: from
    the input crossing the UVLO on threshold to the start of switching (controller bias
    and enable).  soft_start_s: duration of the linear ramp of the reference from zero to
    its final value; the output follows it unless the converter's current limit cannot
    charge the output capacitance (and any capacitive load) that fast.
    load_min_v: below this output voltage the electronic load's current collapses in
    proportion (a bench load's minimum operating voltage, ~0.5-1 V, common practice).
    """

    input_capacitance_f: float = 10e-6
    start_delay_s: float = 2e-3
    soft_start_s: float = 8e-3
    load_min_v: float = 0.5


@dataclass(frozen=True)
class FaultSettings:
    """Parameters of the injectable faults.

    overheat_rate_w_per_s: extra dissipation growth rate (W per model second).
    overheat_max_w: ceiling of that extra dissipation.
    short_ohm: resistance of an ``output_short`` at the output terminals.
    """

    overheat_rate_w_per_s: float
    overheat_max_w: float
    short_ohm: float = 1e-3


@dataclass(frozen=True)
class ConverterDesign:
    """A complete converter under test."""

    name: str
    description: str
    topology: Topology
    vin_min_v: float
    vin_nom_v: float
    vin_max_v: float
    vout_nom_v: float
    iout_rated_a: float
    fsw_hz: float
    stage: PowerStage
    losses: LossCoefficients
    parasitics: Parasitics
    control: Control
    protection: Protection
    bench: BenchWiring
    faults: FaultSettings = field(default_factory=lambda: FaultSettings(0.0, 0.0))
    thermal: ThermalPath = field(default_factory=ThermalPath)
    start_up: StartUpSettings = field(default_factory=StartUpSettings)

    def __post_init__(self) -> None:
        problems: list[str] = []
        if self.topology not in ("buck", "flyback"):
            problems.append(f"topology must be 'buck' or 'flyback', got {self.topology!r}")
        if not 0.0 < self.vin_min_v <= self.vin_nom_v <= self.vin_max_v:
            problems.append("need 0 < vin_min_v <= vin_nom_v <= vin_max_v")
        if not self.protection.uvlo_off_v < self.protection.uvlo_on_v:
            problems.append("UVLO off threshold must be below the on threshold (hysteresis)")
        if not 0.0 < self.stage.max_duty < 1.0:
            problems.append("max_duty must lie in (0, 1)")
        for label, value in (("fsw_hz", self.fsw_hz), ("inductance_h", self.stage.inductance_h),
                             ("c_out_f", self.stage.c_out_f), ("turns_ratio", self.stage.turns_ratio),
                             ("ramp_vm_v", self.control.ramp_vm_v), ("divider_h", self.control.divider_h),
                             ("settle_tau_s", self.bench.settle_tau_s),
                             ("soft_start_tau_s", self.bench.soft_start_tau_s),
                             ("input_filter_tau_s", self.bench.input_filter_tau_s),
                             ("r_th_k_per_w", self.thermal.r_th_k_per_w),
                             ("c_th_j_per_k", self.thermal.c_th_j_per_k),
                             ("input_capacitance_f", self.start_up.input_capacitance_f),
                             ("soft_start_s", self.start_up.soft_start_s)):
            if not value > 0.0:
                problems.append(f"{label} must be > 0, got {value!r}")
        if problems:
            raise DesignError(f"design {self.name!r}: " + "; ".join(problems) + " — fix the design values")

    # ---- noise-free truth helpers -------------------------------------------------
    @property
    def ts_s(self) -> float:
        """Switching period Ts = 1/fsw, s."""
        return 1.0 / self.fsw_hz

    @property
    def l_output_h(self) -> float:
        """Inductance seen from the output: L (buck) or L′ = n²·Lm (flyback), H."""
        if self.topology == "buck":
            return self.stage.inductance_h
        return self.stage.turns_ratio ** 2 * self.stage.inductance_h

    @property
    def rated_load_ohm(self) -> float:
        """Resistance that draws rated current at nominal output, Ω."""
        return self.vout_nom_v / self.iout_rated_a

    @property
    def ring_frequency_hz(self) -> float:
        """Switch-node ring frequency 1/(2π√(L_lk·C_sw)), Hz."""
        return self.parasitics.ring_frequency_hz

    @property
    def vout_setpoint_v(self) -> float:
        """Output the loop would hold with infinite amplifier gain: vref/H, V."""
        return self.control.vref_v / self.control.divider_h

    def ideal_ccm_duty(self, vin_v: float, vout_v: float | None = None) -> float:
        """Lossless CCM duty for ``vout_v`` (default nominal) at ``vin_v``.

        Buck D = M; flyback M = n·D/(1−D) ⇒ D = M/(n + M) (Erickson & Maksimović 2nd ed., ch. 6).
        """
        m = (self.vout_nom_v if vout_v is None else vout_v) / vin_v
        if self.topology == "buck":
            return m
        n = self.stage.turns_ratio
        return m / (n + m)

    def k_value(self, r_load_ohm: float) -> float:
        """K = 2L/(R·Ts) with the inductance seen from the output (dimensionless)."""
        return 2.0 * self.l_output_h / (r_load_ohm * self.ts_s)

    def k_crit(self, duty: float) -> float:
        """K_crit = 1 − D (buck) or (1 − D)² (flyback)."""
        return (1.0 - duty) if self.topology == "buck" else (1.0 - duty) ** 2

    def boundary_current_a(self, vin_v: float, vout_v: float | None = None) -> float:
        """Lossless load current at the CCM/DCM boundary (K = K_crit), A.

        R_crit = 2L·fs/K_crit(D) and I_crit = V/R_crit; for the buck this is
        (1−D)·V·Ts/(2L) = ΔI/2 (Erickson & Maksimović 2nd ed., ch. 5).
        """
        v = self.vout_nom_v if vout_v is None else vout_v
        d = self.ideal_ccm_duty(vin_v, v)
        return v * self.k_crit(d) * self.ts_s / (2.0 * self.l_output_h)

    def at_temperature(self, temp_c: float) -> "ConverterDesign":
        """This design with its resistances at ``temp_c`` (°C) instead of the ambient.

        R(T) = R(T_amb)·(1 + α·(T − T_amb)) with the switch and copper tempcos of
        ``thermal`` (linear law, common practice); everything else is unchanged.
        """
        dt = float(temp_c) - self.thermal.ambient_c
        if dt == 0.0:
            return self
        ks = 1.0 + self.thermal.switch_tempco_per_k * dt
        kc = 1.0 + self.thermal.copper_tempco_per_k * dt
        if not (ks > 0.0 and kc > 0.0):
            raise DesignError(f"design {self.name!r}: {temp_c!r} °C is outside the linear tempco range; "
                              "give a temperature above the point where a resistance would reach zero")
        ls = self.losses
        warm = replace(ls, r_switch_ohm=ls.r_switch_ohm * ks, r_sync_ohm=ls.r_sync_ohm * ks,
                       r_primary_ohm=ls.r_primary_ohm * kc, r_secondary_ohm=ls.r_secondary_ohm * kc)
        return replace(self, losses=warm,
                       bench=replace(self.bench, sense_to_terminal_r_ohm=self.bench.sense_to_terminal_r_ohm * kc))

    def lossless(self) -> "ConverterDesign":
        """This design with every loss coefficient, drop and bench resistance set to zero.

        The sense divider (a load, not a loss mechanism of the power stage) is kept.
        """
        zero_losses = replace(
            self.losses, r_switch_ohm=0.0, r_sync_ohm=0.0, r_primary_ohm=0.0, r_secondary_ohm=0.0,
            rect_vf_v=0.0, rect_r_ohm=0.0, body_diode_vf_v=0.0, dead_time_s=0.0, t_rise_s=0.0,
            t_fall_s=0.0, c_oss_f=0.0, gate_charge_c=0.0, controller_w=0.0, core_loss_ref_w=0.0,
            input_bleed_ohm=math.inf)
        zero_parasitics = replace(self.parasitics, leakage_h=0.0, snubber_c_f=0.0, clamp_c_f=0.0,
                                  clamp_r_ohm=math.inf)
        return replace(self, name=self.name + "-lossless", stage=replace(self.stage, esr_ohm=0.0),
                       losses=zero_losses, parasitics=zero_parasitics,
                       bench=replace(self.bench, cable_r_ohm=0.0, sense_to_terminal_r_ohm=0.0))
