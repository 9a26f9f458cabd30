"""Turn-on and turn-off into a constant-current, a resistive and a large capacitive load, with the inrush.

For every input voltage and load case the DUT starts from off (source and load off, the
output discharged, the input capacitance run down): the load is set and switched on,
the scope is armed single-shot on the input voltage rising through ``vin_trigger_fraction``
of its setting (the source edge; or, with ``trigger_on = "output"``, on the output rising),
the source is switched on, and the output voltage, the
input voltage and the input current are captured with pre-trigger.  Measured
(:mod:`benchctl.analysis.turn_on`, IEEE 181-2011 reference levels): turn-on delay from the
input reaching ``vin_level_fraction`` of its setting to the output's 10 % level, rise time
10–90 %, monotonicity, overshoot and time to regulation; and the inrush
(:mod:`benchctl.analysis.inrush`): peak input current and I²t, against the source's current
limit.  Then the scope is armed on the input falling, the source is switched off (the safe
order: source first, the load drains the output) and the turn-off fall time 90–10 % and any
undershoot below 0 V are measured.

The capacitive case switches ``cap_load_f`` across the output with the fixture
(``set_fixture_load_capacitance``; a real station overrides it with its relay bank) and
loads it with ``cap_load_cc_a``.  A case whose load is 0 is skipped.
"""

from __future__ import annotations

import math

from benchctl.procedure import Parameter, Parameters, Result

NAME = "turn_on"
DESCRIPTION = "turn-on (delay, rise, overshoot, monotonic, regulation), inrush (peak, I2t) and turn-off per load case"
ROLES = ("source", "load", "scope")

PARAMETERS = [
    Parameter("vin_v", "V", [48.0], minimum=0.0, maximum=1500.0, kind="float_list", help="input voltages"),
    Parameter("vout_nominal_v", "V", 5.0, minimum=0.0, maximum=1500.0, help="expected output (sets the screen)"),
    Parameter("cc_load_a", "A", 5.0, minimum=0.0, maximum=1000.0, help="constant-current case (0 = skip)"),
    Parameter("cr_load_ohm", "ohm", 1.25, minimum=0.0, maximum=1e6, help="resistive case (0 = skip)"),
    Parameter("cap_load_f", "F", 10e-3, minimum=0.0, maximum=1.0, help="capacitance of the capacitive case (0 = skip)"),
    Parameter("cap_load_cc_a", "A", 1.0, minimum=0.0, maximum=1000.0, help="CC load beside the capacitance"),
    Parameter("source_current_limit_a", "A", None, minimum=0.0, maximum=1000.0, optional=True,
              help="source current limit during the start, which limits the inrush (default: the station's "
                   "source_current_max_a)"),
    Parameter("trigger_on", "", "input", kind="str", choices=("input", "output"),
              help="edge the scope triggers on: the input (source) rising, or the output rising (then give "
                   "pre_trigger_s longer than the turn-on delay, so the input edge is in the record)"),
    Parameter("vin_trigger_fraction", "", 0.5, minimum=0.01, maximum=0.99,
              help="the scope triggers on the input rising through this fraction of its setting"),
    Parameter("vout_trigger_fraction", "", 0.5, minimum=0.01, maximum=0.99,
              help="with trigger_on = output: the output rising through this fraction of vout_nominal_v"),
    Parameter("vin_level_fraction", "", 0.9, minimum=0.01, maximum=0.999,
              help="the turn-on delay counts from the input reaching this fraction of its setting"),
    Parameter("band_v", "V", 0.05, minimum=0.0, maximum=100.0, help="half-width of the regulation band"),
    Parameter("record_s", "s", 0.04, minimum=1e-6, maximum=10.0, help="turn-on record length"),
    Parameter("off_record_s", "s", 0.2, minimum=1e-6, maximum=10.0, help="turn-off record length"),
    Parameter("pre_trigger_s", "s", 0.005, minimum=0.0, maximum=10.0, help="record before the trigger"),
    Parameter("points", "", 40000, minimum=100, maximum=2_000_000, kind="int", help="record points"),
    Parameter("vout_channel", "", 1, minimum=1, maximum=8, kind="int", help="scope channel on the output voltage"),
    Parameter("vin_channel", "", 2, minimum=1, maximum=8, kind="int", help="scope channel on the input voltage"),
    Parameter("iin_channel", "", 3, minimum=0, maximum=8, kind="int",
              help="scope channel on the input current (0 = no inrush measurement)"),
    Parameter("off_wait_s", "s", 0.3, minimum=0.0, maximum=600.0,
              help="wait with everything off before each start (input capacitance run down)"),
    Parameter("acquire_timeout_s", "s", 10.0, minimum=0.1, maximum=600.0, help="longest wait for one trigger"),
]


def _cases(p: Parameters) -> list[dict]:
    cases = []
    if p.cc_load_a > 0:
        cases.append({"load_case": "cc", "load_mode": "CC", "load_value": p.cc_load_a, "cap_f": 0.0})
    if p.cr_load_ohm > 0:
        cases.append({"load_case": "cr", "load_mode": "CR", "load_value": p.cr_load_ohm, "cap_f": 0.0})
    if p.cap_load_f > 0:
        cases.append({"load_case": "cap", "load_mode": "CC", "load_value": p.cap_load_cc_a, "cap_f": p.cap_load_f})
    return cases


def plan(p: Parameters) -> list[dict]:
    """One start and stop per input voltage and load case."""
    return [{"vin_set_v": vin, **case} for vin in p.vin_v for case in _cases(p)]


def _screen(scope, ch: int, full: float) -> None:
    scope.set_channel_enabled(ch, True)
    scope.set_coupling(ch, "DC")
    scope.set_bandwidth_limit(ch, None)
    scope.set_scale(ch, max(full, 1e-3) / 7.0)      # 0 … full fits with a division spare each side
    scope.set_offset(ch, full / 2.0)


def _probes(scope, p: Parameters) -> None:
    setter = getattr(scope, "set_fixture_probe", None)
    if setter is None:
        return
    setter(p.vout_channel, "vout")
    setter(p.vin_channel, "vin")
    if p.iin_channel:
        setter(p.iin_channel, "input_current")


def _set_load(load, point: dict) -> None:
    load.set_mode(point["load_mode"])
    if point["load_mode"] == "CR":
        load.set_resistance(point["load_value"])
    else:
        load.set_current(point["load_value"])


def run(bench, p: Parameters) -> None:
    from benchctl.analysis.inrush import inrush_metrics
    from benchctl.analysis.turn_on import input_edge_s, turn_off_metrics, turn_on_metrics

    source, load, scope = bench.source, bench.load, bench.role("scope")
    scope.set_data_format("int16")
    _probes(scope, p)
    limit_a = bench.limits.source_current_max_a if p.source_current_limit_a is None else p.source_current_limit_a
    for point in bench.sweep(plan(p)):
        vin = point["vin_set_v"]
        bench.power_down()
        scope.set_fixture_load_capacitance(point["cap_f"])
        bench.wait(p.off_wait_s)
        source.set_current_limit(limit_a)
        source.set_voltage(vin)
        _set_load(load, point)
        _screen(scope, p.vout_channel, 1.2 * p.vout_nominal_v)
        _screen(scope, p.vin_channel, 1.2 * vin)
        if p.iin_channel:
            _screen(scope, p.iin_channel, 1.2 * limit_a)
        scope.set_record(p.record_s, p.points, pre_trigger_s=p.pre_trigger_s)
        if p.trigger_on == "output":
            scope.set_trigger(p.vout_channel, level=p.vout_trigger_fraction * p.vout_nominal_v, slope="rising")
        else:
            scope.set_trigger(p.vin_channel, level=p.vin_trigger_fraction * vin, slope="rising")
        load.set_input(True)
        scope.arm()
        source.set_output(True)
        scope.wait_triggered(p.acquire_timeout_s)
        vout, vin_w = scope.fetch_waveform(p.vout_channel), scope.fetch_waveform(p.vin_channel)
        iin = scope.fetch_waveform(p.iin_channel) if p.iin_channel else None
        t_in = input_edge_s(vin_w.t_s, vin_w.values, p.vin_level_fraction * vin)
        on = turn_on_metrics(vout.t_s, vout.values, t_input_s=t_in, band_v=p.band_v,
                             base_before_s=0.0 if t_in is None else min(0.0, t_in))
        rush = inrush_metrics(iin.t_s, iin.values, source_limit_a=limit_a) if iin is not None else None
        bench.mark_change()
        # turn-off: scope on the input falling, the source off first (the load drains the output)
        scope.set_record(p.off_record_s, p.points, pre_trigger_s=p.pre_trigger_s)
        scope.set_trigger(p.vin_channel, level=p.vin_level_fraction * vin, slope="falling")
        scope.arm()
        source.set_output(False)
        scope.wait_triggered(p.acquire_timeout_s)
        vout_off, vin_off = scope.fetch_waveform(p.vout_channel), scope.fetch_waveform(p.vin_channel)
        t_off = input_edge_s(vin_off.t_s, vin_off.values, p.vin_level_fraction * vin, rising=False)
        off = turn_off_metrics(vout_off.t_s, vout_off.values, t_input_s=t_off, final_v=0.0)
        clipped = any(w.clipped_samples for w in (vout, vin_w, vout_off) + ((iin,) if iin is not None else ()))

        def num(x: float | None) -> float:
            return math.nan if x is None else float(x)

        values = {
            "vin_set_v": vin, "cap_load_f": point["cap_f"],
            "load_cc_set_a": point["load_value"] if point["load_mode"] == "CC" else 0.0,
            "load_cr_set_ohm": point["load_value"] if point["load_mode"] == "CR" else math.inf,
            "cc_load": 1.0 if point["load_case"] == "cc" else 0.0,
            "cr_load": 1.0 if point["load_case"] == "cr" else 0.0,
            "turn_on_delay_s": num(on.delay_s), "rise_time_s": num(on.rise_time_s),
            "overshoot_v": on.overshoot_v, "overshoot_pct": on.overshoot_pct,
            "monotonic": 1.0 if on.monotonic else 0.0, "largest_dip_v": on.largest_dip_v,
            "time_to_regulation_s": num(on.time_to_regulation_s), "vout_final_v": on.top_v,
            "fall_time_s": num(off.fall_time_s), "turn_off_delay_s": num(off.delay_s),
            "turn_off_undershoot_v": off.undershoot_v,
            "clipped_samples": float(sum(w.clipped_samples for w in (vout, vin_w, vout_off))),
        }
        if rush is not None:
            values.update(inrush_peak_a=rush.peak_a, inrush_i2t_a2s=rush.i2t_a2s, inrush_duration_s=rush.duration_s,
                          source_limit_a=limit_a, inrush_peak_to_limit=num(rush.peak_to_limit))
        seq = bench.record(values, units={"load_cr_set_ohm": "ohm", "cc_load": "", "cr_load": "", "monotonic": "", "overshoot_pct": "%",
                                          "clipped_samples": "", "inrush_peak_to_limit": "",
                                          "inrush_i2t_a2s": "A2s"},
                           tag=point["load_case"])
        columns = {"t_s": vout.t_s, "vout_v": vout.values, "vin_v": vin_w.values}
        if iin is not None:
            columns["iin_a"] = iin.values
        bench.record_array("waveform", columns, point_seq=seq, meta={
            "kind": "turn_on", "load_case": point["load_case"], "vin_set_v": vin, "t_input_s": t_in,
            "t_low_s": on.t_low_s, "t_high_s": on.t_high_s, "vout_final_v": on.top_v, "band_v": on.band_v,
            "reason": on.reason, "clipped": bool(clipped),
            "inrush": None if rush is None else {"start_s": rush.start_s, "end_s": rush.end_s, "peak_a": rush.peak_a,
                                                 "source_limit_a": limit_a}})
        bench.record_array("turn_off_waveform", {"t_s": vout_off.t_s, "vout_v": vout_off.values, "vin_v": vin_off.values},
                           point_seq=seq, meta={"kind": "turn_off", "load_case": point["load_case"],
                                                "vin_set_v": vin, "t_input_s": t_off, "t_high_s": off.t_high_s,
                                                "t_low_s": off.t_low_s, "reason": off.reason})
    bench.power_down()
    scope.set_fixture_load_capacitance(0.0)


def analyse(points, p: Parameters) -> list[Result]:
    """Per start: delay, rise, overshoot, regulation, monotonic, fall, undershoot, inrush; and the worst cases."""
    import numpy as np

    results: list[Result] = []
    if points.empty:
        return results
    method = "IEEE 181-2011 reference levels 10/90 % (from memory); delay from the input's level"
    quantities = [("turn_on_delay_s", "s"), ("rise_time_s", "s"), ("overshoot_pct", "%"),
                  ("time_to_regulation_s", "s"), ("fall_time_s", "s"), ("turn_off_undershoot_v", "V"),
                  ("inrush_peak_a", "A"), ("inrush_i2t_a2s", "A2s")]
    for _, row in points.iterrows():
        scope = {"seq": int(row["seq"]), "vin_set_v": float(row["vin_set_v"]), "load_case": str(row["tag"])}
        clipped = bool(row.get("clipped_samples", 0.0) or 0.0)
        for name, unit in quantities:
            if name not in row.index:
                continue
            value = row[name]
            found = value is not None and bool(np.isfinite(value))
            details: dict = {"method": method}
            if clipped:
                details.update(flags=["clipped"], flag_reasons="a trace touched the screen's limits")
            if not found:
                details["reason"] = "not measured in this record; lengthen record_s or check the trigger"
            results.append(Result(name, float(value) if found else None, unit, scope=scope, details=details))
        results.append(Result("turn_on_monotonic", float(row["monotonic"]), "", scope=scope,
                              details={"method": "no fall beyond the noise between the 10 % and 90 % levels",
                                       "largest_dip_v": float(row["largest_dip_v"])}))
    for name, unit in (("overshoot_pct", "%"), ("time_to_regulation_s", "s"), ("inrush_peak_a", "A"),
                       ("inrush_i2t_a2s", "A2s"), ("turn_on_delay_s", "s")):
        if name in points.columns:
            col = points[name].to_numpy(float)
            if np.isfinite(col).any():
                k = int(np.nanargmax(col))
                results.append(Result(f"max_{name}", float(col[k]), unit,
                                      scope={"vin_set_v": float(points["vin_set_v"].iloc[k]),
                                             "load_case": str(points["tag"].iloc[k])}))
    return results
