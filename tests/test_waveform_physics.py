"""Waveforms of the simulated converter against the model's own truth and outside formulas."""

from __future__ import annotations

import math
from dataclasses import replace

import numpy as np
import pytest
from scipy import signal

from benchctl.analysis.conduction_mode import classify_conduction_mode
from benchctl.analysis.ringing import fit_ringing, parasitics_from_two_frequencies
from benchctl.analysis.ripple import output_ripple
from benchctl.analysis.ringing import ring_start_index
from benchctl.simulated_instruments.converter import DESIGNS, ConverterModel, ManualClock
from benchctl.simulated_instruments.waveforms import (ImpedanceResponse, LoadStep, RecordContext, RecordSynth,
                                             closed_loop_zout)


def _model(design, vin_v, iout_a):
    m = ConverterModel(design, clock=ManualClock())
    m.set_source(vin_v, 10.0, True)
    m.set_load("CC", iout_a, True)
    return m


def _synth(design, op, steps=(), extra_c_f=0.0):
    return RecordSynth(RecordContext(design, op, tuple(steps), extra_c_f))


@pytest.mark.parametrize("name", ["flyback-48v-5v", "buck-12v-1v2"])
def test_partial_fraction_step_response_matches_scipy(name):
    d = DESIGNS[name]
    m = _model(d, d.vin_nom_v, d.iout_rated_a / 2)
    z = m.output_impedance_transfer()
    t = np.linspace(0.0, 20.0 / d.fsw_hz * 50, 3000)
    # reference: scipy.signal.step of the model's Zout(s) (library function)
    _, ref = signal.step((z.num, z.den), T=t)
    ours = ImpedanceResponse.from_tf(z).step(t)
    assert np.max(np.abs(ours[1:] - ref[1:])) < 1e-6 * np.max(np.abs(ref))
    # the scope's Zout is the model's own closed-loop Zout (same small-signal model as the loop analyzer)
    f = np.logspace(1, 6, 50)
    assert np.allclose(closed_loop_zout(d, m.operating_point()).response(f), m.output_impedance(f), rtol=1e-12)


def test_load_step_response_follows_closed_loop_zout():
    d = DESIGNS["flyback-48v-5v"]
    m_lo = _model(d, 48.0, 2.5)
    op_lo = m_lo.operating_point()
    op_hi = m_lo.steady_state(op_lo.vin_v, "CC", 5.0, was_running=True)
    slew = 1e6
    step = LoadStep(1e-4, 2.5, 5.0, slew, op_lo, op_hi)
    t = np.linspace(0.0, 3e-3, 30001)
    v = _synth(d, op_lo, [step]).vout_dc(t)
    # reference: scipy.signal.lsim of Zout(s) driven by the slew-limited current step (library function)
    z = m_lo.output_impedance_transfer()
    di = np.clip((t - 1e-4) / (2.5 / slew), 0.0, 1.0) * 2.5
    _, dv, _ = signal.lsim((z.num, z.den), di, t)
    assert np.max(np.abs((op_lo.vout_v - v) - dv)) < 1e-3 * np.max(np.abs(dv))
    assert np.max(dv) > 0.08  # a real dip: about 0.1 V for this step (the flyback's K-factor type-3 loop)


@pytest.mark.parametrize("extra_c_f", [0.0, 220e-12])
def test_flyback_drain_ring_frequency_is_the_lc_resonance(extra_c_f):
    d = DESIGNS["flyback-48v-5v"]
    op = _model(d, 48.0, 5.0).operating_point()
    synth = _synth(d, op, extra_c_f=extra_c_f)
    t_off = op.duty * d.ts_s
    t = t_off + np.arange(-200, 12000) * 0.25e-9
    v = synth.signal("drain", t)
    fit = fit_ringing(t, v, start_index=ring_start_index(v))
    # f = 1/(2*pi*sqrt(L*C)) of the model's leakage inductance and node capacitance (LC resonance, circuits text)
    p = d.parasitics
    f_lc = 1.0 / (2 * math.pi * math.sqrt(p.leakage_h * (p.switch_node_c_f + extra_c_f)))
    assert fit.f_natural_hz == pytest.approx(f_lc, rel=2e-3)
    assert fit.fit_ok
    # the drain settles at Vin + V_reflected, V_r = (V + Vf)/n (flyback, Erickson 2nd ed. ch. 6)
    assert fit.offset_v == pytest.approx(op.vin_v + (op.stage.v_v + d.losses.rect_vf_v) / d.stage.turns_ratio, rel=1e-3)


def test_two_capacitor_method_recovers_the_model_parts():
    d = DESIGNS["flyback-48v-5v"]
    op = _model(d, 48.0, 5.0).operating_point()
    t = op.duty * d.ts_s + np.arange(-200, 12000) * 0.25e-9
    f = []
    for c in (0.0, 200e-12):
        v = _synth(d, op, extra_c_f=c).signal("drain", t)
        f.append(fit_ringing(t, v, start_index=ring_start_index(v)).f_natural_hz)
    lc = parasitics_from_two_frequencies(f[0], f[1], 200e-12)
    assert lc.c_par_f == pytest.approx(d.parasitics.switch_node_c_f, rel=0.01)
    assert lc.l_par_h == pytest.approx(d.parasitics.leakage_h, rel=0.01)


def test_buck_ripple_against_capacitor_and_esr_estimate():
    # Erickson & Maksimovic 2nd ed. ch. 2 (from memory): dI = (Vg - V) D/(fs L); dV_C = dI/(8 fs C); dV_ESR = dI*ESR
    base = DESIGNS["buck-12v-1v2"].lossless()
    vin, iout = 12.0, 5.0

    def ripple(design):
        op = _model(design, vin, iout).operating_point()
        assert op.conduction_mode == "CCM"
        t = np.arange(0, 20000) * (4.0 / design.fsw_hz / 20000)
        v = _synth(design, op).signal("vout", t)
        return output_ripple(t, v, fsw_hz=design.fsw_hz).pk_pk_v, op

    d_cap = replace(base, stage=replace(base.stage, esr_ohm=0.0))
    pp, op = ripple(d_cap)
    v, dty = op.vout_v, op.vout_v / vin
    di = (vin - v) * dty / (base.fsw_hz * base.stage.inductance_h)
    assert op.stage.l_ripple_pp_a == pytest.approx(di, rel=1e-6)
    assert pp == pytest.approx(di / (8 * base.fsw_hz * base.stage.c_out_f), rel=0.01)
    d_esr = replace(base, stage=replace(base.stage, esr_ohm=3e-3, c_out_f=1.0))  # capacitor part negligible
    pp_esr, _ = ripple(d_esr)
    assert pp_esr == pytest.approx(di * 3e-3, rel=0.01)
    d_both = replace(base, stage=replace(base.stage, esr_ohm=3e-3))
    pp_both, _ = ripple(d_both)
    dv_c, dv_esr = di / (8 * base.fsw_hz * base.stage.c_out_f), di * 3e-3
    # the two parts are not in phase: the total lies between the larger part and their sum
    assert 0.99 * max(dv_c, dv_esr) <= pp_both <= (dv_c + dv_esr) * 1.001


@pytest.mark.parametrize("vin_v", [36.0, 75.0])
def test_switch_current_start_tracks_the_textbook_boundary(vin_v):
    # Flyback boundary K = 2L'/(R Ts) = (1 - D)^2, L' = n^2 Lm (Erickson & Maksimovic 2nd ed. ch. 5, from memory)
    d = DESIGNS["flyback-48v-5v"].lossless()
    n, lm, v = d.stage.turns_ratio, d.stage.inductance_h, d.vout_nom_v
    duty = v / (v + n * vin_v)
    i_crit = v * (1 - duty) ** 2 / (2 * n * n * lm * d.fsw_hz)
    modes = {}
    for factor in (0.8, 1.25):
        op = _model(d, vin_v, factor * i_crit).operating_point()
        t = np.arange(0, 16000) * (8 * d.ts_s / 16000)
        i = _synth(d, op).signal("switch_current", t)
        modes[factor] = classify_conduction_mode(t, i, fsw_hz=d.fsw_hz, threshold_ratio=0.05).mode
    assert modes == {0.8: "DCM", 1.25: "CCM"}
