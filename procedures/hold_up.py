"""Hold-up: time from the input dropping out until the output leaves regulation, at several loads.

At each load the DUT runs from ``vin_v`` with the fixture's bulk capacitor ``holdup_capacitance_f``
across its input; the input power is read, the scope is armed single-shot on the input falling
through ``trigger_fraction`` of its level, and the fixture's series switch opens (a dropout:
nothing sinks current from the bulk capacitance; on a real bench the station's relay or
MOSFET switch, ``set_fixture_input_connected``).  Measured (:mod:`benchctl.analysis.hold_up`):
the dropout moment from the v² line, the moment the output leaves ±``band_v``, the hold-up
time between, and the input voltage then; compared with the energy the capacitance
(``holdup_capacitance_f`` + ``dut_input_capacitance_f``) delivers, ½·C·(V1² − V2²) = P·t.
"""

from __future__ import annotations

import math

from benchctl.procedure import Parameter, Parameters, Result

NAME = "hold_up"
DESCRIPTION = "hold-up time after an input dropout at several loads, against the bulk capacitance's energy"
ROLES = ("source", "load", "input_meter", "scope")

PARAMETERS = [
    Parameter("vin_v", "V", 48.0, minimum=0.0, maximum=1500.0, help="input voltage before the dropout"),
    Parameter("iout_a", "A", [4.0, 5.0], minimum=0.0, maximum=1000.0, kind="float_list", help="CC loads"),
    Parameter("holdup_capacitance_f", "F", 470e-6, minimum=0.0, maximum=1.0, help="fixture bulk capacitor"),
    Parameter("dut_input_capacitance_f", "F", 10e-6, minimum=0.0, maximum=1.0,
              help="the DUT's own input capacitance (its parts list)"),
    Parameter("vout_nominal_v", "V", 5.0, minimum=0.0, maximum=1500.0, help="the regulated output"),
    Parameter("band_v", "V", 0.25, minimum=0.0, maximum=100.0, help="regulation band half-width (5 % of 5 V)"),
    Parameter("trigger_fraction", "", 0.98, minimum=0.5, maximum=0.999, help="trigger on the input falling"),
    Parameter("record_s", "s", 0.05, minimum=1e-5, maximum=10.0, help="record length"),
    Parameter("pre_trigger_s", "s", 0.005, minimum=0.0, maximum=10.0, help="record before the trigger"),
    Parameter("points", "", 50000, minimum=100, maximum=2_000_000, kind="int", help="record points"),
    Parameter("vout_channel", "", 1, minimum=1, maximum=8, kind="int", help="scope channel on the output"),
    Parameter("vin_channel", "", 2, minimum=1, maximum=8, kind="int", help="scope channel on the DUT input"),
    Parameter("settle_s", "s", 0.3, minimum=0.0, maximum=600.0, help="wait after a start before the dropout"),
    Parameter("acquire_timeout_s", "s", 10.0, minimum=0.1, maximum=600.0, help="longest wait for the trigger"),
    Parameter("settle_rel_tol", "", 1e-3, minimum=0.0, maximum=0.1, help="settle: relative residual of Pin"),
    Parameter("settle_abs_tol_w", "W", 5e-3, minimum=0.0, maximum=100.0, help="settle: absolute residual of Pin"),
    Parameter("settle_timeout_s", "s", 10.0, minimum=0.0, maximum=600.0, help="settle: give up (point unsettled)"),
]


def plan(p: Parameters) -> list[dict]:
    """One dropout per load."""
    return [{"iout_set_a": i} for i in p.iout_a]


def _screen(scope, ch: int, full: float) -> None:
    scope.set_channel_enabled(ch, True)
    scope.set_coupling(ch, "DC")
    scope.set_bandwidth_limit(ch, None)
    scope.set_scale(ch, max(full, 1e-3) / 7.0)
    scope.set_offset(ch, full / 2.0)


def run(bench, p: Parameters) -> None:
    from benchctl.analysis.hold_up import energy_hold_up_s, hold_up_metrics

    source, load, scope, meter = bench.source, bench.load, bench.role("scope"), bench.input_meter
    scope.set_data_format("int16")
    if getattr(scope, "set_fixture_probe", None) is not None:
        scope.set_fixture_probe(p.vout_channel, "vout")
        scope.set_fixture_probe(p.vin_channel, "vin")
    c_total = p.holdup_capacitance_f + p.dut_input_capacitance_f
    try:
        for point in bench.sweep(plan(p)):
            bench.power_down()
            scope.set_fixture_input_connected(True)
            scope.set_fixture_input_capacitance(p.holdup_capacitance_f)
            bench.power_up(p.vin_v, point["iout_set_a"], startup_delay_s=p.settle_s)
            # P_in sets the energy estimate: read it settled (a start's load ramp and the bulk
            # capacitor's charge are still moving it after the start-up wait), the verdict stored.
            settled = bench.settle_readings({"pin_w": meter.measure_power}, rel_tol=p.settle_rel_tol,
                                            abs_tol=p.settle_abs_tol_w, timeout_s=p.settle_timeout_s)
            p_in = float(settled.final_value)
            _screen(scope, p.vout_channel, 1.2 * p.vout_nominal_v)
            _screen(scope, p.vin_channel, 1.2 * p.vin_v)
            scope.set_record(p.record_s, p.points, pre_trigger_s=p.pre_trigger_s)
            scope.set_trigger(p.vin_channel, level=p.trigger_fraction * p.vin_v, slope="falling")
            scope.arm()
            scope.set_fixture_input_connected(False)
            scope.wait_triggered(p.acquire_timeout_s)
            vo, vi = scope.fetch_waveform(p.vout_channel), scope.fetch_waveform(p.vin_channel)
            m = hold_up_metrics(vi.t_s, vi.values, vo.values, band_v=p.band_v)
            energy_s = (energy_hold_up_s(c_total, m.v1_v, m.v2_v, p_in)
                        if m.v2_v is not None and p_in > 0 and c_total > 0 else math.nan)
            hold = math.nan if m.hold_up_s is None else m.hold_up_s
            values = {"iout_set_a": point["iout_set_a"], "pin_w": p_in, "vin_before_v": m.v1_v,
                      "vin_at_exit_v": math.nan if m.v2_v is None else m.v2_v, "hold_up_s": hold,
                      "energy_hold_up_s": energy_s,
                      "hold_up_to_energy": hold / energy_s if energy_s and math.isfinite(energy_s) else math.nan,
                      "hold_up_at_least_s": math.nan if m.at_least_s is None else m.at_least_s,
                      "clipped_samples": float(vo.clipped_samples + vi.clipped_samples)}
            seq = bench.record(values, units={"hold_up_to_energy": "", "clipped_samples": ""}, settle=settled,
                               tag="hold_up")
            bench.record_array("waveform", {"t_s": vo.t_s, "vout_v": vo.values, "vin_v": vi.values}, point_seq=seq,
                               meta={"kind": "hold_up", "dropout_s": m.dropout_s, "exit_s": m.exit_s,
                                     "band_v": p.band_v, "reason": m.reason})
            scope.set_fixture_input_connected(True)
    finally:
        bench.power_down()
        scope.set_fixture_input_connected(True)
        scope.set_fixture_input_capacitance(0.0)


def analyse(points, p: Parameters) -> list[Result]:
    """Hold-up per load (a lower bound, flagged, where the record ended first), its ratio to the
    energy estimate, and the shortest."""

    import numpy as np

    results: list[Result] = []
    if points.empty:
        return results
    method = "dropout from the v² line, exit from ±band (benchctl.analysis.hold_up); energy ½·C·(V1²−V2²)/P"
    for _, row in points.iterrows():
        scope = {"iout_set_a": float(row["iout_set_a"])}
        ok = bool(np.isfinite(row["hold_up_s"]))
        at_least = float(row.get("hold_up_at_least_s", math.nan))
        details: dict = {"method": method}
        flags, why = [], []
        value = float(row["hold_up_s"]) if ok else None
        if not ok and math.isfinite(at_least):
            # the output was still in regulation when the record ended: a lower bound, never a plain figure
            value = at_least
            flags.append("lower_bound")
            why.append(f"the output stayed in band to the end of the record; the hold-up is at least {at_least:.4g} s "
                       "(raise record_s to measure it)")
        elif not ok:
            details["reason"] = "no dropout of the input was seen in the record"
        if row.get("clipped_samples", 0.0):
            flags.append("clipped")
            why.append("a trace touched the screen's limits")
        if flags:
            details.update(flags=flags, flag_reasons="; ".join(why))
        results.append(Result("hold_up_s", value, "s", scope=scope, details=details))
        if np.isfinite(row["hold_up_to_energy"]):
            results.append(Result("hold_up_to_energy", float(row["hold_up_to_energy"]), "", scope=scope))
    col = points["hold_up_s"].to_numpy(float)
    if np.isfinite(col).any():
        k = int(np.nanargmin(col))
        bounds = points["hold_up_at_least_s"].to_numpy(float) if "hold_up_at_least_s" in points.columns else col * np.nan
        details = {}
        if np.isfinite(bounds).any() and np.nanmin(bounds) < col[k]:
            # a load whose record ended first might hold up for less than the shortest measured one
            details = {"flags": ["upper_bound"], "flag_reasons": "at a load whose record ended with the output still in "
                       f"band the hold-up is only known to exceed {np.nanmin(bounds):.4g} s"}
        results.append(Result("min_hold_up_s", float(col[k]), "s", details=details,
                              scope={"iout_set_a": float(points["iout_set_a"].iloc[k])}))
    return results
