"""Over-voltage protection: the output's peak and the trip level with the feedback path opened.

CAUTION: this procedure drives the DUT's output above its regulation on purpose — the
feedback path is opened, the controller runs at full drive until its over-voltage
comparator stops it — inside a declared test envelope (``test_envelope``: the DUT output
voltage limit widened to ``envelope_output_v``, never beyond the station's
``[limits.absolute]``). Whatever the output can reach with the feedback open must be safe for
everything connected to it; keep clear of the DUT and follow local codes and licensed practice.

Opening the feedback path is not something the bench's instruments do: the procedure arms
the scope single-shot on the output rising through ``trigger_fraction`` × ``vout_nominal_v``
and then waits up to ``acquire_timeout_s`` for the engineer to open the feedback (a fixture
switch or link in the divider).  On the simulated bench the simulator's fault hook does it at
the arm: ``benchctl sim --dut-protection --fault feedback_open@scope:on=INIT`` (the model's
``feedback_open`` fault, fired by the scope's arm command).

Measured (:mod:`benchctl.analysis.protection`): the peak output voltage and its time; the
rise's slope just before it (least-squares line over ``slope_window_s``); the trip level as the
output ``comparator_delay_s`` before the peak (the controller's data-sheet delay: switching
stops that long after the comparator trips, so the peak is trip + slope × delay); and whether
the DUT stays off (latched) ``latch_check_s`` later.  A latched DUT restarts only after its
input goes below the UVLO off threshold: the procedure powers down at the end.
"""

from __future__ import annotations

import math

from benchctl.procedure import Parameter, Parameters, Result

NAME = "over_voltage"
DESCRIPTION = "OVP with the feedback opened: peak output voltage, trip level, latch"
ROLES = ("source", "load", "output_meter", "scope")

PARAMETERS = [
    Parameter("vin_v", "V", 48.0, minimum=0.0, maximum=1500.0, help="input voltage"),
    Parameter("iout_a", "A", 1.0, minimum=0.0, maximum=1000.0, help="CC load during the test"),
    Parameter("vout_nominal_v", "V", 5.0, minimum=0.0, maximum=1500.0, help="the regulated output"),
    Parameter("envelope_output_v", "V", 8.0, minimum=0.0, maximum=1500.0,
              help="the envelope's DUT output voltage limit (above the expected OVP peak)"),
    Parameter("trigger_fraction", "", 1.05, minimum=1.001, maximum=2.0, help="trigger on the output rising"),
    Parameter("record_s", "s", 0.002, minimum=1e-5, maximum=10.0, help="record length"),
    Parameter("pre_trigger_s", "s", 0.0005, minimum=0.0, maximum=10.0, help="record before the trigger"),
    Parameter("points", "", 40000, minimum=100, maximum=2_000_000, kind="int", help="record points"),
    Parameter("vout_channel", "", 1, minimum=1, maximum=8, kind="int", help="scope channel on the output"),
    Parameter("comparator_delay_s", "s", 20e-6, minimum=0.0, maximum=1.0,
              help="the controller's OVP delay (data sheet): trip level = output that long before the peak"),
    Parameter("slope_window_s", "s", 20e-6, minimum=1e-7, maximum=1.0, help="rise slope fit before the peak"),
    Parameter("latch_check_s", "s", 0.2, minimum=0.0, maximum=60.0, help="wait before checking the DUT stays off"),
    Parameter("settle_s", "s", 0.3, minimum=0.0, maximum=600.0, help="wait after the start before the test"),
    Parameter("acquire_timeout_s", "s", 30.0, minimum=0.1, maximum=3600.0,
              help="longest wait for the output to rise (the engineer opening the feedback)"),
]


def test_envelope(p: Parameters) -> dict[str, float]:
    """The DUT output voltage limit widened to ``envelope_output_v`` (and the load's power at it)."""
    return {"dut_output_voltage_max_v": p.envelope_output_v,
            "load_power_max_w": 1.1 * p.iout_a * p.envelope_output_v}


def plan(p: Parameters) -> list[dict]:
    """One capture."""
    return [{"iout_set_a": p.iout_a}]


def run(bench, p: Parameters) -> None:
    import numpy as np

    from benchctl.analysis.protection import ovp_peak

    load, scope, meter = bench.load, bench.role("scope"), bench.output_meter
    scope.set_data_format("int16")
    if getattr(scope, "set_fixture_probe", None) is not None:
        scope.set_fixture_probe(p.vout_channel, "vout")
    try:
        for point in bench.sweep(plan(p)):
            bench.power_up(p.vin_v, point["iout_set_a"], startup_delay_s=p.settle_s)
            bench.wait(p.settle_s)
            v_before = meter.measure_voltage()
            ch = p.vout_channel
            scope.set_channel_enabled(ch, True)
            scope.set_coupling(ch, "DC")
            scope.set_bandwidth_limit(ch, None)
            top = p.envelope_output_v
            scope.set_scale(ch, top / 7.0)
            scope.set_offset(ch, top / 2.0)
            scope.set_record(p.record_s, p.points, pre_trigger_s=p.pre_trigger_s)
            scope.set_trigger(ch, level=p.trigger_fraction * p.vout_nominal_v, slope="rising")
            bench.event("caution", "OPEN THE FEEDBACK PATH NOW: the scope is armed on the output rising through "
                        f"{p.trigger_fraction * p.vout_nominal_v:g} V; waiting up to {p.acquire_timeout_s:g} s "
                        "(on the simulated bench the fault hook feedback_open@scope:on=INIT does it)")
            scope.arm()
            scope.wait_triggered(p.acquire_timeout_s)
            wf = scope.fetch_waveform(ch)
            t, v = np.asarray(wf.t_s, dtype=float), np.asarray(wf.values, dtype=float)
            peak_v, t_peak = ovp_peak(t, v)
            win = (t >= t_peak - p.slope_window_s) & (t <= t_peak)
            slope = float(np.polyfit(t[win], v[win], 1)[0]) if np.count_nonzero(win) >= 3 else math.nan
            trip_v = float(np.interp(t_peak - p.comparator_delay_s, t, v))
            bench.wait(p.latch_check_s)
            v_after = meter.measure_voltage()
            latched = v_after < 0.1 * p.vout_nominal_v
            if not latched:
                bench.event("warning", f"the output reads {v_after:.3g} V {p.latch_check_s:g} s after the peak: "
                            "the over-voltage protection did not latch the DUT off")
            seq = bench.record({"iout_set_a": point["iout_set_a"], "vout_before_v": v_before, "ovp_peak_v": peak_v,
                                "ovp_peak_time_s": t_peak, "ovp_trip_v": trip_v, "rise_slope_v_per_s": slope,
                                "vout_after_v": v_after, "latched": 1.0 if latched else 0.0,
                                "clipped_samples": float(wf.clipped_samples)},
                               units={"latched": "", "clipped_samples": "", "rise_slope_v_per_s": "V/s"},
                               tag="over_voltage")
            bench.record_array("waveform", {"t_s": t, "vout_v": v}, point_seq=seq,
                               meta={"kind": "over_voltage", "peak_s": t_peak,
                                     "comparator_delay_s": p.comparator_delay_s})
    finally:
        bench.power_down()


def analyse(points, p: Parameters) -> list[Result]:
    """Peak output voltage, trip level and the latch."""
    results: list[Result] = []
    rows = points[points["tag"] == "over_voltage"] if not points.empty else points
    if rows.empty:
        return results
    row = rows.iloc[-1]
    details: dict = {"method": "record maximum (benchctl.analysis.protection.ovp_peak)"}
    if row.get("clipped_samples", 0.0):
        details.update(flags=["clipped"], flag_reasons="the trace touched the screen's top: the peak is a floor")
    results.append(Result("ovp_peak_v", float(row["ovp_peak_v"]), "V", details=details))
    results.append(Result("ovp_trip_v", float(row["ovp_trip_v"]), "V",
                          details={"method": f"output {p.comparator_delay_s:g} s (data-sheet delay) before the peak"}))
    results.append(Result("ovp_latched", float(row["latched"]), "",
                          details={"method": f"output below 10 % of nominal {p.latch_check_s:g} s after the peak"}))
    return results
