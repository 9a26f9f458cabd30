"""over_current end to end on the protected simulated bench against the model's OCP threshold."""

from __future__ import annotations

import pytest

from benchctl.procedure import load_procedure
from benchctl.runner import execute
from benchctl.simulated_instruments.bench import SimulatedBench


@pytest.fixture
def protected_bench():
    started: list[SimulatedBench] = []

    def start(time_scale: float, reading_time_s: float | None = 0.002) -> SimulatedBench:
        bench = SimulatedBench(time_scale=time_scale, dut_protection=True, reading_time_s=reading_time_s).start()
        started.append(bench)
        return bench

    yield start
    for bench in started:
        bench.stop()


# time scale 1 with the default 20 ms readings (realistic), and accelerated
@pytest.mark.parametrize("time_scale, reading_time_s", [(1.0, None), (20.0, 0.002)])
def test_ocp_threshold_within_the_bisection_resolution(protected_bench, station_for, benchctl_store, tmp_path,
                                                       time_scale, reading_time_s):
    bench = protected_bench(time_scale, reading_time_s)
    proc = load_procedure("over_current")
    params = proc.resolve_parameters(values={})
    out = execute(proc, params, station_for(bench), benchctl_store)
    assert out.status == "completed", out.message
    pts = benchctl_store.points(out.run_id)
    row = pts[pts["tag"] == "threshold"].iloc[-1]
    truth = bench.design.protection.current_limit_a      # the model's OCP threshold (exact, no tolerance)
    half = float(row["ocp_half_width_a"])
    assert half <= 0.5 * params.resolution_a
    # Bisection keeps the threshold inside its final bracket (Burden & Faires §2.1): |found − truth| ≤ half
    # the bracket. The simulated load sinks its setpoint exactly, so no further allowance (1e-9 for rounding).
    assert abs(float(row["ocp_threshold_a"]) - truth) <= half + 1e-9
    # the ramp crossed the rating: regulated at the last step below, limited at the first above
    ramp = pts[pts["tag"] == "ramp"]
    assert ramp["limited"].iloc[-1] == 1.0 and (ramp["limited"].iloc[:-1] == 0.0).all()
    assert ramp["iout_set_a"].iloc[-1] > bench.design.iout_rated_a
    res = benchctl_store.results(out.run_id).set_index("name")
    assert res.loc["ocp_threshold_a", "value"] == pytest.approx(float(row["ocp_threshold_a"]))
    assert "test_envelope" in set(benchctl_store.events(out.run_id)["kind"])
    if time_scale > 1.0:        # the report draws the procedure's plot (once: the accelerated run)
        from benchctl.report import build_report

        report = build_report(benchctl_store, out.run_id, tmp_path / "report")
        assert sum("over-current" in p.name for p in report.png_paths) == 1, (report.png_paths, report.notes)
        # the bundled protection limits pass the model's protection (its figures are inside them)
        from benchctl.cli import EXIT_OK
        from benchctl.commands.check import load_run_data
        from benchctl.limits import check_limits, load_limits
        from benchctl.procedure import procedures_dir

        limits = load_limits(procedures_dir() / "limits" / "flyback-48v-5v-protection.toml")
        checked = check_limits(limits, load_run_data(benchctl_store, out.run_id))
        assert checked.exit_code == EXIT_OK, checked.summary
        assert checked.outcomes and all(o.limit.applies_to(proc.name) for o in checked.outcomes)


def test_without_the_envelope_the_interlock_refuses_the_ramp(protected_bench, station_for, benchctl_store):
    # the same ramp with no envelope declared: the interlock refuses a setpoint past load_current_max_a
    import dataclasses

    bench = protected_bench(20.0)
    proc = dataclasses.replace(load_procedure("over_current"), test_envelope=None)
    out = execute(proc, proc.resolve_parameters(values={}), station_for(bench), benchctl_store)
    assert out.status != "completed"
    assert "load_current_max_a" in (out.message or "")
