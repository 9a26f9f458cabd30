"""cross_regulation end to end on the two-output flyback (load, load2, output_meter, output2_meter)."""

from __future__ import annotations

import pytest

from benchctl.commands.check import load_run_data
from benchctl.exit_codes import EXIT_OK
from benchctl.limits import check_limits, load_limits
from benchctl.procedure import load_procedure, procedures_dir
from benchctl.report import build_report
from benchctl.runner import execute
from benchctl.simulated_instruments.converter import ConverterModel, ManualClock
from benchctl.simulated_instruments.converter.designs import SECOND_OUTPUTS
from benchctl.simulated_instruments.converter.second_output import SecondOutput
from benchctl.simulated_instruments.instruments import SimulatedPowerMeter

LIMIT_A = 1.389     # the simulated flyback station's source_current_max_a
MODEL = "flyback-48v-5v-3v3"


def _accuracy_v(v: float) -> float:
    """The output meters' documented voltage accuracy on the 10 V range: ±(0.01 % + 0.5 mV)."""
    r = SimulatedPowerMeter.ACCURACY["voltage"].ranges[0]
    assert r.range_max == 10.0
    return r.limit(v)


def _truth(bench, vin, i1, i2):
    """(V1, V2) of a fresh model at the same settings: the main's terminals and the second output."""
    model = ConverterModel(bench.design, clock=ManualClock(), seed=0)
    second = SecondOutput(model, SECOND_OUTPUTS[MODEL])
    model.set_source(vin, LIMIT_A, True)
    model.set_load("CC", i1, True)
    second.set_load("CC", i2, True)
    return model.operating_point().vout_v, second.steady_state()[0]


def _check_against_truth(store, run_id, bench):
    pts = store.points(run_id)
    truth = {}
    for _, r in pts.iterrows():
        v1, v2 = _truth(bench, r["vin_set_v"], r["iout1_set_a"], r["iout2_set_a"])
        truth[(r["vin_set_v"], r["iout1_set_a"], r["iout2_set_a"])] = (v1, v2)
        # each reading inside its meter's documented accuracy of the model's value
        assert r["vout1_v"] == pytest.approx(v1, abs=_accuracy_v(v1))
        assert r["vout2_v"] == pytest.approx(v2, abs=_accuracy_v(v2))
        assert bool(r["settled"])
    res = store.results(run_id)
    for vin in sorted(pts["vin_set_v"].unique()):
        for k, own_levels, other_levels in ((1, (0.5, 5.0), (0.1, 1.5)), (2, (0.1, 1.5), (0.5, 5.0))):
            # the model's cross change of output k at each of its own levels; the worst by magnitude
            changes = []
            for own in own_levels:
                key = (lambda other: (vin, own, other)) if k == 1 else (lambda other: (vin, other, own))
                lo, hi = truth[key(other_levels[0])][k - 1], truth[key(other_levels[1])][k - 1]
                changes.append(hi - lo)
            expect = max(changes, key=abs)
            row = res[(res["name"] == f"cross_regulation_out{k}_v")
                      & res["scope"].apply(lambda s: s == {"vin_set_v": vin, "output": k})].iloc[0]
            # a difference of two readings: within the sum of their accuracies
            v_nom = truth[(vin, 0.5, 0.1)][k - 1]
            assert row["value"] == pytest.approx(expect, abs=2 * _accuracy_v(v_nom))
    return pts, res


def test_cross_regulation_matches_the_model(simulated_bench, station_for, benchctl_store, tmp_path):
    bench = simulated_bench(MODEL, time_scale=50.0)
    assert {"load2", "output2_meter"} <= set(bench.instruments)
    proc = load_procedure("cross_regulation")
    params = proc.resolve_parameters(values={"source_current_limit_a": LIMIT_A})
    out = execute(proc, params, station_for(bench), benchctl_store)
    assert out.status == "completed", out.message
    pts, res = _check_against_truth(benchctl_store, out.run_id, bench)
    assert len(pts) == 12
    # the second output really is cross-regulated (a few %), the main only by its finite loop gain
    worst2 = res[res["name"] == "worst_cross_regulation_out2_pct"].iloc[0]
    assert 2.0 < worst2["value"] < 6.0 and worst2["unit"] == "%"
    worst1 = res[res["name"] == "worst_cross_regulation_out1_pct"].iloc[0]
    assert abs(worst1["value"]) < 0.1
    report = build_report(benchctl_store, out.run_id, tmp_path / "report")
    assert any("cross-regulation" in p.name for p in report.png_paths), (report.png_paths, report.notes)
    limits = load_limits(procedures_dir() / "limits" / "flyback-48v-5v-outputs.toml")
    checked = check_limits(limits, load_run_data(benchctl_store, out.run_id))
    assert len({o.limit.quantity for o in checked.outcomes}) == 4
    assert checked.exit_code == EXIT_OK, checked.summary


def test_cross_regulation_at_time_scale_one(simulated_bench, station_for, benchctl_store):
    # Real time, realistic reading time (20 ms, one 50 Hz line cycle), one line voltage.
    bench = simulated_bench(MODEL, time_scale=1.0, reading_time_s=0.02)
    proc = load_procedure("cross_regulation")
    params = proc.resolve_parameters(values={"vin_v": [48.0], "n_readings": 2, "source_current_limit_a": LIMIT_A})
    out = execute(proc, params, station_for(bench), benchctl_store)
    assert out.status == "completed", out.message
    pts, _ = _check_against_truth(benchctl_store, out.run_id, bench)
    assert len(pts) == 4
