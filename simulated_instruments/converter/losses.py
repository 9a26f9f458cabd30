"""Loss model: where the power goes, term by term, from the cycle waveforms.

Every term is computed from the StagePoint current waveforms (CCM trapezoids or DCM
triangles), so conduction losses use true rms currents.  Terms and their textbook
forms (Erickson & Maksimović, *Fundamentals of Power Electronics*, 2nd ed., ch. 3–4;
switching-loss estimates are common practice):

* conduction: I_rms²·R of each switch, winding, output-capacitor ESR and of the copper
  between the sense point and the output terminals;
* rectifier: V_F·I_avg + r_D·I_rms² (flyback diode); body-diode conduction during
  the dead times (buck);
* switching: overlap ½·V·I·t_r·fs at turn-on plus ½·V·I·t_f·fs at turn-off, and
  ½·C_oss·V²·fs; gate drive Q_g·V_drv·fs is counted in ``fixed_w``;
* snubber: RCD clamp fed by the leakage energy ½·L_lk·I_pk²·fs, clamp voltage from
  V_c²/R = ½·L_lk·I_pk²·fs·V_c/(V_c − V_r); RC snubber C·V²·fs;
* magnetic: core loss P_ref·(λ/λ_ref)^β with λ the volt-seconds per cycle;
* fixed: controller, gate drive, start-up bleed resistor and the sense divider.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

from .design import ConverterDesign
from .power_stage import StagePoint


@dataclass(frozen=True)
class LossBreakdown:
    """Dissipation inside the DUT by mechanism, W.  ``total_w`` is their sum.

    fault_w: extra dissipation of an injected ``overheat`` fault.
    restart_w: power burnt in repeated start attempts while the input collapses (hiccup).
    clamp_v: flyback RCD clamp voltage (V above the input), 0 where not applicable.
    """

    fixed_w: float = 0.0
    conduction_w: float = 0.0
    switching_w: float = 0.0
    snubber_w: float = 0.0
    magnetic_w: float = 0.0
    rectifier_w: float = 0.0
    fault_w: float = 0.0
    restart_w: float = 0.0
    clamp_v: float = 0.0

    @property
    def total_w(self) -> float:
        """Sum of all dissipation terms, W."""
        return (self.fixed_w + self.conduction_w + self.switching_w + self.snubber_w
                + self.magnetic_w + self.rectifier_w + self.fault_w + self.restart_w)


def idle_losses(design: ConverterDesign, vin_v: float) -> LossBreakdown:
    """Dissipation while not switching (under-voltage lockout): the start-up bleed, W."""
    r = design.losses.input_bleed_ohm
    return LossBreakdown(fixed_w=0.0 if math.isinf(r) else vin_v * vin_v / r)


def switching_losses(design: ConverterDesign, sp: StagePoint, iload_a: float,
                     fault_w: float = 0.0) -> LossBreakdown:
    """All losses of a switching converter at stage point ``sp`` with ``iload_a`` at the terminals, W."""
    ls, par = design.losses, design.parasitics
    fs = design.fsw_hz
    vin = sp.vin_v
    fixed = ls.controller_w + ls.gate_charge_c * ls.gate_drive_v * fs
    if not math.isinf(ls.input_bleed_ohm):
        fixed += vin * vin / ls.input_bleed_ohm
    fixed += sp.v_v * sp.v_v / ls.sense_divider_ohm
    conduction = (sp.cap_rms_a ** 2 * design.stage.esr_ohm
                  + iload_a * iload_a * design.bench.sense_to_terminal_r_ohm)
    lam = abs(sp.volt_seconds_vs)
    magnetic = ls.core_loss_ref_w * (lam / ls.core_flux_ref_vs) ** ls.core_beta if ls.core_flux_ref_vs > 0 else 0.0
    i_on = max(sp.l_valley_a, 0.0) if sp.mode == "CCM" else 0.0
    i_off = sp.l_peak_a
    clamp_v = 0.0
    if design.topology == "flyback":
        n = design.stage.turns_ratio
        conduction += sp.sw_rms_a ** 2 * (ls.r_switch_ohm + ls.r_primary_ohm) + sp.rect_rms_a ** 2 * ls.r_secondary_ohm
        rectifier = ls.rect_vf_v * sp.rect_avg_a + sp.rect_rms_a ** 2 * ls.rect_r_ohm
        v_reflected = max(sp.v_v + ls.rect_vf_v, 0.0) / n
        v_sw = vin + v_reflected
        # In DCM the switch turns on after the ring has settled around Vin (no current).
        v_turn_on = v_sw if sp.mode == "CCM" else vin
        switching = 0.5 * fs * (v_turn_on * i_on * ls.t_rise_s + v_sw * i_off * ls.t_fall_s)
        switching += 0.5 * ls.c_oss_f * v_turn_on ** 2 * fs
        e_leak_w = 0.5 * par.leakage_h * i_off * i_off * fs
        if math.isinf(par.clamp_r_ohm):
            snubber = e_leak_w
        else:
            clamp_v = 0.5 * (v_reflected + math.sqrt(v_reflected ** 2 + 4.0 * e_leak_w * par.clamp_r_ohm))
            snubber = clamp_v * clamp_v / par.clamp_r_ohm
        v_rev = n * vin + max(sp.v_v, 0.0)
        snubber += par.snubber_c_f * v_rev * v_rev * fs
    else:
        conduction += (sp.sw_rms_a ** 2 * ls.r_switch_ohm + sp.rect_rms_a ** 2 * ls.r_sync_ohm
                       + sp.l_rms_a ** 2 * ls.r_primary_ohm)
        rectifier = ls.body_diode_vf_v * (i_off + i_on) * ls.dead_time_s * fs
        switching = 0.5 * fs * vin * (i_on * ls.t_rise_s + i_off * ls.t_fall_s) + 0.5 * ls.c_oss_f * vin * vin * fs
        snubber = 0.5 * par.leakage_h * i_off * i_off * fs + par.snubber_c_f * vin * vin * fs
    return LossBreakdown(fixed_w=fixed, conduction_w=conduction, switching_w=switching, snubber_w=snubber,
                         magnetic_w=magnetic, rectifier_w=rectifier, fault_w=fault_w, clamp_v=clamp_v)
