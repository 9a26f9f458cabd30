"""The loop-gain procedure end to end through the simulated analyzer, over real sockets."""

from __future__ import annotations

import numpy as np
import pytest

from benchctl.procedure import load_procedure
from benchctl.runner import execute
from benchctl.simulated_instruments.converter import ConverterModel, ManualClock


@pytest.fixture(scope="module")
def proc():
    return load_procedure("loop_gain")


def _params(proc, bench, **values):
    base = bench.procedure_parameters()
    return proc.resolve_parameters(values={**base, **values})


def _truth(bench, params, vin_v, iout_a):
    """The model's exact margins at the same source and load settings (a fresh model)."""
    model = ConverterModel(bench.design, clock=ManualClock(), seed=0)
    model.set_source(vin_v, params.source_current_limit_a, True)
    model.set_load("CC", iout_a, True)
    return model


def _results(store, run_id, name):
    res = store.results(run_id)
    return res[res["name"] == name]


@pytest.mark.parametrize("time_scale, reading_time_s, sweep", [
    (200.0, 1e-4, {}),
    # the realistic clock: 20 ms meter readings and the analyzer integrating in wall time (1/bandwidth a
    # point: 10 ms at 100 Hz, so 61 points from 100 Hz take under a second per corner)
    (1.0, 0.02, {"start_hz": 100.0, "points": 61, "bandwidth_hz": 100.0}),
], ids=["accelerated", "realistic clock"])
def test_margins_at_the_corners_agree_with_the_model(proc, simulated_bench, station_for, benchctl_store,
                                                     time_scale, reading_time_s, sweep):
    bench = simulated_bench("flyback-48v-5v", time_scale=time_scale, reading_time_s=reading_time_s)
    params = _params(proc, bench, **sweep)
    outcome = execute(proc, params, station_for(bench), benchctl_store)
    assert outcome.status == "completed", outcome.message
    points = benchctl_store.points(outcome.run_id)
    assert list(points["tag"]) == ["corner"] * 4 + ["nominal"]
    # Corners of the line x load envelope (lowest/highest line, lightest/heaviest load) and nominal.
    assert {(r.vin_set_v, r.iout_set_a) for r in points.itertuples()} == {
        (36.0, 1.0), (36.0, 5.0), (75.0, 1.0), (75.0, 5.0), (48.0, 2.5)}

    pm = _results(benchctl_store, outcome.run_id, "phase_margin_deg")
    fc = _results(benchctl_store, outcome.run_id, "crossover_hz")
    gm = _results(benchctl_store, outcome.run_id, "gain_margin_db")
    for row in points.itertuples():
        truth = _truth(bench, params, row.vin_set_v, row.iout_set_a).loop_truth()
        scope = {"vin_set_v": row.vin_set_v, "iout_set_a": row.iout_set_a}
        pick = lambda frame: frame[frame["scope"] == scope].iloc[0]  # noqa: E731
        # Erickson & Maksimovic 2nd ed. ch. 9 definitions; truth = exact roots of the model's T(s).
        assert pick(fc)["value"] == pytest.approx(truth.crossover_hz, rel=0.03)
        p_m = pick(pm)
        assert p_m["value"] == pytest.approx(truth.phase_margin_deg, abs=2.0)
        # Each margin states its own uncertainty from the trace's scatter (JCGM 100:2008, checked by Monte Carlo
        # in test_margin_uncertainty.py); the truth lies within it, plus 0.3 for the linear interpolation.
        assert abs(p_m["value"] - truth.phase_margin_deg) <= p_m["expanded_uncertainty"] + 0.3
        g = pick(gm)
        if truth.gain_margin_db is None or truth.phase_crossover_hz > row.band_max_hz:
            # Not found in the measured band: None, with the reason stated.
            assert g["value"] is None or np.isnan(g["value"])
            assert "no phase crossover" in g["details"]["reason"]
        else:
            # Read where |T| is small, so the noisiest margin: with a 100 Hz bandwidth the 36 V / 1 A gain
            # margin is 2 dB off, and its U says so (2.7 dB) instead of looking like a good number.
            assert abs(g["value"] - truth.gain_margin_db) <= g["expanded_uncertainty"] + 0.3
            if not sweep:  # the procedure's default sweep (10 Hz bandwidth): within 1 dB as well
                assert g["value"] == pytest.approx(truth.gain_margin_db, abs=1.0)

    # Worst over the envelope is the smallest of the per-point phase margins.
    worst = _results(benchctl_store, outcome.run_id, "worst_phase_margin_deg").iloc[0]
    assert worst["value"] == pytest.approx(pm["value"].min())
    # Each point has its Bode trace linked, with the operating point and convention in meta.
    arrays = benchctl_store.arrays(outcome.run_id)
    assert len(arrays[arrays["name"] == "bode"]) == 5
    first = benchctl_store.array(outcome.run_id, "bode", int(points["seq"].iloc[0]))
    assert set(first) == {"freq_hz", "gain_db", "phase_deg", "re", "im"}
    assert first.meta["phase_convention"] == "loop" and first.meta["vin_set_v"] == 36.0
    assert first.units["freq_hz"] == "Hz" and first.units["gain_db"] == "dB"


def test_inverted_convention_is_stored_and_margins_are_unchanged(proc, simulated_bench, station_for,
                                                                 benchctl_store):
    bench = simulated_bench("flyback-48v-5v", time_scale=200.0)
    params = _params(proc, bench, point_vin_v=[48.0], point_iout_a=[2.5], phase_convention="inverted")
    outcome = execute(proc, params, station_for(bench), benchctl_store)
    assert outcome.status == "completed", outcome.message
    seq = int(benchctl_store.points(outcome.run_id)["seq"].iloc[0])
    arr = benchctl_store.array(outcome.run_id, "bode", seq)
    assert arr.meta["phase_convention"] == "inverted"
    model = _truth(bench, params, 48.0, 2.5)
    h = arr["re"] + 1j * arr["im"]
    # The analyzer reported -T (inverting stage's 180 deg; common practice).
    assert np.median(np.abs(h / -model.loop_gain(arr["freq_hz"]) - 1.0)) < 0.02
    pm = _results(benchctl_store, outcome.run_id, "phase_margin_deg").iloc[0]
    assert pm["value"] == pytest.approx(model.loop_truth().phase_margin_deg, abs=2.0)
    assert pm["details"]["phase_convention"] == "inverted"


@pytest.mark.parametrize("injection_v, verdict", [(0.01, "ok"), (3e-4, "too_small"), (0.6, "too_large")])
def test_injection_check_detects_too_small_and_too_large(proc, simulated_bench, station_for, benchctl_store,
                                                         injection_v, verdict):
    # Rule of thumb (common practice, PRACTICE in benchctl.references): an injection small enough that
    # halving or doubling it changes nothing. Too small: noise moves the margins; too
    # large: the modulator saturates and the gain above crossover is compressed.
    bench = simulated_bench("flyback-48v-5v", time_scale=200.0)
    params = _params(proc, bench, point_vin_v=[48.0], point_iout_a=[2.5], injection_v=injection_v,
                     injection_check=True)
    outcome = execute(proc, params, station_for(bench), benchctl_store)
    assert outcome.status == "completed", outcome.message
    check = _results(benchctl_store, outcome.run_id, "injection_check").iloc[0]
    assert check["details"]["verdict"] == verdict
    assert check["details"]["flagged"] is (verdict != "ok")
    events = benchctl_store.events(outcome.run_id)
    msgs = " ".join(events["message"])
    assert f"injection check at 48 V, 2.5 A: {verdict}" in msgs
    tags = list(benchctl_store.points(outcome.run_id)["tag"])
    assert tags == ["point", "injection_half", "injection_double"]
    if verdict == "too_large":
        assert check["details"]["double"]["injection_v"] == pytest.approx(1.2)  # 2x, at the guard's cap
