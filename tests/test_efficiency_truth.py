"""efficiency_map end to end against the simulator's own truth, at a realistic and an accelerated clock.

Every recorded point is compared with ``ConverterModel.steady_state`` at the same line voltage
(the true voltage at the DUT's input terminals) and load setpoint, taken the moment the point
is committed (so with thermal drift on, at the parts' temperature of that moment). Required,
per point (the accuracy a test engineer signs; common practice for a bench efficiency map):

* efficiency at >= 10 % load within 0.15 %-points of the truth;
* load current within 0.5 % of its setpoint;
* no-load input power within 5 % of the truth;
* every point settled and verified (``settled`` True, no reason);
* three consecutive runs give every point's efficiency within 0.1 %-points of each other.

The realistic clock is time scale 1 with readings that integrate over one 50 Hz line cycle
(20 ms), as a bench DC power meter does; a fast model clock hides a procedure that records
too early. To stay within CI's time budget the realistic-clock runs sweep two line voltages
(the design's lowest and highest) and four loads (0, 10, 50, 100 %) instead of the
procedure's full default map, and only the flyback is run three times there; the
accelerated runs (time scale 50, fast readings) sweep the default ten loads at the same two
line voltages, three runs for each design.

With thermal drift on, the consecutive-run check is not made: each run starts where the last
one left the parts' temperature, so their efficiencies differ by the true warming (the truth
follows it, and each run is still compared with it).
"""

from __future__ import annotations

import inspect
import itertools

import numpy as np
import pytest

from benchctl.procedure import load_procedure
from benchctl.runner import execute

REALISTIC_READING_S = 0.02  # one 50 Hz line cycle
REALISTIC_LOADS_PCT = [0.0, 10.0, 50.0, 100.0]
EFFICIENCY_TOL = 0.0015  # 0.15 %-points
LOAD_CURRENT_REL_TOL = 0.005  # 0.5 % of the setpoint
NO_LOAD_POWER_REL_TOL = 0.05  # 5 %
RUN_TO_RUN_TOL = 0.001  # 0.1 %-points


@pytest.fixture(scope="module")
def emap():
    return load_procedure("efficiency_map")


def _start(simulated_bench, model, *, time_scale, thermal_drift, reading_time_s=None):
    from benchctl.simulated_instruments.bench import SimulatedBench

    accepted = inspect.signature(SimulatedBench.__init__).parameters
    if thermal_drift and "thermal_drift" not in accepted:
        pytest.skip("this simulator has no thermal drift")
    kwargs = {"time_scale": time_scale}
    if "thermal_drift" in accepted:
        kwargs["thermal_drift"] = thermal_drift
    if reading_time_s is not None and "reading_time_s" in inspect.signature(simulated_bench).parameters:
        kwargs["reading_time_s"] = reading_time_s
    return simulated_bench(model, **kwargs)


def _run(emap, bench, station, store, values):
    """One efficiency_map run; returns (points, truth per plan index at the moment each point was committed, run id)."""
    truths = {}

    def progress(done, total, last):
        if last and "plan_index" in last:
            k = int(last["plan_index"])
            if k not in truths:  # the first report of a point comes right after it is committed
                vin_true = bench.model.terminals().input_v
                truths[k] = bench.model.steady_state(vin_true, "CC", last["iout_set_a"], was_running=True)

    params = emap.resolve_parameters(values={**bench.procedure_parameters(), **values})
    outcome = execute(emap, params, station, store, progress=progress)
    assert outcome.status == "completed", outcome.message
    points = store.points(outcome.run_id)
    assert len(points) == len(emap.module.plan(params)) and len(truths) == len(points)
    return points, truths, outcome.run_id


def _check_against_truth(points, truths, iout_rated_a):
    worst = {"efficiency_pp": 0.0, "load_current_rel": 0.0, "no_load_power_rel": 0.0}
    for _, row in points.iterrows():
        truth = truths[int(row["plan_index"])]
        where = f"{row['vin_set_v']:g} V, {row['iout_set_a']:g} A"
        assert row["settled"], f"{where}: not settled: {row['settle_reason']}"
        info = row["settle_info"]
        assert info["method"] == "exponential_fit" and info["verified"] is True, (where, info)
        assert row["n_readings"] >= 2 and np.isfinite(row["pin_sd_w"]) and np.isfinite(row["pout_sd_w"])
        iset = row["iout_set_a"]
        if iset >= 0.1 * iout_rated_a - 1e-12:
            err = row["pout_w"] / row["pin_w"] - truth.pout_w / truth.pin_w
            worst["efficiency_pp"] = max(worst["efficiency_pp"], abs(err) * 100)
            assert abs(err) <= EFFICIENCY_TOL, f"{where}: efficiency off by {err * 100:+.3f} %-points"
        if iset > 0:
            rel = abs(row["iout_a"] - iset) / iset
            worst["load_current_rel"] = max(worst["load_current_rel"], rel)
            assert rel <= LOAD_CURRENT_REL_TOL, f"{where}: load current {row['iout_a']:.5g} A"
        else:
            rel = abs(row["pin_w"] / truth.pin_w - 1.0)
            worst["no_load_power_rel"] = max(worst["no_load_power_rel"], rel)
            assert rel <= NO_LOAD_POWER_REL_TOL, f"{where}: no-load input power {row['pin_w']:.5g} W, " \
                                                 f"true {truth.pin_w:.5g} W"
    return worst


def _efficiencies(points):
    loaded = points[points["iout_set_a"] > 0]
    return {(r["vin_set_v"], r["iout_set_a"], r["tag"]): r["pout_w"] / r["pin_w"] for _, r in loaded.iterrows()}


def _check_runs_agree(runs):
    spread = 0.0
    for a, b in itertools.combinations(runs, 2):
        ea, eb = _efficiencies(a), _efficiencies(b)
        assert ea.keys() == eb.keys()
        for key in ea:
            spread = max(spread, abs(ea[key] - eb[key]))
            assert abs(ea[key] - eb[key]) <= RUN_TO_RUN_TOL, f"{key}: runs differ by {(ea[key] - eb[key]) * 100:+.3f} %-points"
    return spread


@pytest.mark.parametrize("model", ["flyback-48v-5v", "buck-12v-1v2"])
def test_realistic_clock_every_point_matches_the_truth_runs_agree(model, emap, simulated_bench, station_for,
                                                                       benchctl_store):
    bench = _start(simulated_bench, model, time_scale=1.0, thermal_drift=False, reading_time_s=REALISTIC_READING_S)
    station = station_for(bench)
    d = bench.design
    values = {"vin_v": [d.vin_min_v, d.vin_max_v], "load_pct": REALISTIC_LOADS_PCT}
    runs = []
    for _ in range(3 if model == "flyback-48v-5v" else 1):  # the buck's three runs: at the accelerated clock
        points, truths, _ = _run(emap, bench, station, benchctl_store, values)
        _check_against_truth(points, truths, d.iout_rated_a)
        runs.append(points)
    _check_runs_agree(runs)


@pytest.mark.parametrize("model", ["flyback-48v-5v", "buck-12v-1v2"])
def test_realistic_clock_with_thermal_drift_matches_the_truth(model, emap, simulated_bench, station_for,
                                                              benchctl_store):
    bench = _start(simulated_bench, model, time_scale=1.0, thermal_drift=True, reading_time_s=REALISTIC_READING_S)
    station = station_for(bench)
    d = bench.design
    points, truths, _ = _run(emap, bench, station, benchctl_store,
                          {"vin_v": [d.vin_min_v, d.vin_max_v], "load_pct": REALISTIC_LOADS_PCT})
    _check_against_truth(points, truths, d.iout_rated_a)


@pytest.mark.parametrize("thermal_drift", [False, True], ids=["drift off", "drift on"])
@pytest.mark.parametrize("model", ["flyback-48v-5v", "buck-12v-1v2"])
def test_accelerated_clock_every_load_matches_the_truth(model, thermal_drift, emap, simulated_bench, station_for,
                                                      benchctl_store):
    bench = _start(simulated_bench, model, time_scale=50.0, thermal_drift=thermal_drift)
    station = station_for(bench)
    d = bench.design
    runs = []
    for _ in range(1 if thermal_drift else 3):
        points, truths, _ = _run(emap, bench, station, benchctl_store, {"vin_v": [d.vin_min_v, d.vin_max_v]})
        _check_against_truth(points, truths, bench.design.iout_rated_a)
        runs.append(points)
    if not thermal_drift:
        _check_runs_agree(runs)


def test_drift_criterion_and_warm_up_when_asked(emap, simulated_bench, station_for, benchctl_store):
    """With drift_window_s and warmup_s the map warms the parts at full load, then at each point waits
    until the input power's regression change over the window is within the limit (IEC 62301:2011 5.3
    style, from memory); points still match the truth at the parts' temperature of the moment."""
    bench = _start(simulated_bench, "flyback-48v-5v", time_scale=50.0, thermal_drift=True)
    station = station_for(bench)
    t_before = bench.model.temperature_c()
    values = {"vin_v": [48.0], "load_pct": [0.0, 50.0, 100.0], "warmup_s": 1.0, "drift_window_s": 0.2,
              "drift_max_change_rel": 1e-3}
    points, truths, run_id = _run(emap, bench, station, benchctl_store, values)
    _check_against_truth(points, truths, bench.design.iout_rated_a)
    assert bench.model.temperature_c() > t_before  # the warm-up and the run warmed the parts
    for info in points["settle_info"]:
        drift = info["drift"]
        assert drift["stable"] is True and drift["change"] <= drift["limit"] and drift["window_s"] >= 0.2
    events = benchctl_store.events(run_id)
    warm = events[events["kind"] == "warm_up"]
    assert len(warm) == 1 and "then stable" in warm.iloc[0]["message"]
