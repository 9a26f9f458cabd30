"""The waveform procedures end to end through benchctl.runner.execute on the simulated bench."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import signal
from scipy.optimize import brentq

from benchctl.procedure import load_procedure
from benchctl.runner import execute
from benchctl.simulated_instruments.converter import ConverterModel, ManualClock


def _run(name, bench, station, store, values):
    proc = load_procedure(name)
    params = proc.resolve_parameters(values={"source_current_limit_a": bench.limits.source_current_max_a, **values})
    outcome = execute(proc, params, station, store)
    assert outcome.status == "completed", outcome.message
    return outcome


def _results(store, run_id, name):
    r = store.results(run_id)
    return r[r["name"] == name]


def test_load_transient_peak_matches_closed_loop_zout(simulated_bench, station_for, benchctl_store):
    bench = simulated_bench("flyback-48v-5v")
    out = _run("load_transient", bench, station_for(bench), benchctl_store,
               {"vin_v": [48.0], "step_low_a": [2.5], "step_high_a": [5.0], "slew_a_per_s": [1e6],
                "band_v": 0.1})  # the band must hold the flyback ripple (about 70 mV pk-pk at 5 A)
    points = benchctl_store.points(out.run_id)
    assert list(points["tag"]) == ["increase", "decrease"]
    d = bench.design
    for _, row in points.iterrows():
        lo_to_hi = row["step_up"] == 1.0
        i_from, i_to = row["iout_from_a"], row["iout_set_a"]
        # truth: the model's closed-loop Zout at the pre-step point, driven by the slew-limited step,
        # integrated with scipy.signal.lsim (library function)
        truth = ConverterModel(d, clock=ManualClock())
        truth.set_source(48.0, 10.0, True)
        truth.set_load("CC", i_from, True)
        op = truth.operating_point()
        z = truth.output_impedance_transfer()
        t = np.linspace(0.0, 4e-3, 40001)
        di = (i_to - i_from) * np.clip(t / (abs(i_to - i_from) / 1e6), 0.0, 1.0)
        _, dv, _ = signal.lsim((z.num, z.den), di, t)
        expected = -dv[np.argmax(np.abs(dv))]
        wave = benchctl_store.array(out.run_id, "waveform", int(row["seq"]))
        # the capture rides on the switching ripple (asymmetric in a flyback: the ESR step at turn-off), so
        # allow the ripple's own excursion in the direction of the peak, read from the end of the record
        tail = wave["vout_ac_v"][-len(wave["vout_ac_v"]) // 10:]
        ripple_side = (tail.mean() - tail.min()) if lo_to_hi else (tail.max() - tail.mean())
        assert abs(row["vout_peak_deviation_v"] - expected) <= ripple_side + 0.05 * abs(expected)
        assert abs(row["vout_peak_deviation_v"]) >= abs(expected) - 0.05 * abs(expected)
        assert np.sign(row["vout_peak_deviation_v"]) == (-1 if lo_to_hi else 1)
        assert op.state == "regulating"
    rec = _results(benchctl_store, out.run_id, "transient_recovery_s")
    assert len(rec) == 2 and rec["value"].notna().all()
    meta = benchctl_store.arrays(out.run_id)["meta"].iloc[0]
    assert meta["bandwidth_limit_hz"] == pytest.approx(20e6) and meta["kind"] == "load_transient"
    assert d.name == "flyback-48v-5v"


def test_ripple_records_bandwidth_limit_and_follows_estimate(simulated_bench, station_for, benchctl_store):
    bench = simulated_bench("buck-12v-1v2")
    d = bench.design
    out = _run("ripple", bench, station_for(bench), benchctl_store,
               {"vin_v": [12.0], "iout_a": [5.0, 10.0], "fsw_hz": d.fsw_hz, "vout_scale_v_per_div": 0.002,
                "source_current_limit_a": bench.limits.source_current_max_a})
    points = benchctl_store.points(out.run_id)
    assert np.allclose(points["bandwidth_limit_hz"], 20e6)  # 20 MHz, common practice
    for _, row in points.iterrows():
        # Erickson & Maksimovic 2nd ed. ch. 2 (from memory): dI = (Vg - V)D/(fs L), dV_C = dI/(8 fs C), dV_ESR = dI ESR
        op = bench.model.steady_state(12.0, "CC", row["iout_set_a"], was_running=True)
        v, dty = op.vout_v, op.duty
        di = (12.0 - v) * dty / (d.fsw_hz * d.stage.inductance_h)
        dv_c, dv_esr = di / (8 * d.fsw_hz * d.stage.c_out_f), di * d.stage.esr_ohm
        noise_pp = 6 * 0.004 * 0.002  # +/-3 sigma of the scope's 0.4 % div rms noise at 2 mV/div
        assert 0.9 * max(dv_c, dv_esr) <= row["ripple_pk_pk_v"] <= 1.1 * (dv_c + dv_esr) + noise_pp
    res = _results(benchctl_store, out.run_id, "ripple_pk_pk_v")
    assert all(det["bandwidth_limit_hz"] == pytest.approx(20e6) for det in res["details"])


def test_conduction_mode_boundary_against_the_textbook(simulated_bench, station_for, benchctl_store):
    bench = simulated_bench("flyback-48v-5v")
    d = bench.design
    r = 0.02
    out = _run("conduction_mode", bench, station_for(bench), benchctl_store,
               {"vin_v": [36.0, 75.0], "iout_a": [0.3, 4.0], "threshold_ratio": r, "search_min_a": 0.2,
                "search_max_a": 3.0, "search_tol_a": 0.01})
    res = _results(benchctl_store, out.run_id, "ccm_dcm_boundary_a")
    assert len(res) == 2
    for value, scope in zip(res["value"], res["scope"]):
        vin = scope["vin_set_v"]
        # textbook boundary (Erickson & Maksimovic 2nd ed. ch. 5, from memory): K = 2L'/(R Ts) = (1-D)^2,
        # L' = n^2 Lm, D = V/(V + n Vin)  ->  I_crit = V (1-D)^2 / (2 L' fs)
        n, v = d.stage.turns_ratio, d.vout_nom_v
        duty = v / (v + n * vin)
        i_crit = v * (1 - duty) ** 2 / (2 * n * n * d.stage.inductance_h * d.fsw_hz)
        # a start/peak threshold r moves the detected edge to valley/peak = r: (1 + r)/(1 - r) x I_crit;
        # the design's conduction losses raise D a little, hence the few-percent allowance
        assert value == pytest.approx(i_crit * (1 + r) / (1 - r), rel=0.05)

        # against the model's own truth: where its valley/peak current ratio equals r
        def ratio(i, vin=vin):
            sp = bench.model.steady_state(vin, "CC", i, was_running=True).stage
            return (sp.l_valley_a if sp.mode == "CCM" else 0.0) / sp.l_peak_a - r
        assert value == pytest.approx(brentq(ratio, 0.5 * i_crit, 3 * i_crit), abs=0.02)
    # Without the threshold's bias: the zero of the CCM start current along the load is the
    # textbook boundary itself (same formula; a few % for the losses that raise D).
    extrapolated = _results(benchctl_store, out.run_id, "ccm_dcm_boundary_extrapolated_a")
    assert len(extrapolated) == 2
    for value, scope in zip(extrapolated["value"], extrapolated["scope"]):
        vin = scope["vin_set_v"]
        n, v = d.stage.turns_ratio, d.vout_nom_v
        duty = v / (v + n * vin)
        i_crit = v * (1 - duty) ** 2 / (2 * n * n * d.stage.inductance_h * d.fsw_hz)
        assert value == pytest.approx(i_crit, rel=0.06)
    maps = _results(benchctl_store, out.run_id, "conduction_mode_ccm")
    modes = {(s["vin_set_v"], s["iout_set_a"]): v for s, v in zip(maps["scope"], maps["value"])}
    assert modes == {(36.0, 0.3): 0.0, (36.0, 4.0): 1.0, (75.0, 0.3): 0.0, (75.0, 4.0): 1.0}


def test_switch_node_ring_and_two_capacitor_method(simulated_bench, station_for, benchctl_store):
    bench = simulated_bench("flyback-48v-5v")
    p = bench.design.parasitics
    out = _run("switch_node", bench, station_for(bench), benchctl_store,
               {"vin_v": [48.0], "iout_a": [5.0], "c_add_f": 220e-12})
    row = benchctl_store.points(out.run_id).iloc[0]
    # ring at 1/(2 pi sqrt(L C)) of the model's leakage inductance and switch-node capacitance
    assert row["ring_natural_freq_hz"] == pytest.approx(1 / (2 * math.pi * math.sqrt(p.leakage_h * p.switch_node_c_f)),
                                                        rel=0.01)
    assert row["ring_natural_freq_cadd_hz"] == pytest.approx(
        1 / (2 * math.pi * math.sqrt(p.leakage_h * (p.switch_node_c_f + 220e-12))), rel=0.01)
    assert row["c_par_f"] == pytest.approx(p.switch_node_c_f, rel=0.03)
    assert row["l_par_h"] == pytest.approx(p.leakage_h, rel=0.03)
    # RC snubber: R = sqrt(L/C) (Mohan, Undeland & Robbins 3rd ed. ch. 27, from memory)
    assert row["snubber_r_ohm"] == pytest.approx(math.sqrt(p.leakage_h / p.switch_node_c_f), rel=0.03)
    assert row["ring_fit_ok"] == 1.0
    assert row["drain_peak_v"] > 48.0 + 5.0 / 0.2  # above Vin + reflected voltage: the leakage spike
    assert bench.instruments["scope"].fixture_c_f == 0.0  # the added capacitance was removed again


def test_conduction_mode_labels_follow_the_model_near_the_boundary(simulated_bench, station_for, benchctl_store):
    bench = simulated_bench("flyback-48v-5v")
    out = _run("conduction_mode", bench, station_for(bench), benchctl_store,
               {"vin_v": [36.0], "iout_a": [0.6, 1.0, 1.6, 4.0], "search_min_a": 0.2, "search_max_a": 3.0,
                "search_tol_a": 0.005})

    def valley_to_peak(i):
        sp = bench.model.steady_state(36.0, "CC", i, was_running=True).stage
        return (sp.l_valley_a if sp.mode == "CCM" else 0.0) / sp.l_peak_a

    # 1.0 A is light-load CCM: the model's own valley is 7 % of the peak (a start/peak threshold of
    # 0.1 would call it DCM); the default rule labels every map point as the model runs it
    assert 0.05 < valley_to_peak(1.0) < 0.1
    maps = _results(benchctl_store, out.run_id, "conduction_mode_ccm")
    for scope, value, det in zip(maps["scope"], maps["value"], maps["details"]):
        truth = 1.0 if valley_to_peak(scope["iout_set_a"]) > 0 else 0.0
        assert value == truth, scope
        assert det["side_of_extrapolated_boundary"] == ("CCM" if truth else "DCM")
    # the bisection boundary against the model's own boundary, where its valley current reaches
    # zero (found with scipy.optimize.brentq on the model's steady state): within 2 %, i.e. the
    # detection limit, where the bias of a threshold r would be (1 + r)/(1 - r) - 1 = 22 % for r = 0.1
    d = bench.design
    n, v = d.stage.turns_ratio, d.vout_nom_v

    def valley(i):
        sp = bench.model.steady_state(36.0, "CC", i, was_running=True).stage
        return sp.l_valley_a if sp.mode == "CCM" else -(1.0 - (sp.d2 + sp.duty))  # < 0 in DCM (idle time)

    i_model = brentq(valley, 0.3, 3.0, xtol=1e-4)
    duty = v / (v + n * 36.0)
    i_textbook = v * (1 - duty) ** 2 / (2 * n * n * d.stage.inductance_h * d.fsw_hz)  # Erickson 2nd ed. ch. 5
    assert i_model == pytest.approx(i_textbook, rel=0.03)
    found = _results(benchctl_store, out.run_id, "ccm_dcm_boundary_a")["value"].iloc[0]
    assert i_model <= found <= 1.02 * i_model + 0.005
    extrapolated = _results(benchctl_store, out.run_id, "ccm_dcm_boundary_extrapolated_a")["value"].iloc[0]
    assert extrapolated == pytest.approx(i_model, rel=0.02)
