"""over_current end to end on the protected simulated bench against the model's OCP threshold."""

from __future__ import annotations

import pytest

from benchctl.procedure import load_procedure
from benchctl.runner import execute


# time scale 1 with the default 20 ms readings (realistic), and accelerated
@pytest.mark.parametrize("time_scale, reading_time_s", [(1.0, None), (20.0, 0.002)])
def test_ocp_threshold_within_the_bisection_resolution(protected_bench, check_protection_run, station_for,
                                                       benchctl_store, tmp_path,
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
        check_protection_run(out.run_id, proc.name, "over-current")


def test_without_the_envelope_the_interlock_refuses_the_ramp(protected_bench, station_for, benchctl_store):
    # the same ramp with no envelope declared: the interlock refuses a setpoint past load_current_max_a
    import dataclasses

    bench = protected_bench(20.0)
    proc = dataclasses.replace(load_procedure("over_current"), test_envelope=None)
    out = execute(proc, proc.resolve_parameters(values={}), station_for(bench), benchctl_store)
    assert out.status != "completed"
    assert "load_current_max_a" in (out.message or "")
