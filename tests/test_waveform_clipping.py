"""Traces cut by the scope's screen: the simulated scope clips at its screen, the driver tells,
the procedures re-acquire with a taller screen, and a value read from a trace that still clips
is stored as a bound with the quality flags and an event."""

from __future__ import annotations

import numpy as np
import pytest

from benchctl.acquire import clip_flags, add_flags, widened_screen
from benchctl.procedure import load_procedure
from benchctl.runner import execute
from benchctl.drivers.oscilloscope import Oscilloscope
from benchctl.simulated_instruments.bench import SimulatedBench
from benchctl.simulated_instruments.converter import ConverterModel, ManualClock
from benchctl.simulated_instruments.waveforms import RecordContext, RecordSynth


def _run(name, bench, station, store, values):
    proc = load_procedure(name)
    params = proc.resolve_parameters(values={"source_current_limit_a": bench.limits.source_current_max_a, **values})
    outcome = execute(proc, params, station, store)
    assert outcome.status == "completed", outcome.message
    return outcome


def _result(store, run_id, name):
    r = store.results(run_id)
    return r[r["name"] == name]


def _true_drain_peak_v(design, vin_v, iout_a, extra_c_f=0.0):
    """Drain peak of the model itself: its switch-node waveform over one period on a 0.1 ns grid."""
    m = ConverterModel(design, clock=ManualClock())
    m.set_source(vin_v, 10.0, True)
    m.set_load("CC", iout_a, True)
    synth = RecordSynth(RecordContext(design, m.operating_point(), (), extra_c_f))
    t = 1.0 + np.arange(0.0, design.ts_s, 1e-10)
    return float(np.max(synth.signal("drain", t)))


def test_widened_screen_keeps_the_edge_that_did_not_clip():
    # screen = centre -/+ 5 div: 60 V -/+ 100 V at 20 V/div = -40 .. 160 V
    assert widened_screen(20.0, 60.0, clipped_high=True, clipped_low=False) == (40.0, 160.0)  # -40 .. 360 V
    assert widened_screen(20.0, 60.0, clipped_high=False, clipped_low=True) == (40.0, -40.0)  # -240 .. 160 V
    assert widened_screen(20.0, 60.0, clipped_high=True, clipped_low=True) == (40.0, 60.0)
    assert widened_screen(1.0, 0.0, clipped_high=True, clipped_low=False, factor=3.0) == (3.0, 10.0)  # -5 .. 25
    with pytest.raises(ValueError, match="above 1"):
        widened_screen(1.0, 0.0, clipped_high=True, clipped_low=False, factor=1.0)
    f = clip_flags(True, bound="lower_bound", reason="cut")
    assert f == {"flags": ["clipped", "lower_bound"], "flag_reasons": "cut"} and clip_flags(False) == {}
    merged = add_flags({"flags": ["unsettled"], "flag_reasons": "slow"}, f)
    assert merged["flags"] == ["unsettled", "clipped", "lower_bound"] and merged["flag_reasons"] == "slow; cut"


@pytest.mark.parametrize("fmt", ["int16", "int8", "float32"])
def test_simulated_scope_clips_at_the_screen_and_the_driver_counts_it(fmt):
    bench = SimulatedBench("flyback-48v-5v", time_scale=50.0, seed=4).start()
    scope = Oscilloscope(bench.resources["scope"], timeout_s=10.0).open()
    try:
        bench.model.set_source(75.0, 10.0, True)
        bench.model.set_load("CC", 5.0, True)
        scope.set_data_format(fmt)
        scope.set_record(3e-6, 6000, pre_trigger_s=3e-7)
        scope.set_bandwidth_limit(2, None)
        scope.set_trigger(2, level=37.5, slope="rising", holdoff_s=200e-9)
        # a screen of 5 .. 105 V: the ~175 V drain peak and the on-state floor (about 1 V) both leave it
        scope.set_scale(2, 10.0)
        scope.set_offset(2, 55.0)
        assert scope.screen(2) == pytest.approx((5.0, 105.0))
        scope.single(10.0)
        wf = scope.fetch_waveform(2)
        resolution = 100.0 / (256 if fmt == "int8" else 65536)
        assert wf.screen_high == pytest.approx(105.0, abs=2 * resolution)
        assert wf.screen_low == pytest.approx(5.0, abs=2 * resolution)
        assert wf.values.max() <= wf.screen_high + 1e-9 and wf.values.min() >= wf.screen_low - 1e-9
        # the samples counted as clipped are exactly those held at a screen edge
        at_top = np.count_nonzero(wf.values >= wf.screen_high - 1e-6 * 100.0)
        at_bottom = np.count_nonzero(wf.values <= wf.screen_low + 1e-6 * 100.0)
        assert wf.clipped_high_samples == at_top > 50  # the clamp plateau and the ring crests
        assert wf.clipped_low_samples == at_bottom > 0
        assert wf.clipped_samples == at_top + at_bottom and wf.clipped
        # a screen holding the whole trace: nothing at an edge
        scope.set_scale(2, 50.0)
        scope.set_offset(2, 100.0)
        scope.single(10.0)
        wide = scope.fetch_waveform(2)
        assert wide.clipped_samples == 0 and wide.values.max() > 150.0
    finally:
        scope.close()
        bench.stop()


def test_switch_node_reacquires_a_clipped_drain_and_reads_the_true_peak(simulated_bench, station_for,
                                                                          benchctl_store):
    bench = simulated_bench("flyback-48v-5v")
    out = _run("switch_node", bench, station_for(bench), benchctl_store, {"vin_v": [48.0, 75.0], "iout_a": [5.0]})
    points = benchctl_store.points(out.run_id).set_index("vin_set_v")
    # the default screen (20 V/div around 60 V) tops out at 160 V: enough at 48 V, not at 75 V
    assert points.loc[48.0, "captures"] == 1.0 and points.loc[48.0, "clipped_samples"] == 0.0
    assert points.loc[75.0, "captures"] == 2.0 and points.loc[75.0, "clipped_samples"] == 0.0
    truth = _true_drain_peak_v(bench.design, 75.0, 5.0)
    assert truth > 160.0  # above the first screen, as the drain at 75 V is
    # the peak of the re-acquired trace is the model's, within the scope's noise (0.004 div rms at
    # 40 V/div, +/-4 sigma) and the sampling of the crest (0.3 ns per sample)
    assert points.loc[75.0, "drain_peak_v"] == pytest.approx(truth, abs=4 * 0.004 * 40 + 0.01 * truth)
    peaks = _result(benchctl_store, out.run_id, "drain_peak_v")
    assert all("flags" not in d for d in peaks["details"])
    events = benchctl_store.events(out.run_id)
    info = events[events["message"].str.contains("re-acquired at 40 V/div")]
    assert len(info) == 1 and info["kind"].iloc[0] == "info"
    meta = benchctl_store.arrays(out.run_id)["meta"].iloc[1]["acquisition"]
    assert meta["attempts"] == 2 and meta["channels"][0]["scales_per_div"] == [20.0, 40.0]
    assert meta["channels"][0]["offsets"] == [60.0, 160.0]  # the bottom edge (-40 V) stayed
    # the scope is back on the procedure's own screen for the next point
    assert bench.instruments["scope"]._ch[2].range_v == pytest.approx(200.0)
    assert bench.instruments["scope"]._ch[2].offset_v == pytest.approx(60.0)


def test_switch_node_still_clipped_is_stored_as_a_lower_bound(simulated_bench, station_for, benchctl_store,
                                                                tmp_path):
    bench = simulated_bench("flyback-48v-5v")
    out = _run("switch_node", bench, station_for(bench), benchctl_store,
               {"vin_v": [75.0], "iout_a": [5.0], "max_reacquisitions": 0})
    row = benchctl_store.points(out.run_id).iloc[0]
    assert row["captures"] == 1.0 and row["clipped_samples"] > 0 and row["clipped_high"] == 1.0
    truth = _true_drain_peak_v(bench.design, 75.0, 5.0)
    assert row["drain_peak_v"] == pytest.approx(160.0, abs=0.01)  # the top of the screen, not the peak
    assert row["drain_peak_v"] < truth  # a lower bound indeed
    peak = _result(benchctl_store, out.run_id, "drain_peak_v").iloc[0]
    assert peak["details"]["flags"] == ["clipped", "lower_bound"] and peak["details"]["flag_reasons"]
    worst = _result(benchctl_store, out.run_id, "max_drain_peak_v").iloc[0]
    assert worst["details"]["flags"] == ["clipped", "lower_bound"]
    ring = _result(benchctl_store, out.run_id, "ring_freq_hz").iloc[0]
    assert "clipped" in ring["details"]["flags"] and "lower_bound" not in ring["details"]["flags"]
    events = benchctl_store.events(out.run_id)
    warning = events[(events["kind"] == "warning") & events["message"].str.contains("still clipped")]
    assert len(warning) == 1
    assert "stored as bounds" in warning["message"].iloc[0]
    # a limit cannot pass on it: below a maximum above it, undecided; above a maximum below it, a failure
    from benchctl.commands.check import check_run

    for maximum, passed in ((200.0, None), (150.0, False)):
        spec = tmp_path / f"drain-{maximum:g}.toml"
        spec.write_text(f'[spec]\nname = "drain"\n[[limit]]\nname = "drain peak"\nquantity = "drain_peak_v"\n'
                        f"max = {maximum!r}\n", encoding="utf-8")
        report = check_run(benchctl_store, out.run_id, spec, print_table=False, record=False)
        assert report.outcomes[0].passed is passed and report.exit_code != 0


def test_ripple_reacquires_or_flags_a_clipped_output(simulated_bench, station_for, benchctl_store):
    bench = simulated_bench("buck-12v-1v2")
    d = bench.design
    common = {"vin_v": [12.0], "iout_a": [10.0], "fsw_hz": d.fsw_hz}
    wide = _run("ripple", bench, station_for(bench), benchctl_store, {**common, "vout_scale_v_per_div": 0.002})
    reference = benchctl_store.points(wide.run_id).iloc[0]
    assert reference["captures"] == 1.0 and reference["clipped_samples"] == 0.0
    # a screen of -/+ 1.5 mV: the ~3-4 mV pk-pk ripple leaves it at both edges
    tight = {**common, "vout_scale_v_per_div": 0.0003}
    again = _run("ripple", bench, station_for(bench), benchctl_store, tight)
    row = benchctl_store.points(again.run_id).iloc[0]
    assert row["captures"] >= 2.0 and row["clipped_samples"] == 0.0
    # the re-acquired pk-pk is the one a well-set screen gives, within the noise of the two screens
    # (0.004 div rms: +/-3 sigma at 2 mV/div and at the re-acquired scale each)
    final_scale = benchctl_store.arrays(again.run_id)["meta"].iloc[0]["acquisition"]["channels"][0]["scales_per_div"][-1]
    noise_pp = 6 * 0.004 * (0.002 + final_scale)
    assert row["ripple_pk_pk_v"] == pytest.approx(reference["ripple_pk_pk_v"], abs=noise_pp)
    assert all("flags" not in det for det in _result(benchctl_store, again.run_id, "ripple_pk_pk_v")["details"])
    # no re-acquisition allowed: the clipped pk-pk is stored, smaller than the truth, as a lower bound
    cut = _run("ripple", bench, station_for(bench), benchctl_store, {**tight, "max_reacquisitions": 0})
    row = benchctl_store.points(cut.run_id).iloc[0]
    assert row["clipped_samples"] > 0 and row["ripple_pk_pk_v"] < reference["ripple_pk_pk_v"]
    assert row["ripple_pk_pk_v"] <= 0.0003 * 10 + 1e-9  # no more than the screen's height
    for name in ("ripple_pk_pk_v", "ripple_rms_v", "max_ripple_pk_pk_v"):
        det = _result(benchctl_store, cut.run_id, name)["details"].iloc[0]
        assert det["flags"] == ["clipped", "lower_bound"], name
    events = benchctl_store.events(cut.run_id)
    assert (events["kind"] == "warning").sum() == 1 and "still clipped" in events["message"].iloc[-1]


def test_load_transient_reacquires_the_same_step(simulated_bench, station_for, benchctl_store):
    bench = simulated_bench("flyback-48v-5v")
    values = {"vin_v": [48.0], "step_low_a": [2.5], "step_high_a": [5.0], "slew_a_per_s": [1e6], "band_v": 0.1}
    ok = _run("load_transient", bench, station_for(bench), benchctl_store, values)
    ref = benchctl_store.points(ok.run_id).set_index("tag")
    assert (ref["captures"] == 1.0).all()
    # 10 mV/div: a screen of -/+ 50 mV against a ~150 mV dip
    tight = _run("load_transient", bench, station_for(bench), benchctl_store,
                 {**values, "vout_scale_v_per_div": 0.01})
    pts = benchctl_store.points(tight.run_id).set_index("tag")
    assert (pts["captures"] >= 2.0).all() and (pts["clipped_samples"] == 0.0).all()
    # the re-captured step is the same step: same direction, same size within the ripple (~70 mV pk-pk)
    for tag in ("increase", "decrease"):
        assert np.sign(pts.loc[tag, "vout_peak_deviation_v"]) == np.sign(ref.loc[tag, "vout_peak_deviation_v"])
        assert pts.loc[tag, "vout_peak_deviation_v"] == pytest.approx(ref.loc[tag, "vout_peak_deviation_v"],
                                                                      abs=0.035)
    # the load ends where the procedure left it: both steps were undone and redone in pairs
    assert list(pts.index) == ["increase", "decrease"]
    cut = _run("load_transient", bench, station_for(bench), benchctl_store,
               {**values, "vout_scale_v_per_div": 0.01, "max_reacquisitions": 0})
    res = _result(benchctl_store, cut.run_id, "transient_peak_deviation_v")
    by_step = {s["load_step"]: d for s, d in zip(res["scope"], res["details"])}
    # a dip (load increase) cut at the bottom: the true deviation is below the stored negative one
    assert by_step["increase"]["flags"] == ["clipped", "upper_bound"]
    assert by_step["decrease"]["flags"] == ["clipped", "lower_bound"]
    worst = _result(benchctl_store, cut.run_id, "max_abs_transient_deviation_v")["details"].iloc[0]
    assert worst["flags"] == ["clipped", "lower_bound"]
