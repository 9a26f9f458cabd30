"""over_voltage end to end: the feedback opened by the simulator's fault hook at the scope's arm."""

from __future__ import annotations

import pytest

from benchctl.procedure import load_procedure
from benchctl.runner import execute
from benchctl.simulated_instruments.converter.protection import OvpTrip
from benchctl.simulated_instruments.faults import apply_fault_specs


@pytest.mark.parametrize("time_scale, reading_time_s", [(1.0, None), (20.0, 0.002)])
def test_ovp_peak_trip_and_latch_match_the_model(protected_bench, check_protection_run, station_for, benchctl_store,
                                                 tmp_path, time_scale,
                                                 reading_time_s):
    bench = protected_bench(time_scale, reading_time_s)
    apply_fault_specs(bench, ["feedback_open@scope:on=INIT"])     # the engineer's switch, at the arm
    proc = load_procedure("over_voltage")
    params = proc.resolve_parameters(values={})
    out = execute(proc, params, station_for(bench), benchctl_store)
    assert out.status == "completed", out.message
    row = benchctl_store.points(out.run_id).iloc[-1]
    trip = bench.model.protection_truth()
    assert isinstance(trip, OvpTrip)
    f = bench.model.protection
    assert row["clipped_samples"] == 0.0
    # Peak: the model's (the output charging at I_lim − I_load through C for the comparator's delay past
    # ovp_v; the capacitor law). 0.03 V (0.5 %): the record maximum picks the scope noise's largest
    # excursion (σ = 0.004 div × 8/7 V/div ≈ 4.6 mV; ≈ +4σ ≈ 18 mV over 40 000 samples) and the int16 step.
    assert row["ovp_peak_v"] == pytest.approx(trip.peak_v, abs=0.03)
    # The trip level (the output a data-sheet delay before the peak) against the model's ovp_v: the same
    # noise on one sample, and the delay parameter equal to the model's (20 µs): 0.03 V.
    assert params.comparator_delay_s == f.ovp_delay_s
    assert row["ovp_trip_v"] == pytest.approx(f.ovp_v, abs=0.03)
    # the rise at the limit: slope (I_lim − I_load)/C_out (capacitor law); 3 % for the fit on noise
    d = bench.design
    slope = (d.protection.current_limit_a - params.iout_a) / bench.model.output_capacitance_f
    assert row["rise_slope_v_per_s"] == pytest.approx(slope, rel=0.03)
    assert row["latched"] == 1.0 and row["vout_after_v"] < 0.1 * params.vout_nominal_v
    assert row["ovp_peak_v"] > bench.limits.dut_output_voltage_max_v     # past the operating limit ...
    events = benchctl_store.events(out.run_id)
    assert "test_envelope" in set(events["kind"])                         # ... inside the declared envelope
    assert events["message"].str.contains("OPEN THE FEEDBACK PATH").any()
    if time_scale > 1.0:        # the report draws the procedure's plot (once: the accelerated run)
        check_protection_run(out.run_id, proc.name, "over-voltage")


def test_without_the_feedback_opened_the_capture_times_out_cleanly(protected_bench, station_for, benchctl_store):
    # no fault hook and nobody opening the feedback: the trigger never comes; the run fails with the
    # scope's timeout and the outputs end off
    bench = protected_bench(20.0)
    proc = load_procedure("over_voltage")
    out = execute(proc, proc.resolve_parameters(values={"acquire_timeout_s": 0.5}), station_for(bench),
                  benchctl_store)
    assert out.status != "completed"
    assert bench.model.operating_point().state == "off"
