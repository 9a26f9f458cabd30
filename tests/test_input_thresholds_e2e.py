"""input_thresholds end to end on the simulated bench against the model's UVLO design values."""

from __future__ import annotations

import pytest

from benchctl.exit_codes import EXIT_OK
from benchctl.limits import check_limits, load_limits
from benchctl.procedure import load_procedure, procedures_dir
from benchctl.commands.check import load_run_data
from benchctl.report import build_report
from benchctl.runner import execute


@pytest.mark.parametrize("time_scale, reading_time_s", [(5.0, 1e-4), (1.0, 0.02)],
                         ids=["accelerated", "realistic clock, 20 ms readings"])
def test_uvlo_on_off_and_hysteresis_within_the_bisection_resolution(simulated_bench, station_for, benchctl_store,
                                                                     tmp_path, time_scale, reading_time_s):
    bench = simulated_bench("flyback-48v-5v", time_scale=time_scale, reading_time_s=reading_time_s)
    d = bench.design
    proc = load_procedure("input_thresholds")
    params = proc.resolve_parameters(values={"resolution_v": 0.02, "dwell_s": 0.1, "reset_s": 0.1})
    out = execute(proc, params, station_for(bench), benchctl_store)
    assert out.status == "completed", out.message
    res = benchctl_store.results(out.run_id).set_index("name")
    on, off = res.loc["uvlo_on_v"], res.loc["uvlo_off_v"]
    # Tolerance: the bisection's half-width (<= resolution/2), plus the cable drop of the light load's
    # input current (0.5 A·5 V/(η·32 V) ≈ 0.1 A × 0.05 Ω ≈ 5 mV; at the on threshold the input draws
    # only the bleed resistor's 0.3 mA): the source setpoint sits above the DUT input by that drop.
    assert on["details"]["half_width_v"] <= 0.01
    assert abs(on["value"] - d.protection.uvlo_on_v) <= on["details"]["half_width_v"] + 1e-3
    assert abs(off["value"] - d.protection.uvlo_off_v) <= off["details"]["half_width_v"] + 0.01
    hyst = res.loc["uvlo_hysteresis_v"]["value"]
    assert hyst == pytest.approx(d.protection.uvlo_on_v - d.protection.uvlo_off_v, abs=0.03)
    pts = benchctl_store.points(out.run_id)
    assert {"ramp_up", "ramp_down", "bisect_on", "bisect_off", "thresholds"} <= set(pts["tag"])
    report = build_report(benchctl_store, out.run_id, tmp_path / "report")
    assert sum("input-thresholds" in p.name for p in report.png_paths) == 1, (report.png_paths, report.notes)
    # the bundled flyback limits pass the bundled flyback model
    limits = load_limits(procedures_dir() / "limits" / "flyback-48v-5v-start-up.toml")
    checked = check_limits(limits, load_run_data(benchctl_store, out.run_id))
    assert len({o.limit.quantity for o in checked.outcomes}) == 3
    assert checked.exit_code == EXIT_OK, checked.summary + "\n" + "\n".join(o.reason for o in checked.outcomes)
