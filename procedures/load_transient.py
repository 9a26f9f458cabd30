"""Load-transient response over line voltage, load step and slew rate.

For every input voltage, load-step pair (low, high) and slew rate, the electronic load's
dynamic mode steps the load low→high, then high→low, each step triggering the scope
(the load's trigger output on the scope's external input). The output voltage (AC
coupled) and the load current are captured, stored as a waveform with the point, and
measured: peak deviation from the pre-step value, recovery time into a band around the
pre-step value, settling time into the same band around the final value
(:func:`benchctl.analysis.transient.load_step_metrics`, common practice).

A capture whose output (or load-current) trace touches the screen's limits is taken again
with a taller screen after the load is brought back to the step's starting level
(:func:`benchctl.acquire.acquire_unclipped`, at most ``max_reacquisitions`` times). If the
output still clips, the metrics are stored with the flag ``clipped``, the peak deviation as a
bound when the clipped edge is on the side of the peak (a lower bound of an overshoot, an
upper bound of a signed undershoot), and a warning event says so.
"""

from __future__ import annotations

import math

from benchctl.procedure import Parameter, Parameters, Result, power_parameters

NAME = "load_transient"
DESCRIPTION = "load-step response: peak deviation, recovery and settling over line x step x slew"
ROLES = ("source", "load", "scope")

PARAMETERS = [
    Parameter("vin_v", "V", [36.0, 48.0, 75.0], minimum=0.0, maximum=1500.0, kind="float_list",
              help="input voltages"),
    Parameter("step_low_a", "A", [2.5], minimum=0.0, maximum=1000.0, kind="float_list",
              help="low level of each load step (paired with step_high_a by position)"),
    Parameter("step_high_a", "A", [5.0], minimum=0.0, maximum=1000.0, kind="float_list",
              help="high level of each load step"),
    Parameter("slew_a_per_s", "A/s", [1e6], minimum=1.0, maximum=1e12, kind="float_list",
              help="slew rates of the load edges (1e6 A/s = 1 A/us)"),
    Parameter("band_v", "V", 0.05, minimum=0.0, maximum=100.0, help="half-width of the recovery/settling band"),
    Parameter("fsw_hz", "Hz", 150e3, minimum=0.0, maximum=1e9,
              help="switching frequency: the output is averaged over one period before the metrics, so the "
                   "ripple does not count as deviation (0 = no averaging)"),
    Parameter("record_s", "s", 4e-3, minimum=1e-7, maximum=10.0, help="scope record length"),
    Parameter("pre_trigger_s", "s", 4e-4, minimum=0.0, maximum=10.0, help="record before the step"),
    Parameter("points", "", 20000, minimum=100, maximum=2_000_000, kind="int", help="record points"),
    Parameter("vout_channel", "", 1, minimum=1, maximum=8, kind="int", help="scope channel on the output voltage"),
    Parameter("iout_channel", "", 4, minimum=0, maximum=8, kind="int",
              help="scope channel on the load current (0 = none; the step edge is then the trigger)"),
    Parameter("vout_scale_v_per_div", "V", 0.05, minimum=1e-5, maximum=100.0, help="output channel V/div (AC coupled)"),
    Parameter("bandwidth_limit_hz", "Hz", 20e6, minimum=0.0, maximum=1e10,
              help="bandwidth limit of the output channel (0 = full bandwidth)"),
    *power_parameters(startup_delay_s=0.1),
    Parameter("settle_s", "s", 0.05, minimum=0.0, maximum=60.0, help="wait before each step"),
    Parameter("acquire_timeout_s", "s", 10.0, minimum=0.1, maximum=600.0, help="longest wait for one capture"),
    Parameter("max_reacquisitions", "", 3, minimum=0, maximum=10, kind="int",
              help="re-captures of a step with a twice taller screen while a trace clips"),
]


def _pairs(p: Parameters) -> list[tuple[float, float]]:
    from benchctl.errors import ParameterError

    if len(p.step_low_a) != len(p.step_high_a):
        raise ParameterError(f"step_low_a has {len(p.step_low_a)} values and step_high_a {len(p.step_high_a)}; "
                             "give one low and one high level per step")
    pairs = list(zip(p.step_low_a, p.step_high_a))
    for lo, hi in pairs:
        if not lo < hi:
            raise ParameterError(f"load step {lo:g} A -> {hi:g} A: the low level must be below the high level")
    return pairs


def plan(p: Parameters) -> list[dict]:
    """Every captured step in order: for each line, step pair and slew, first up then down."""
    points = []
    for vin in p.vin_v:
        for lo, hi in _pairs(p):
            for slew in p.slew_a_per_s:
                points.append({"vin_set_v": vin, "iout_from_a": lo, "iout_set_a": hi, "slew_a_per_s": slew,
                               "load_step": "increase"})
                points.append({"vin_set_v": vin, "iout_from_a": hi, "iout_set_a": lo, "slew_a_per_s": slew,
                               "load_step": "decrease"})
    return points


def _setup_scope(scope, p: Parameters) -> None:
    scope.set_data_format("int16")
    scope.set_record(p.record_s, p.points, pre_trigger_s=p.pre_trigger_s)
    scope.set_channel_enabled(p.vout_channel, True)
    scope.set_coupling(p.vout_channel, "AC")
    scope.set_offset(p.vout_channel, 0.0)
    scope.set_scale(p.vout_channel, p.vout_scale_v_per_div)
    scope.set_bandwidth_limit(p.vout_channel, p.bandwidth_limit_hz or None)
    scope.set_trigger("external")


def run(bench, p: Parameters) -> None:
    from benchctl.acquire import acquire_unclipped, report_clipping
    from benchctl.analysis.transient import load_step_metrics, switching_period_average

    source, load, scope = bench.source, bench.load, bench.role("scope")
    points = plan(p)
    _setup_scope(scope, p)
    bw = scope.bandwidth_limit_hz(p.vout_channel)
    bench.power_up(points[0]["vin_set_v"], points[0]["iout_from_a"],
                   source_current_limit_a=p.source_current_limit_a, startup_delay_s=p.startup_delay_s)
    load.set_trigger_out(True)
    vin_now = None
    for point in bench.sweep(points):
        lo, hi = sorted((point["iout_from_a"], point["iout_set_a"]))
        if point["load_step"] == "increase":
            if point["vin_set_v"] != vin_now:
                source.set_voltage(point["vin_set_v"])
                vin_now = point["vin_set_v"]
            load.set_transient_enabled(False)
            load.set_current(lo)
            load.set_transient(lo, hi, slew_a_per_s=point["slew_a_per_s"], mode="single")
            load.set_transient_enabled(True)
            if p.iout_channel:
                scope.set_channel_enabled(p.iout_channel, True)
                scope.set_coupling(p.iout_channel, "DC")
                scope.set_scale(p.iout_channel, max(hi - lo, 1e-3) / 4.0)
                scope.set_offset(p.iout_channel, 0.5 * (lo + hi))
        bench.wait(p.settle_s)

        def capture(attempt: int) -> None:
            if attempt:  # the last capture stepped the load: step it back (unwatched), let it settle
                load.trigger_step()
                bench.wait(p.settle_s)
            scope.arm()
            load.trigger_step()
            scope.wait_acquired(p.acquire_timeout_s)

        channels = [p.vout_channel] + ([p.iout_channel] if p.iout_channel else [])
        watch = {p.vout_channel: "output channel"}
        if p.iout_channel:
            watch[p.iout_channel] = "load-current channel"
        acq = acquire_unclipped(scope, capture, channels, watch=watch, max_retries=p.max_reacquisitions)
        vout = acq.waveform(p.vout_channel)
        iout = acq.waveform(p.iout_channel) if p.iout_channel else None
        vout_v = switching_period_average(vout.t_s, vout.values, p.fsw_hz) if p.fsw_hz else vout.values
        metrics = load_step_metrics(vout.t_s, vout_v, step_time_s=None if iout is not None else 0.0,
                                    iout_a=None if iout is None else iout.values, band_v=p.band_v,
                                    load_step=point["load_step"], pre_guard_s=0.5 / p.fsw_hz if p.fsw_hz else 0.0)
        seq = bench.record({
            "vin_set_v": point["vin_set_v"], "iout_set_a": point["iout_set_a"],
            "iout_from_a": point["iout_from_a"], "slew_a_per_s": point["slew_a_per_s"],
            "step_up": 1.0 if point["load_step"] == "increase" else 0.0,
            "step_time_s": metrics.step_time_s,
            "vout_peak_deviation_v": metrics.peak_deviation_v,
            "vout_peak_after_step_s": metrics.peak_after_step_s,
            "vout_static_shift_v": metrics.static_shift_v,
            "recovery_s": metrics.recovery_after_step_s if metrics.recovered else math.nan,
            "settling_s": metrics.settling_after_step_s if metrics.settled else math.nan,
            "band_v": metrics.band_v,
            "clipped_samples": float(vout.clipped_samples),
            "clipped_high": 1.0 if vout.clipped_high_samples else 0.0,
            "clipped_low": 1.0 if vout.clipped_low_samples else 0.0,
            "iout_clipped_samples": float(iout.clipped_samples) if iout is not None else 0.0,
            "captures": float(acq.attempts),
        }, units={"slew_a_per_s": "A/s", "step_up": "", "clipped_samples": "", "clipped_high": "", "clipped_low": "",
                  "iout_clipped_samples": "", "captures": ""}, tag=point["load_step"])
        columns = {"t_s": vout.t_s, "vout_ac_v": vout.values}
        if p.fsw_hz:
            columns["vout_avg_v"] = vout_v
        if iout is not None:
            columns["iout_a"] = iout.values
        bench.record_array("waveform", columns, point_seq=seq, meta={
            "kind": "load_transient", "load_step": point["load_step"], "vin_set_v": point["vin_set_v"],
            "iout_from_a": point["iout_from_a"], "iout_to_a": point["iout_set_a"],
            "slew_a_per_s": point["slew_a_per_s"], "coupling": "AC", "bandwidth_limit_hz": bw,
            "band_v": metrics.band_v, "recovery_reason": metrics.recovery_reason,
            "averaged_over_switching_period": bool(p.fsw_hz),
            "settling_reason": metrics.settling_reason, "step_time_s": metrics.step_time_s,
            "acquisition": acq.meta(),
        })
        report_clipping(bench, acq, f"{point['vin_set_v']:g} V, {point['iout_from_a']:g} -> {point['iout_set_a']:g} A",
                        seq=seq, remedy="raise vout_scale_v_per_div or max_reacquisitions")
    load.set_transient_enabled(False)
    bench.power_down()


def analyse(points, p: Parameters) -> list[Result]:
    """Peak deviation, recovery and settling per step, and the worst cases."""
    import numpy as np

    from benchctl.acquire import clip_flags

    results: list[Result] = []
    if points.empty:
        return results
    method = "peak from the pre-step value; recovery/settling into +/-band (common practice)"

    def flag(row, name: str) -> bool:
        value = row.get(name)
        return value is not None and value == value and bool(value)

    any_peak_bound = any_clipped = False
    for _, row in points.iterrows():
        up = bool(row["step_up"])
        scope = {"seq": int(row["seq"]), "vin_set_v": float(row["vin_set_v"]), "iout_set_a": float(row["iout_set_a"]),
                 "iout_from_a": float(row["iout_from_a"]), "slew_a_per_s": float(row["slew_a_per_s"]),
                 "load_step": "increase" if up else "decrease"}
        high, low = flag(row, "clipped_high"), flag(row, "clipped_low")
        clipped = high or low or flag(row, "clipped_samples")
        any_clipped |= clipped
        # an undershoot (load increase) is cut at the bottom, an overshoot at the top: then the true
        # deviation lies beyond the stored one (below a negative value, above a positive one)
        peak_side = low if up else high
        any_peak_bound |= peak_side
        bound = ("upper_bound" if up else "lower_bound") if peak_side else None
        results.append(Result("transient_peak_deviation_v", float(row["vout_peak_deviation_v"]), "V",
                              details={"method": method, **clip_flags(
                                  clipped, bound=bound, reason="the output trace still touched the screen's limits "
                                  "after the re-captures" + ("; the peak lies beyond the screen" if bound else ""))},
                              scope=scope))
        for name, col in (("transient_recovery_s", "recovery_s"), ("transient_settling_s", "settling_s")):
            value = row.get(col)
            found = value is not None and np.isfinite(value)
            results.append(Result(name, float(value) if found else None, "s", scope=scope, details={
                "found": bool(found), "band_v": float(row["band_v"]),
                "reason": "entered the band and stayed" if found else
                "the output did not stay inside the band before the end of the record; "
                "lengthen record_s or widen band_v",
                **clip_flags(clipped, reason="read from an output trace that touched the screen's limits")}))
    dev = points["vout_peak_deviation_v"].abs().to_numpy(float)
    k = int(np.argmax(dev))
    results.append(Result("max_abs_transient_deviation_v", float(dev[k]), "V",
                          details=clip_flags(any_clipped, bound="lower_bound" if any_peak_bound else None,
                                             reason="at least one output trace still clipped"),
                          scope={"vin_set_v": float(points["vin_set_v"].iloc[k]),
                                 "iout_set_a": float(points["iout_set_a"].iloc[k])}))
    rec = points["recovery_s"].to_numpy(float)
    if np.isfinite(rec).all():
        results.append(Result("max_recovery_s", float(np.max(rec)), "s",
                              details=clip_flags(any_clipped, reason="at least one output trace still clipped")))
    else:
        results.append(Result("max_recovery_s", None, "s",
                              details={"reason": f"{int(np.sum(~np.isfinite(rec)))} step(s) did not recover"}))
    return results
