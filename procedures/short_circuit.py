"""Short circuit: peak and average current into the short, hiccup period and duty, recovery.

CAUTION: this procedure overloads the DUT's output on purpose, inside a declared test
envelope (``test_envelope``: the load current and power limits widened to ``short_a``, never
beyond the station's ``[limits.absolute]``). Expect the DUT's hiccup protection to act; keep
clear of the DUT and follow local codes and licensed practice.

The short is what an electronic load can honestly make: its constant-current mode at
``short_a``, well above the DUT's current limit, which pulls the output down to the load's
minimum operating voltage (a resistive "short" of a few milliohms is beyond any station's
limits: the interlock rates a resistance at the highest output voltage it allows). The load's
dynamic mode (single steps, ``slew_a_per_s``) steps it from ``iout_a`` to ``short_a`` and back,
its trigger output triggering the scope (external input), so each record starts
``pre_trigger_s`` before the step exactly.  Recorded: the output voltage and the output current
(the fixture's current probe).  Measured (:mod:`benchctl.analysis.protection`): the peak
current into the short (the output capacitance discharging at the load's level), the average
over whole hiccup periods, the period and duty (mid-reference edges, IEEE 181-2011), and the
recovery: from the release until the output stays within ±``band_v`` of its level before the
short.  A hard short at the terminals (the simulator's ``output_short`` fault) is the
``--fault output_short@load:...`` hook of ``benchctl sim``; this procedure does not need it.
"""

from __future__ import annotations

import math

from benchctl.procedure import Parameter, Parameters, Result

NAME = "short_circuit"
DESCRIPTION = "output short (CC overload): peak and average current, hiccup period and duty, recovery"
ROLES = ("source", "load", "output_meter", "scope")

PARAMETERS = [
    Parameter("vin_v", "V", 48.0, minimum=0.0, maximum=1500.0, help="input voltage"),
    Parameter("iout_a", "A", 2.0, minimum=0.0, maximum=1000.0, help="load before and after the short"),
    Parameter("short_a", "A", 9.0, minimum=0.0, maximum=1000.0,
              help="the load's CC level during the short (well above the DUT's current limit)"),
    Parameter("slew_a_per_s", "A/s", 1e6, minimum=1.0, maximum=1e9, help="the load's step slew"),
    Parameter("vout_nominal_v", "V", 5.0, minimum=0.0, maximum=1500.0, help="the regulated output"),
    Parameter("band_v", "V", 0.25, minimum=0.0, maximum=100.0, help="recovery band half-width (5 % of 5 V)"),
    Parameter("short_record_s", "s", 0.16, minimum=1e-4, maximum=10.0, help="record of the short"),
    Parameter("recovery_record_s", "s", 0.1, minimum=1e-4, maximum=10.0, help="record of the recovery"),
    Parameter("pre_trigger_s", "s", 0.002, minimum=0.0, maximum=10.0, help="record before each step"),
    Parameter("points", "", 80000, minimum=100, maximum=2_000_000, kind="int", help="record points"),
    Parameter("skip_s", "s", 0.035, minimum=0.0, maximum=10.0,
              help="leave out the record's first part (the first discharge) from the hiccup figures"),
    Parameter("short_hold_s", "s", 0.05, minimum=0.0, maximum=60.0,
              help="keep the short on after its record, before the release"),
    Parameter("vout_channel", "", 1, minimum=1, maximum=8, kind="int", help="scope channel on the output"),
    Parameter("iout_channel", "", 4, minimum=1, maximum=8, kind="int", help="scope channel on the output current"),
    Parameter("settle_s", "s", 0.3, minimum=0.0, maximum=600.0, help="wait after the start before the short"),
    Parameter("acquire_timeout_s", "s", 10.0, minimum=0.1, maximum=600.0, help="longest wait for a record"),
]


def test_envelope(p: Parameters) -> dict[str, float]:
    """The load current of the short (+10 %) and its worst-case power at 1.2 × nominal."""
    i_max = 1.1 * p.short_a
    return {"load_current_max_a": i_max, "load_power_max_w": i_max * 1.2 * p.vout_nominal_v}


def plan(p: Parameters) -> list[dict]:
    """The short, then its release."""
    return [{"phase": "short", "iout_set_a": p.short_a}, {"phase": "recovery", "iout_set_a": p.iout_a}]


def _screen(scope, ch: int, low: float, high: float) -> None:
    scope.set_channel_enabled(ch, True)
    scope.set_coupling(ch, "DC")
    scope.set_bandwidth_limit(ch, None)
    scope.set_scale(ch, max(high - low, 1e-3) / 7.0)
    scope.set_offset(ch, 0.5 * (high + low))


def run(bench, p: Parameters) -> None:
    import numpy as np

    from benchctl.analysis.protection import hiccup_metrics, recovery_s
    from benchctl.errors import ParameterError

    load, scope, meter = bench.load, bench.role("scope"), bench.output_meter
    if not p.short_a > p.iout_a:
        raise ParameterError(f"short_a {p.short_a:g} A must be above iout_a {p.iout_a:g} A")
    bench.event("caution", f"shorting the DUT's output with the load at {p.short_a:g} A (CC); expect hiccup")
    scope.set_data_format("int16")
    if getattr(scope, "set_fixture_probe", None) is not None:
        scope.set_fixture_probe(p.vout_channel, "vout")
        scope.set_fixture_probe(p.iout_channel, "output_current")
    steps = iter(bench.sweep(plan(p)))
    try:
        bench.power_up(p.vin_v, p.iout_a, startup_delay_s=p.settle_s)
        bench.wait(p.settle_s)
        v_before = meter.measure_voltage()
        _screen(scope, p.vout_channel, -0.05 * p.vout_nominal_v, 1.2 * p.vout_nominal_v)
        _screen(scope, p.iout_channel, -0.1 * p.short_a, 1.2 * p.short_a)
        scope.set_trigger("external")
        load.set_trigger_out(True)
        load.set_transient(p.iout_a, p.short_a, slew_a_per_s=p.slew_a_per_s, mode="single")
        load.set_transient_enabled(True)
        # the short
        next(steps, None)
        scope.set_record(p.short_record_s, p.points, pre_trigger_s=p.pre_trigger_s)
        scope.arm()
        load.trigger_step()
        scope.wait_triggered(p.acquire_timeout_s)
        vo, io = scope.fetch_waveform(p.vout_channel), scope.fetch_waveform(p.iout_channel)
        t0 = float(vo.t_s[0]) + p.pre_trigger_s          # the step (the trigger)
        m = hiccup_metrics(io.t_s, io.values, skip_s=p.pre_trigger_s + p.skip_s)
        values = {"iout_set_a": p.iout_a, "short_a": p.short_a, "vout_before_v": v_before,
                  "peak_current_a": m.peak_a,
                  "average_current_a": math.nan if m.average_a is None else m.average_a,
                  "hiccup_period_s": math.nan if m.period_s is None else m.period_s,
                  "hiccup_duty": math.nan if m.duty is None else m.duty,
                  "hiccup_on_level_a": m.on_level_a, "hiccup_cycles": float(m.cycles),
                  "clipped_samples": float(vo.clipped_samples + io.clipped_samples)}
        if m.reason:
            bench.event("warning", f"short circuit: {m.reason}", phase="short")
        seq = bench.record(values, units={"hiccup_duty": "", "hiccup_cycles": "", "clipped_samples": ""},
                           tag="short")
        bench.record_array("waveform", {"t_s": io.t_s - t0, "vout_v": vo.values, "iout_a": io.values}, point_seq=seq,
                           meta={"kind": "short_circuit", "skip_s": p.skip_s, "reason": m.reason})
        bench.wait(p.short_hold_s)
        # the release
        next(steps, None)
        scope.set_record(p.recovery_record_s, p.points, pre_trigger_s=p.pre_trigger_s)
        scope.arm()
        load.trigger_step()
        scope.wait_triggered(p.acquire_timeout_s)
        vo, io = scope.fetch_waveform(p.vout_channel), scope.fetch_waveform(p.iout_channel)
        t0 = float(vo.t_s[0]) + p.pre_trigger_s
        rec = recovery_s(vo.t_s, vo.values, t_release_s=t0, level_v=v_before, band_v=p.band_v)
        if rec is None:
            bench.event("warning", "short circuit: the output did not return into its band within the record; "
                        "lengthen recovery_record_s", phase="recovery")
        seq = bench.record({"iout_set_a": p.iout_a, "recovery_s": math.nan if rec is None else rec,
                            "vout_end_v": float(np.mean(vo.values[-max(vo.values.size // 50, 1):])),
                            "clipped_samples": float(vo.clipped_samples + io.clipped_samples)},
                           units={"clipped_samples": ""}, tag="recovery")
        bench.record_array("waveform", {"t_s": vo.t_s - t0, "vout_v": vo.values, "iout_a": io.values}, point_seq=seq,
                           meta={"kind": "short_recovery", "level_v": v_before, "band_v": p.band_v})
        load.set_transient_enabled(False)
    finally:
        bench.power_down()


def analyse(points, p: Parameters) -> list[Result]:
    """Peak and average current into the short, hiccup period and duty, recovery time."""
    import numpy as np

    results: list[Result] = []
    if points.empty:
        return results
    method = "mid-reference edges of the output current (IEEE 181-2011); mean over whole periods"
    short = points[points["tag"] == "short"]
    if not short.empty:
        row = short.iloc[-1]
        details: dict = {"method": method}
        if row.get("clipped_samples", 0.0):
            details.update(flags=["clipped"], flag_reasons="a trace touched the screen's limits")
        results.append(Result("short_peak_current_a", float(row["peak_current_a"]), "A", details=details))
        for name, col, unit in (("short_average_current_a", "average_current_a", "A"),
                                ("hiccup_period_s", "hiccup_period_s", "s"), ("hiccup_duty", "hiccup_duty", "")):
            v = float(row[col])
            results.append(Result(name, v if np.isfinite(v) else None, unit,
                                  details=details if np.isfinite(v) else
                                  {**details, "reason": "fewer than two hiccup cycles in the record"}))
    rec = points[points["tag"] == "recovery"]
    if not rec.empty:
        v = float(rec.iloc[-1]["recovery_s"])
        results.append(Result("short_recovery_s", v if np.isfinite(v) else None, "s",
                              details={"method": "release (the load's trigger) to the output within ±band for good"}
                              if np.isfinite(v) else {"reason": "the output did not return into its band"}))
    return results
