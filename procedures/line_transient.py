"""Line transient: the output's deviation and recovery after a step of the input voltage.

How the step is made: the DC source's own setpoint is changed (``source.set_voltage``) while
the converter regulates at a fixed load. That is what a bench can always do and what the
simulated bench models honestly: the simulated source steps at once (the model's
"programmed value at once"), so the DUT sees a true step, its worst case; a real source
slews (tens of V/ms to a few V/µs), which lowers the deviation, so read a real bench's
figures with the source's slew in mind, and use a generator on the source's analog
programming input where a defined edge rate is required. The scope triggers on the DUT input
(the VIN probe) crossing the middle of the step and captures the output AC coupled; the
output is averaged over one switching period (the ripple is not the deviation) and measured
with :func:`benchctl.analysis.line_response.line_step_metrics`: peak deviation from the
pre-step value, its time, recovery into ±band_v. Up and down steps for each pair.

CAUTION: a line step at the top of the range takes the DUT input to vin_to_v at once; the
interlock refuses setpoints above the station's source_voltage_max_v, and local codes and
licensed practice apply at hazardous voltages.
"""

from __future__ import annotations

import math

from benchctl.procedure import Parameter, Parameters, Result, power_parameters

NAME = "line_transient"
DESCRIPTION = "line-step response: output deviation and recovery for steps of the input voltage"
ROLES = ("source", "load", "scope")

PARAMETERS = [
    Parameter("vin_low_v", "V", [36.0], minimum=0.0, maximum=1500.0, kind="float_list",
              help="low input voltage of each step (paired with vin_high_v by position)"),
    Parameter("vin_high_v", "V", [48.0], minimum=0.0, maximum=1500.0, kind="float_list",
              help="high input voltage of each step"),
    Parameter("iout_a", "A", 2.0, minimum=0.0, maximum=1000.0, help="load current during the steps"),
    Parameter("band_v", "V", 0.01, minimum=1e-6, maximum=100.0, help="half-width of the recovery band"),
    Parameter("fsw_hz", "Hz", 150e3, minimum=0.0, maximum=1e9,
              help="switching frequency: the output is averaged over one period (0 = no averaging)"),
    Parameter("record_s", "s", 4e-3, minimum=1e-6, maximum=10.0, help="scope record length"),
    Parameter("pre_trigger_s", "s", 5e-4, minimum=0.0, maximum=10.0, help="record before the step"),
    Parameter("points", "", 20000, minimum=100, maximum=2_000_000, kind="int", help="record points"),
    Parameter("vout_channel", "", 1, minimum=1, maximum=8, kind="int", help="scope channel on the output"),
    Parameter("vin_channel", "", 2, minimum=1, maximum=8, kind="int", help="scope channel on the DUT input"),
    Parameter("vout_scale_v_per_div", "V", 0.02, minimum=1e-5, maximum=100.0, help="output channel V/div (AC)"),
    *power_parameters(startup_delay_s=0.1),
    Parameter("settle_s", "s", 0.05, minimum=0.0, maximum=60.0, help="wait before each step"),
    Parameter("start_settle_s", "s", 1.0, minimum=0.0, maximum=600.0,
              help="wait after power-up before the first step (the start and the load's switch-on settle; "
                   "a step during a start measures the start, not the line response)"),
    Parameter("acquire_timeout_s", "s", 10.0, minimum=0.1, maximum=600.0, help="longest wait for one capture"),
    Parameter("max_reacquisitions", "", 3, minimum=0, maximum=10, kind="int",
              help="re-captures of a step with a 2.5 times taller screen while the output clips"),
]


def _pairs(p: Parameters) -> list[tuple[float, float]]:
    from benchctl.errors import ParameterError

    if len(p.vin_low_v) != len(p.vin_high_v):
        raise ParameterError(f"vin_low_v has {len(p.vin_low_v)} values and vin_high_v {len(p.vin_high_v)}; give "
                             "one low and one high voltage per step")
    for lo, hi in zip(p.vin_low_v, p.vin_high_v):
        if not lo < hi:
            raise ParameterError(f"line step {lo:g} V -> {hi:g} V: the low voltage must be below the high one")
    return list(zip(p.vin_low_v, p.vin_high_v))


def plan(p: Parameters) -> list[dict]:
    """For each pair: the step up, then the step down."""
    points = []
    for lo, hi in _pairs(p):
        points.append({"vin_from_v": lo, "vin_set_v": hi, "iout_set_a": p.iout_a, "line_step": "increase"})
        points.append({"vin_from_v": hi, "vin_set_v": lo, "iout_set_a": p.iout_a, "line_step": "decrease"})
    return points


def run(bench, p: Parameters) -> None:
    from benchctl.analysis.line_response import line_step_metrics
    from benchctl.analysis.transient import switching_period_average

    source, scope = bench.source, bench.role("scope")
    points = plan(p)
    scope.set_data_format("int16")
    setter = getattr(scope, "set_fixture_probe", None)
    if setter is not None:          # the simulated fixture; on a real bench the probes are placed by hand
        setter(p.vout_channel, "vout")
        setter(p.vin_channel, "vin")
    scope.set_record(p.record_s, p.points, pre_trigger_s=p.pre_trigger_s)
    for ch in (p.vout_channel, p.vin_channel):
        scope.set_channel_enabled(ch, True)
    scope.set_coupling(p.vout_channel, "AC")
    scope.set_offset(p.vout_channel, 0.0)
    scope.set_scale(p.vout_channel, p.vout_scale_v_per_div)
    scope.set_coupling(p.vin_channel, "DC")
    bench.power_up(points[0]["vin_from_v"], p.iout_a, source_current_limit_a=p.source_current_limit_a,
                   startup_delay_s=p.startup_delay_s)
    bench.wait(p.start_settle_s)
    for point in bench.sweep(points):
        lo, hi = sorted((point["vin_from_v"], point["vin_set_v"]))
        source.set_voltage(point["vin_from_v"])
        scope.set_scale(p.vin_channel, max(hi - lo, 0.1) / 4.0)
        scope.set_offset(p.vin_channel, 0.5 * (lo + hi))
        up = point["line_step"] == "increase"
        scope.set_trigger(p.vin_channel, level=0.5 * (lo + hi), slope="rising" if up else "falling")
        scale = p.vout_scale_v_per_div
        for attempt in range(p.max_reacquisitions + 1):
            if attempt:       # the last capture clipped: back to the starting line, a taller screen, again
                source.set_voltage(point["vin_from_v"])
                scale *= 2.5
            scope.set_scale(p.vout_channel, scale)
            bench.wait(p.settle_s)
            scope.arm()
            source.set_voltage(point["vin_set_v"])
            scope.wait_acquired(p.acquire_timeout_s)
            vout, vin = scope.fetch_waveform(p.vout_channel), scope.fetch_waveform(p.vin_channel)
            if not vout.clipped_samples:
                break
        v_avg = switching_period_average(vout.t_s, vout.values, p.fsw_hz) if p.fsw_hz else vout.values
        m = line_step_metrics(vout.t_s, v_avg, step_time_s=0.0, band_v=p.band_v)
        seq = bench.record({
            "vin_from_v": point["vin_from_v"], "vin_set_v": point["vin_set_v"], "iout_set_a": p.iout_a,
            "step_up": 1.0 if up else 0.0,
            "line_step_v": point["vin_set_v"] - point["vin_from_v"],
            "vout_peak_deviation_v": m.peak_deviation_v, "vout_peak_after_step_s": m.peak_after_step_s,
            "vout_static_shift_v": m.final_shift_v, "band_v": m.band_v,
            "recovery_s": m.recovery_s if m.recovered and m.recovery_s is not None else math.nan,
            "clipped_samples": float(vout.clipped_samples), "captures": float(attempt + 1),
        }, units={"step_up": "", "clipped_samples": "", "line_step_v": "V", "captures": ""}, tag=point["line_step"])
        columns = {"t_s": vout.t_s, "vout_ac_v": vout.values, "vin_v": vin.values}
        if p.fsw_hz:
            columns["vout_avg_v"] = v_avg
        bench.record_array("waveform", columns, point_seq=seq, meta={
            "kind": "line_transient", "line_step": point["line_step"], "vin_from_v": point["vin_from_v"],
            "vin_to_v": point["vin_set_v"], "iout_a": p.iout_a, "band_v": m.band_v, "coupling": "AC",
            "averaged_over_switching_period": bool(p.fsw_hz)})
        if vout.clipped_samples:
            bench.event("warning", f"line step {point['vin_from_v']:g} -> {point['vin_set_v']:g} V: the output trace "
                        "clipped; the peak deviation is a bound. Raise vout_scale_v_per_div", seq=seq)
    bench.power_down()


def analyse(points, p: Parameters) -> list[Result]:
    """Peak deviation and recovery per step; the worst of each."""
    import numpy as np

    results: list[Result] = []
    if points.empty:
        return results
    for _, row in points.iterrows():
        scope = {"seq": int(row["seq"]), "vin_from_v": float(row["vin_from_v"]), "vin_set_v": float(row["vin_set_v"]),
                 "iout_set_a": float(row["iout_set_a"]), "line_step": "increase" if row["step_up"] else "decrease"}
        clipped = bool(row.get("clipped_samples", 0.0))
        results.append(Result("line_transient_peak_deviation_v", float(row["vout_peak_deviation_v"]), "V",
                              scope=scope, details={"method": "peak from the pre-step value, switching-period "
                                                    "average (common practice)", "clipped": clipped}))
        rec = row["recovery_s"]
        found = rec == rec
        results.append(Result("line_transient_recovery_s", float(rec) if found else None, "s", scope=scope,
                              details={"found": bool(found), "band_v": float(row["band_v"]),
                                       "reason": "entered the band and stayed" if found else
                                       "the output did not stay inside the band before the record ended; "
                                       "lengthen record_s or widen band_v"}))
    dev = points["vout_peak_deviation_v"].abs().to_numpy(float)
    results.append(Result("max_abs_line_transient_deviation_v", float(np.max(dev)), "V"))
    rec = points["recovery_s"].to_numpy(float)
    results.append(Result("max_line_transient_recovery_s", float(np.max(rec)) if np.isfinite(rec).all() else None,
                          "s", details={} if np.isfinite(rec).all() else
                          {"reason": f"{int(np.sum(~np.isfinite(rec)))} step(s) did not recover"}))
    return results
