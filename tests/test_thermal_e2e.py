"""Temperature meter, thermal chamber and the temperature procedures end to end on the simulated bench,
against the model's truth."""

from __future__ import annotations

import pytest

from benchctl.errors import SetpointRefused
from benchctl.procedure import load_procedure
from benchctl.runner import execute
from benchctl.simulated_instruments.bench import SimulatedBench
from benchctl.simulated_instruments.converter.component_thermal import component_losses, network_for
from benchctl.simulated_instruments.converter.operating_point import LoadSetting, solve_dut
from benchctl.station import load_station


@pytest.fixture
def thermal_bench():
    started = []

    def start(model="flyback-48v-5v", *, time_scale=1.0, thermal_drift=None, reading_time_s=1e-4):
        bench = SimulatedBench(model, time_scale=time_scale, thermal=True, thermal_drift=thermal_drift,
                               reading_time_s=reading_time_s).start()
        started.append(bench)
        return bench

    yield start
    for bench in started:
        bench.stop()


def _station(bench, tmp_path):
    path = bench.write_station(tmp_path / "thermal-station.toml")
    # These tests are about the thermal figures, not the watch's timing: a thermal model at 1000x is
    # compute-bound (a steady state per 0.05 K of warming), and on a starved 2-core machine the simulated
    # instruments (in this test process) can miss a few watch periods, which would trip the run first.
    path.write_text(path.read_text().replace("watch_period_s = ", "watch_missed_periods = 20\nwatch_period_s = ", 1))
    return load_station(path)


def test_temperature_meter_reads_the_truth_at_time_scale_1(thermal_bench, tmp_path):
    # time scale 1, the default 20 ms reading time: each channel against the model's own temperature
    bench = thermal_bench(time_scale=1.0, reading_time_s=0.02)
    station = _station(bench, tmp_path)
    meter = station.instruments["temp_meter"].create().open()
    try:
        assert meter.channels() == ("ambient", "switch", "rectifier", "transformer")
        sim = bench.instruments["temp_meter"]
        bench.model.set_load("CC", 4.0, True)
        bench.model.set_source(48.0, 2.0, True)
        for _ in range(3):                       # a few seconds of warming (the switch moves ~0.1 K/s)
            for channel in meter.channels():
                before = sim.true_temperature_c(channel)
                value = meter.measure_temperature(channel)
                after = sim.true_temperature_c(channel)
                # documented accuracy ±0.5 °C (the simulator keeps every reading within 0.6 of it) plus
                # the truth's own move over the exchange (bracketed by before and after)
                assert min(before, after) - 0.3 <= value <= max(before, after) + 0.3, channel
    finally:
        meter.close()


def test_chamber_setpoint_outside_the_station_limits_is_refused(thermal_bench, tmp_path):
    from benchctl.guarded import guard
    from benchctl.interlock import Interlock

    bench = thermal_bench(time_scale=100.0)
    station = _station(bench, tmp_path)
    driver = station.instruments["chamber"].create().open()
    try:
        chamber = guard(driver, Interlock(station.limits))
        with pytest.raises(SetpointRefused, match="chamber_temperature_max_c"):
            chamber.set_setpoint(130.0)
        with pytest.raises(SetpointRefused, match="chamber_temperature_min_c"):
            chamber.set_setpoint(-55.0)
        with pytest.raises(SetpointRefused, match="chamber_ramp_max_k_per_min"):
            chamber.set_ramp_rate(15.0)
        assert bench.instruments["chamber"].air.setpoint_c == 25.0      # nothing was sent
        chamber.set_setpoint(40.0)
        assert bench.instruments["chamber"].air.setpoint_c == 40.0
    finally:
        driver.close()
    no_limits = station.limits.__class__(**{**station.limits.__dict__, "chamber_temperature_max_c": None})
    with pytest.raises(SetpointRefused, match="declare limits.chamber_temperature_min_c"):
        guard(station.instruments["chamber"].create(), Interlock(no_limits)).set_setpoint(30.0)


def _equilibrium(design, vin_v: float, iout_a: float, ambient_c: float):
    """The model's thermal equilibrium at a load: lumped T = T_amb + R·P_loss(T) by fixed point, then each
    part at T_amb + R_k·P_k (the steady state of C·dT/dt = P − (T − T_amb)/R)."""
    temp = ambient_c
    for _ in range(60):
        op = solve_dut(design.at_temperature(temp), vin_v, LoadSetting("CC", iout_a, True), was_running=True)
        temp = ambient_c + design.thermal.r_th_k_per_w * op.loss_w
    parts = component_losses(design.at_temperature(temp), op)
    return op, {n.name: ambient_c + n.r_th_k_per_w * parts[n.name] for n in network_for(design)}


def _fast(scale: float) -> dict:
    """Real-bench durations scaled to the model clock (the thermal time constants are minutes)."""
    return dict(soak_time_s=300 / scale, poll_s=5 / scale, stable_window_s=240 / scale, stable_max_change_k=0.1,
                stable_timeout_s=7200 / scale, chamber_timeout_s=7200 / scale, sample_interval_s=4 / scale,
                ramp_k_per_min=5.0)


def test_thermal_efficiency_matches_the_model_at_each_ambient(thermal_bench, tmp_path, benchctl_store):
    scale = 1000.0
    bench = thermal_bench(time_scale=scale)
    proc = load_procedure("thermal_efficiency")
    params = proc.resolve_parameters(values={"ambient_c": [25.0, 70.0], "vin_v": [48.0], "iout_a": [2.0, 5.0],
                                             **_fast(scale)})
    out = execute(proc, params, _station(bench, tmp_path), benchctl_store)
    assert out.status == "completed", out.message
    pts = benchctl_store.points(out.run_id)
    assert len(pts) == 4 and pts["settled"].all()
    assert pts.columns.str.endswith("_c").sum() >= 5
    for _, row in pts.iterrows():
        op, parts = _equilibrium(bench.design, float(row["vin_v"]), float(row["iout_a"]), float(row["ambient_set_c"]))
        # efficiency: meters ±0.02 % of reading each, and the residual of thermal equilibrium (0.1 K per 240 s
        # window leaves < 0.3 K on the slowest part; the loss moves ~0.2 %/K of itself): 0.1 points
        assert row["pout_w"] / row["pin_w"] == pytest.approx(op.efficiency, abs=1e-3)
        for name, truth in parts.items():
            # ±0.5 °C meter (within 0.3 °C as simulated) + that residual (< 0.3 K): 0.8 K
            assert row[f"t_{name}_c"] == pytest.approx(truth, abs=0.8), name
        assert row["chamber_air_c"] == pytest.approx(row["ambient_set_c"], abs=0.5)   # ±0.3 °C sensor
    res = benchctl_store.results(out.run_id)
    assert {"efficiency", "load_regulation_pct", "efficiency_change_pct", "hot_spot_c"} <= set(res["name"])
    # the station's accuracy gives both their uncertainty: the meters' (efficiency, as in efficiency_map) and
    # the ±0.5 °C thermocouple's (hot spot: 2·0.5/√3 = 0.577 °C, GUM 4.3.7)
    eff_u = res[res["name"] == "efficiency"]["expanded_uncertainty"]
    assert eff_u.notna().all() and (eff_u > 0).all() and (eff_u < 2e-3).all()
    assert res[res["name"] == "hot_spot_c"]["expanded_uncertainty"].to_numpy() == pytest.approx(0.5774, abs=1e-3)
    change = res[res["name"] == "efficiency_change_pct"]["value"].to_numpy()
    assert (change < 0).all()            # the on-resistances rise with temperature: less efficient when hot
    assert bench.instruments["chamber"].air.setpoint_c == 25.0 and not bench.instruments["chamber"].air.running


def test_temperature_rise_and_derating_against_the_model(thermal_bench, tmp_path, benchctl_store):
    scale = 1000.0
    bench = thermal_bench(time_scale=scale, thermal_drift=False)   # constant losses: exact first-order nodes
    proc = load_procedure("temperature_rise")
    params = proc.resolve_parameters(values={"ambient_c": [25.0, 70.0], "vin_v": 48.0, "iout_a": [1.0, 3.0, 5.0],
                                             "hot_spot_limit_c": 105.0, **_fast(scale)})
    out = execute(proc, params, _station(bench, tmp_path), benchctl_store)
    assert out.status == "completed", out.message
    pts = benchctl_store.points(out.run_id)
    d = bench.design
    nodes = {n.name: n for n in network_for(d)}
    for _, row in pts.iterrows():
        op = solve_dut(d, 48.0, LoadSetting("CC", float(row["iout_a"]), True), was_running=True)
        parts = component_losses(d, op)
        for name, node in nodes.items():
            # rise = R_k·P_k at equilibrium: two ±0.5 °C channels (within 0.3 °C each as simulated), the
            # equilibrium residual (< 0.3 K) and the cable drop on Vin (< 0.1 % of the loss): 1.0 K
            assert row[f"rise_{name}_k"] == pytest.approx(node.r_th_k_per_w * parts[name], abs=1.0), name
    res = benchctl_store.results(out.run_id)
    derated = res[res["name"] == "derated_load_a"].set_index(res[res["name"] == "derated_load_a"]["scope"].map(
        lambda s: s["ambient_set_c"]))
    assert derated.loc[25.0, "details"]["flags"][-1] == "not_reached"     # 72 °C at 5 A: under 105 °C
    # at 70 °C the rectifier limits: the truth by the same interpolation of the model's equilibrium temperatures
    rect = nodes["rectifier"]
    temps = [70.0 + rect.r_th_k_per_w * component_losses(d, solve_dut(d, 48.0, LoadSetting("CC", i, True),
                                                                         was_running=True))["rectifier"]
             for i in (3.0, 5.0)]
    expect = 3.0 + (105.0 - temps[0]) * 2.0 / (temps[1] - temps[0])
    assert derated.loc[70.0, "details"]["limiting_part"] == "rectifier"
    # the measured temperatures carry ±0.8 K; over a 21 K bracket of 2 A that is ±0.08 A
    assert derated.loc[70.0, "value"] == pytest.approx(expect, abs=0.1)
    # Its uncertainty from the station's ±0.5 °C (rectangular, GUM 4.3.7): the rectifier's fixed error over
    # the slope, U = 2 · (0.5/√3) · 2 A / (T(5 A) − T(3 A)); the truth within it plus the equilibrium residual
    # (< 0.3 K over the slope).
    slope_k_per_a = (temps[1] - temps[0]) / 2.0
    u_derated = derated.loc[70.0, "expanded_uncertainty"]
    assert u_derated == pytest.approx(2 * 0.5 / 3 ** 0.5 / slope_k_per_a, rel=0.05)
    assert abs(derated.loc[70.0, "value"] - expect) <= u_derated + 0.3 / slope_k_per_a
    rises = res[res["name"].str.startswith("rise_")]
    # two independent ±0.5 °C thermocouples (GUM 5.1.2): U = 2·√2·0.5/√3 = 0.8165 K on every rise
    assert len(rises) == 3 * len(pts) and rises["expanded_uncertainty"].to_numpy() == pytest.approx(0.8165, abs=1e-3)
    assert res[res["name"].str.match(r"t_.*_c")]["expanded_uncertainty"].to_numpy() == pytest.approx(0.5774, abs=1e-3)


def test_warm_up_time_constants_against_the_nodes(thermal_bench, tmp_path, benchctl_store):
    """The fitted warm-up τ of each part against its node's R·C. At 100× (not 1000×) so that a part's
    τ of a minute is 0.6 s of wall clock, many readings long even on a starved machine."""
    scale = 100.0
    bench = thermal_bench(time_scale=scale, thermal_drift=False)   # constant losses: exact first-order nodes
    proc = load_procedure("temperature_rise")
    params = proc.resolve_parameters(values={"ambient_c": [25.0], "vin_v": 48.0, "iout_a": [4.0],
                                             "hot_spot_limit_c": 150.0, **_fast(scale)})
    out = execute(proc, params, _station(bench, tmp_path), benchctl_store)
    assert out.status == "completed", out.message
    nodes = {n.name: n for n in network_for(bench.design)}
    res = benchctl_store.results(out.run_id)
    found = res[res["name"].str.startswith("tau_")].dropna(subset=["value"])
    assert len(found) == len(nodes)
    for _, r in found.iterrows():
        name = r["name"][4:-2]
        # the fitted warm-up τ against the node's R·C: wall-clock sampling of the model time (40 ms apart at
        # 100×, 4 model s) and the meter noise over a step of tens of K: 15 %
        assert r["value"] * scale == pytest.approx(nodes[name].tau_s, rel=0.15), (name, r["value"] * scale)


def _hot_spot_station(bench, tmp_path, limit_c):
    station = _station(bench, tmp_path)
    path = station.path
    path.write_text(path.read_text().replace("hot_spot_temperature_max_c = 150.0",
                                             f"hot_spot_temperature_max_c = {limit_c}"))
    return load_station(path)


@pytest.mark.parametrize("scale, reading_time_s, limit_c", [(1.0, 0.02, 26.5), (100.0, 1e-4, 55.0)])
def test_the_watch_trips_on_a_hot_spot_during_a_procedure_that_reads_no_temperature(
        thermal_bench, tmp_path, benchctl_store, scale, reading_time_s, limit_c):
    # efficiency_map declares no temperature meter; the station's hot-spot limit makes the interlock open the
    # station's meter anyway and read every hot spot each watch period. At 5 A the rectifier takes ~1.9 W into
    # 3.2 J/K (the model's node, 25 K/W): ~0.6 K/s at first, so 1.5 K above the 25 °C ambient is reached about
    # 3 s into a map that takes 6 s at time scale 1 (at 100x, 30 K in about 0.6 s of a 1 s map).
    bench = thermal_bench(time_scale=scale, reading_time_s=reading_time_s)
    station = _hot_spot_station(bench, tmp_path, limit_c)
    emap = load_procedure("efficiency_map")
    params = emap.resolve_parameters(values={**bench.procedure_parameters(),
                                             "vin_v": [36.0, 48.0, 60.0, 75.0], "load_pct": [100.0, 90.0, 80.0]})
    out = execute(emap, params, station, benchctl_store)
    assert out.status == "tripped", out.message
    trip = out.trip
    assert trip.limit == "hot_spot_temperature_max_c" and trip.instrument == "temp_meter"
    assert trip.value > limit_c and trip.limit_value == limit_c
    assert trip.shutdown[0].startswith("source off")   # the source first, then the load (as every trip)
    meter = bench.instruments["temp_meter"]
    assert any(c.startswith("MEAS:TEMP") for c in meter.audit.commands())
    for role, state in (("source", "output"), ("load", "input")):
        assert bench.instruments[role].audit.states(state)[-1].value is False
    off_at = bench.instruments["source"].audit.states("output")[-1].t_s
    assert off_at - trip.t_monotonic_s < 0.5           # off within the shutdown's deadline of the trip
    if scale == 1.0:
        # The truth just after: the hottest part within the meter's ±0.5 °C (0.3 as simulated) of the limit,
        # plus what it gained in one watch period (~0.6 K/s) and lost since (~0.04 K/s): the trip was not late.
        hottest = max(meter.true_temperature_c(label) for label in ("switch", "rectifier", "transformer"))
        assert limit_c - 0.3 <= hottest <= limit_c + 0.3 + 0.6 * station.watch_period_s + 0.1


def test_without_a_hot_spot_limit_a_procedure_without_temperatures_leaves_the_meter_closed(
        thermal_bench, tmp_path, benchctl_store):
    bench = thermal_bench(time_scale=100.0)
    station = _station(bench, tmp_path)
    path = station.path
    path.write_text(path.read_text().replace("hot_spot_temperature_max_c = 150.0\n", ""))
    station = load_station(path)
    assert station.limits.hot_spot_temperature_max_c is None
    emap = load_procedure("efficiency_map")
    params = emap.resolve_parameters(values={**bench.procedure_parameters(), "vin_v": [48.0], "load_pct": [50.0]})
    out = execute(emap, params, station, benchctl_store)
    assert out.status == "completed", out.message
    assert not bench.instruments["temp_meter"].audit.commands()
