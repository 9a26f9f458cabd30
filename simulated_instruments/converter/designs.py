"""The two converters of the project's demo scenarios, with documented parts values.

``flyback-48v-5v`` — isolated telecom-input flyback, 36–75 V in, 5 V / 5 A out.
    Np:Ns = 5:1 (n = 0.2) gives D ≈ 0.43 at 36 V and 0.27 at 75 V (CCM, full load);
    Lm = 170 µH puts the CCM/DCM boundary at ≈ 0.8 A (36 V) … 1.3 A (75 V), i.e. 16–26 %
    load.  200 V switch (0.12 Ω, 150 pF), Schottky rectifier (0.30 V + 10 mΩ), 2 × 330 µF
    polymer output (10 mΩ total ESR → ESR zero 24 kHz), 2 µH leakage with a 15 kΩ/10 nF
    RCD clamp, 10 Ω/1 nF RC snubber on the rectifier.  Voltage mode, 2.5 V reference,
    H = 0.5, 2.5 V ramp.  Type-3 network chosen with the K factor (Venable 1983, as
    ``benchctl.analysis.compensator.design_type3`` computes it): plant H·Gvd(s)/Vm of the
    CCM model at the worst corner, 36 V / 5 A (lowest RHP zero ≈ 17.3 kHz, LC double pole
    ≈ 1.35 kHz with Q ≈ 5.6, phase ≈ −180° at 4 kHz); crossover target fc = 4 kHz (below
    f_RHPz/4 and fsw/37); phase-margin target 60°; R1 = 49.9 kΩ.  Boost 149.7° gives
    K = 56.6: double zero at fc/√K ≈ 531 Hz, double pole at fc·√K ≈ 30 kHz.  Rounded parts
    (E96 resistors, E12 capacitors): R2 12.4 kΩ, R3 887 Ω, C1 22 nF, C2 470 pF, C3 5.6 nF.
    With the finite-gain op-amp the loop falls through one crossover at every corner of
    36–75 V × 0.5–5 A: CCM ≈ 3.8–7.2 kHz with PM ≈ 59–66° and GM ≥ 14 dB; DCM (light load)
    ≈ 150–300 Hz with PM ≈ 46–70°; |T| ≥ 30 dB at 10 Hz everywhere, and a 2.5 A step
    recovers to within 5 mV in about 1 ms.  (At 5 % load, deeper in DCM, the PM is ≈ 37°.)
    Bench: input-filter τ 20 ms; hot parts 12 K/W and 15 J/K (τ = 3 min), ≈ +50 K at full load.
``buck-12v-1v2`` — synchronous point-of-load buck, 10.8–13.2 V in, 1.2 V / 10 A out.
    L = 0.68 µH (≈ 3 A ripple at 12 V), 600 µF output (3 mΩ ESR → 88 kHz), 8 mΩ / 3.3 mΩ
    switches, 2 mΩ DCR, 500 kHz.  Diode emulation: the low-side switch opens at zero
    current, so the buck enters DCM below ≈ 1.6 A (16 % load).  0.6 V reference, H = 0.5,
    1.5 V ramp.  Type-3: R1 10 kΩ, R2 16.2 kΩ, R3 1 kΩ, C1 2.4 nF, C2 39 pF, C3 1.8 nF (zeros
    ≈ 4.1 kHz and 8 kHz, poles ≈ 88 kHz and 250 kHz): CCM crossover ≈ 44–54 kHz (≈ fsw/10)
    with PM ≈ 63–66°; DCM crossover a few kHz with PM ≈ 55–105°.  Bench: input-filter τ 5 ms;
    hot parts 10 K/W and 10 J/K (τ = 100 s), ≈ +15 K at full load.

``flyback-48v-5v-3v3`` — the same flyback with a second, unregulated 3.3 V / 1.5 A output
    (``SECOND_OUTPUTS``; physics in :mod:`.second_output`): main secondary 3 turns, second
    secondary 2 turns (N2/N1 = 2/3), Schottky 0.30 V + 20 mΩ, 8 mΩ winding, leakage 60 nH
    (second) and 40 nH (main), each referred to its own winding.  The loop regulates the
    5 V output only; at 48 V the second output reads ≈ 3.15–3.36 V over 0.5–5 A on the main
    and 0.1–1.5 A on itself (cross-regulation ≈ 4 % from the main's load, ≈ 3 % from its own).

Start-up (``StartUpSettings``): flyback 10 µF input, 2 ms from UVLO on to switching, 8 ms
soft start; buck 44 µF input, 0.5 ms delay, 2 ms soft start.

Error-amplifier gain: the op-amps are given a deliberately modest open-loop gain
(56 dB flyback, 50 dB buck).  With the usual 80–90 dB the static regulation error
D·Vm/(A0·H) would be a few microvolts and line regulation would vanish below what a
bench meter resolves; at these gains it lands at ≈ 0.01–0.05 % as on real boards.
"""

from __future__ import annotations

import math
from dataclasses import replace

from .design import (BenchWiring, Control, ConverterDesign, FaultSettings, LossCoefficients, Parasitics,
                     PowerStage, Protection, StartUpSettings, ThermalPath, Type3Network)
from .second_output import SecondWinding

FLYBACK_48V_5V = ConverterDesign(
    name="flyback-48v-5v",
    description="36-75 V telecom-input isolated flyback, 5 V 5 A, 150 kHz, voltage-mode type-3",
    topology="flyback",
    vin_min_v=36.0, vin_nom_v=48.0, vin_max_v=75.0,
    vout_nom_v=5.0, iout_rated_a=5.0, fsw_hz=150e3,
    stage=PowerStage(inductance_h=170e-6, turns_ratio=0.2, c_out_f=660e-6, esr_ohm=0.010, max_duty=0.65),
    losses=LossCoefficients(
        r_switch_ohm=0.12, r_sync_ohm=0.0, r_primary_ohm=0.15, r_secondary_ohm=0.006,
        rect_vf_v=0.30, rect_r_ohm=0.010, body_diode_vf_v=0.0, dead_time_s=0.0,
        t_rise_s=20e-9, t_fall_s=15e-9, c_oss_f=150e-12, gate_charge_c=12e-9, gate_drive_v=10.0,
        controller_w=0.10, core_loss_ref_w=0.25, core_flux_ref_vs=48.0 * 0.36 / 150e3, core_beta=2.5,
        input_bleed_ohm=100e3, sense_divider_ohm=99.8e3),
    parasitics=Parasitics(leakage_h=2e-6, switch_node_c_f=200e-12, clamp_r_ohm=15e3, clamp_c_f=10e-9,
                          snubber_r_ohm=10.0, snubber_c_f=1e-9, diode_c_f=400e-12),
    control=Control(vref_v=2.5, divider_h=0.5, ramp_vm_v=2.5, opamp_gain_db=56.0, opamp_gbw_hz=5e6,
                    compensator=Type3Network(r1_ohm=49.9e3, r2_ohm=12.4e3, r3_ohm=887.0,
                                             c1_f=22e-9, c2_f=470e-12, c3_f=5.6e-9)),
    protection=Protection(uvlo_on_v=34.0, uvlo_off_v=32.0, current_limit_a=6.0),
    bench=BenchWiring(cable_r_ohm=0.05, sense_to_terminal_r_ohm=0.002, settle_tau_s=0.020,
                      soft_start_tau_s=0.050, input_filter_tau_s=0.020),
    faults=FaultSettings(overheat_rate_w_per_s=0.05, overheat_max_w=5.0),
    thermal=ThermalPath(r_th_k_per_w=12.0, c_th_j_per_k=15.0),
    start_up=StartUpSettings(input_capacitance_f=10e-6, start_delay_s=2e-3, soft_start_s=8e-3),
)

BUCK_12V_1V2 = ConverterDesign(
    name="buck-12v-1v2",
    description="12 V to 1.2 V 10 A synchronous point-of-load buck, 500 kHz, diode emulation, type-3",
    topology="buck",
    vin_min_v=10.8, vin_nom_v=12.0, vin_max_v=13.2,
    vout_nom_v=1.2, iout_rated_a=10.0, fsw_hz=500e3,
    stage=PowerStage(inductance_h=0.68e-6, turns_ratio=1.0, c_out_f=600e-6, esr_ohm=0.003, max_duty=0.85),
    losses=LossCoefficients(
        r_switch_ohm=0.008, r_sync_ohm=0.0033, r_primary_ohm=0.0020, r_secondary_ohm=0.0,
        rect_vf_v=0.0, rect_r_ohm=0.0, body_diode_vf_v=0.7, dead_time_s=20e-9,
        t_rise_s=8e-9, t_fall_s=6e-9, c_oss_f=600e-12, gate_charge_c=20e-9, gate_drive_v=5.0,
        controller_w=0.05, core_loss_ref_w=0.10, core_flux_ref_vs=(12.0 - 1.2) * 0.1 / 500e3, core_beta=2.5,
        input_bleed_ohm=math.inf, sense_divider_ohm=20.0e3),
    parasitics=Parasitics(leakage_h=1e-9, switch_node_c_f=1.2e-9, clamp_r_ohm=math.inf, clamp_c_f=0.0,
                          snubber_r_ohm=2.2, snubber_c_f=1e-9, diode_c_f=1e-9),
    control=Control(vref_v=0.6, divider_h=0.5, ramp_vm_v=1.5, opamp_gain_db=50.0, opamp_gbw_hz=10e6,
                    compensator=Type3Network(r1_ohm=10.0e3, r2_ohm=16.2e3, r3_ohm=1.0e3,
                                             c1_f=2.4e-9, c2_f=39e-12, c3_f=1.8e-9)),
    protection=Protection(uvlo_on_v=8.5, uvlo_off_v=7.8, current_limit_a=13.0),
    bench=BenchWiring(cable_r_ohm=0.02, sense_to_terminal_r_ohm=0.0003, settle_tau_s=0.005,
                      soft_start_tau_s=0.010, input_filter_tau_s=0.005),
    faults=FaultSettings(overheat_rate_w_per_s=0.05, overheat_max_w=2.0),
    thermal=ThermalPath(r_th_k_per_w=10.0, c_th_j_per_k=10.0),
    start_up=StartUpSettings(input_capacitance_f=44e-6, start_delay_s=0.5e-3, soft_start_s=2e-3),
)

FLYBACK_48V_5V_3V3 = replace(
    FLYBACK_48V_5V, name="flyback-48v-5v-3v3",
    description="36-75 V isolated flyback, 5 V 5 A regulated + 3.3 V 1.5 A coupled second output, 150 kHz")

SECOND_OUTPUTS: dict[str, SecondWinding] = {
    FLYBACK_48V_5V_3V3.name: SecondWinding(
        name="3v3", turns_ratio=2.0 / 3.0, vout_nom_v=3.3, iout_rated_a=1.5, iout_min_a=0.1,
        rect_vf_v=0.30, rect_r_ohm=0.020, winding_r_ohm=0.008, leakage_h=60e-9, main_leakage_h=40e-9),
}
"""The second output of each design that has one (by design name)."""

DESIGNS: dict[str, ConverterDesign] = {d.name: d for d in (FLYBACK_48V_5V, BUCK_12V_1V2, FLYBACK_48V_5V_3V3)}
