"""turn_on end to end on the simulated bench (time scale 1) against the model's start-up design values."""

from __future__ import annotations

import math

import pytest

from benchctl.exit_codes import EXIT_OK
from benchctl.limits import check_limits, load_limits
from benchctl.procedure import load_procedure, procedures_dir
from benchctl.commands.check import load_run_data
from benchctl.report import build_report
from benchctl.runner import execute


def test_turn_on_into_cc_cr_and_capacitive_loads_matches_the_model(simulated_bench, station_for, benchctl_store,
                                                                    tmp_path):
    bench = simulated_bench("flyback-48v-5v", time_scale=1.0)
    d = bench.design
    proc = load_procedure("turn_on")
    params = proc.resolve_parameters(values={"vin_v": [48.0], "off_wait_s": 0.2, "source_current_limit_a": 1.2})
    out = execute(proc, params, station_for(bench), benchctl_store)
    assert out.status == "completed", out.message
    pts = benchctl_store.points(out.run_id).set_index("tag")
    assert list(pts.index) == ["cc", "cr", "cap"]
    ss, su = d.start_up.soft_start_s, d.start_up
    c_in, ilim = su.input_capacitance_f, params.source_current_limit_a
    # Truth from the model's design values (simulated_instruments/converter/start_up.py): the input
    # charges at I_lim/C_in (capacitor law), switching starts start_delay_s after the UVLO on crossing,
    # the reference ramps linearly over soft_start_s.  Delay from 90 % of the input to 10 % of the output:
    delay = (d.protection.uvlo_on_v - 0.9 * 48.0) * c_in / ilim + su.start_delay_s + 0.1 * ss
    for case in ("cc", "cr"):
        row = pts.loc[case]
        # tolerance 50 µs: a few samples (1 µs) and the scope's noise on a 0.6 V/ms slope (4 mV rms)
        assert row["turn_on_delay_s"] == pytest.approx(delay, abs=50e-6)
        assert row["rise_time_s"] == pytest.approx(0.8 * ss, rel=0.02)           # linear ramp: 0.8 T
        assert row["monotonic"] == 1.0 and row["overshoot_pct"] < 1.0
        assert row["inrush_peak_a"] == pytest.approx(ilim, abs=0.05)                # held at the source's limit
        # current-limited charge I²t = I·C·V (a rectangle I for C·V/I) within 5 % (window edges, noise)
        assert row["inrush_i2t_a2s"] == pytest.approx(ilim * c_in * 48.0, rel=0.05)
        # turn-off: the model's stop is one exponential with settle_tau_s: 90 -> 10 % in tau·ln 9
        assert row["fall_time_s"] == pytest.approx(d.bench.settle_tau_s * math.log(9.0), rel=0.03)
    # capacitive load: the converter's current limit charges C_out + C_load: t_r = 0.8·C·V/(I_lim - I_load)
    cap = pts.loc["cap"]
    c_total = d.stage.c_out_f + params.cap_load_f
    v_final = cap["vout_final_v"]
    expect = 0.8 * c_total * v_final / (d.protection.current_limit_a - params.cap_load_cc_a)
    assert expect > 0.8 * ss
    assert cap["rise_time_s"] == pytest.approx(expect, rel=0.03)
    res = benchctl_store.results(out.run_id)
    assert {"turn_on_delay_s", "rise_time_s", "inrush_i2t_a2s", "fall_time_s", "max_overshoot_pct"} <= set(res["name"])
    arrays = benchctl_store.arrays(out.run_id)
    kinds = [m["kind"] for m in arrays["meta"]]
    assert kinds.count("turn_on") == 3 and kinds.count("turn_off") == 3
    report = build_report(benchctl_store, out.run_id, tmp_path / "report")
    assert sum("turn-on" in p.name for p in report.png_paths) == 3, (report.png_paths, report.notes)
    # the bundled flyback limits pass the bundled flyback model
    limits = load_limits(procedures_dir() / "limits" / "flyback-48v-5v-start-up.toml")
    checked = check_limits(limits, load_run_data(benchctl_store, out.run_id))
    assert len({o.limit.quantity for o in checked.outcomes}) == 7
    assert checked.exit_code == EXIT_OK, checked.summary + "\n" + "\n".join(o.reason for o in checked.outcomes)


def test_turn_on_triggered_on_the_output_edge_measures_the_same_delay(simulated_bench, station_for, benchctl_store):
    bench = simulated_bench("flyback-48v-5v", time_scale=1.0)
    d, su = bench.design, bench.design.start_up
    proc = load_procedure("turn_on")
    params = proc.resolve_parameters(values={"vin_v": [48.0], "off_wait_s": 0.2, "source_current_limit_a": 1.2,
                                             "cr_load_ohm": 0.0, "cap_load_f": 0.0, "trigger_on": "output",
                                             "pre_trigger_s": 0.015})
    out = execute(proc, params, station_for(bench), benchctl_store)
    assert out.status == "completed", out.message
    row = benchctl_store.points(out.run_id).set_index("tag").loc["cc"]
    delay = (d.protection.uvlo_on_v - 0.9 * 48.0) * su.input_capacitance_f / 1.2 + su.start_delay_s \
        + 0.1 * su.soft_start_s      # as above: the model's start-up design values
    assert row["turn_on_delay_s"] == pytest.approx(delay, abs=50e-6)
