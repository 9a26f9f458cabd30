"""Cross-regulation of a two-output converter: each output as the other's load moves.

At every line voltage the two loads are stepped over the grid of their levels
(``iout1_a`` on the main output's ``load``, ``iout2_a`` on the second output's ``load2``;
the lowest and highest of each are the minimum and maximum). At each point both output
voltages are settled together (``output_meter`` on the main output, ``output2_meter`` on
the second), then read ``n_readings`` times with both load currents, every instrument at
the same moment, and recorded as means with their standard deviations.

Derived (:mod:`benchctl.analysis.cross_regulation`, common practice): per line voltage
and output, the cross-regulation (change of that output as the other's load goes from
minimum to maximum, its own held; the worst over its own levels) and the load regulation
(its own load min → max, the other held), in V and in % of the output's nominal, and the
window (largest deviation from nominal); and the worst of each over the line voltages.
"""

from __future__ import annotations

from benchctl.procedure import Parameter, Parameters, Result, Role, power_parameters

NAME = "cross_regulation"
DESCRIPTION = "cross-regulation and load regulation of a two-output converter on two loads"
ROLES = ("source", "load", Role("load2", "electronic_load"), "output_meter", Role("output2_meter", "power_meter"))

PARAMETERS = [
    Parameter("vin_v", "V", [36.0, 48.0, 75.0], minimum=0.0, maximum=1500.0, kind="float_list",
              help="line voltages"),
    Parameter("iout1_a", "A", [0.5, 5.0], minimum=0.0, maximum=1000.0, kind="float_list",
              help="main output load levels (lowest = minimum, highest = maximum)"),
    Parameter("iout2_a", "A", [0.1, 1.5], minimum=0.0, maximum=1000.0, kind="float_list",
              help="second output load levels (lowest = minimum, highest = maximum)"),
    Parameter("vout1_nom_v", "V", 5.0, minimum=0.0, maximum=1500.0, help="nominal main output voltage"),
    Parameter("vout2_nom_v", "V", 3.3, minimum=0.0, maximum=1500.0, help="nominal second output voltage"),
    *power_parameters(startup_delay_s=0.05),
    Parameter("settle_rel_tol", "", 2e-4, minimum=0.0, maximum=0.1,
              help="settle: largest predicted residual of both output voltages, relative"),
    Parameter("settle_abs_tol_v", "V", 2e-4, minimum=0.0, maximum=1.0,
              help="settle: largest predicted residual of both output voltages, absolute"),
    Parameter("settle_timeout_s", "s", 10.0, minimum=0.0, maximum=600.0, help="settle: give up (point unsettled)"),
    Parameter("n_readings", "", 3, minimum=1, maximum=1000, kind="int",
              help="readings per quantity and point, taken together and averaged"),
]


def plan(p: Parameters) -> list[dict]:
    """Line, then main load, then second load, ascending (the second load snakes to halve its steps)."""
    points = []
    flip = False
    for vin in p.vin_v:
        for i1 in sorted(p.iout1_a):
            levels = sorted(p.iout2_a, reverse=flip)
            flip = not flip
            for i2 in levels:
                points.append({"vin_set_v": float(vin), "iout1_set_a": float(i1), "iout2_set_a": float(i2)})
    return points


def run(bench, p: Parameters) -> None:
    source, load, load2 = bench.source, bench.load, bench.role("load2")
    meter1, meter2 = bench.output_meter, bench.role("output2_meter")
    points = plan(p)
    first = points[0]
    load2.set_mode("CC")
    load2.set_current(first["iout2_set_a"])
    bench.power_up(first["vin_set_v"], first["iout1_set_a"], source_current_limit_a=p.source_current_limit_a,
                   startup_delay_s=p.startup_delay_s)
    load2.set_input(True)
    i2_now = first["iout2_set_a"]
    readers = {"vout1_v": meter1.measure_voltage, "vout2_v": meter2.measure_voltage}
    for point in bench.sweep(points):
        bench.set_operating_point(point["vin_set_v"], point["iout1_set_a"])
        if point["iout2_set_a"] != i2_now:
            load2.set_current(point["iout2_set_a"])
            i2_now = point["iout2_set_a"]
            bench.mark_change()
        settled = bench.settle_readings(readers, rel_tol=p.settle_rel_tol, abs_tol=p.settle_abs_tol_v,
                                        timeout_s=p.settle_timeout_s)
        readings = bench.measure_together({**readers, "iout1_a": load.measure_current,
                                           "iout2_a": load2.measure_current, "vin_v": source.measure_voltage},
                                          n=p.n_readings)
        bench.record({"vin_set_v": point["vin_set_v"], "iout1_set_a": point["iout1_set_a"],
                      "iout2_set_a": point["iout2_set_a"]}, readings=readings, settle=settled)
    bench.power_down()


def analyse(points, p: Parameters) -> list[Result]:
    """Per line and output: cross-regulation, load regulation, window; the worst of each over the lines."""
    from benchctl.analysis.cross_regulation import output_regulation

    results: list[Result] = []
    if points.empty or "vout2_v" not in points.columns:
        return results
    method = ("change of an output as the other's load goes min -> max (cross) or its own does (load), "
              "the other held; worst over the held levels (common practice)")
    worst: dict[str, tuple[float, float]] = {}
    for vin in sorted(points["vin_set_v"].unique()):
        rows = points[points["vin_set_v"] == vin]
        unsettled = int((rows["settled"] == False).sum()) if "settled" in rows.columns else 0  # noqa: E712
        for k, (own, other, v, nominal) in {
                1: ("iout1_set_a", "iout2_set_a", "vout1_v", p.vout1_nom_v),
                2: ("iout2_set_a", "iout1_set_a", "vout2_v", p.vout2_nom_v)}.items():
            r = output_regulation(rows[own], rows[other], rows[v], nominal_v=nominal)
            scope = {"vin_set_v": float(vin), "output": k}
            base: dict = {"method": method, "nominal_v": nominal}
            if unsettled:
                base.update(flags=["unsettled"], flag_reasons=f"{unsettled} point(s) at this line did not settle")
            for name, value, unit, extra in (
                    (f"cross_regulation_out{k}_pct", r.cross_pct, "%", {"at_own_load_a": r.cross_at_own_a,
                                                                         "delta_v": r.cross_delta_v,
                                                                         "changes": list(r.cross_changes)}),
                    (f"cross_regulation_out{k}_v", r.cross_delta_v, "V", {"at_own_load_a": r.cross_at_own_a}),
                    (f"load_regulation_out{k}_pct", r.load_pct, "%", {"at_other_load_a": r.load_at_other_a,
                                                                       "delta_v": r.load_delta_v,
                                                                       "changes": list(r.load_changes)}),
                    (f"window_out{k}_pct", r.window_pct, "%", {"v_min_v": r.v_min_v, "v_max_v": r.v_max_v})):
                details = {**base, **extra}
                if value is None:
                    details["reason"] = "no pair of points with the other load held at one level"
                results.append(Result(name, value, unit, scope=scope, details=details))
                if value is not None and unit == "%":
                    if name not in worst or abs(value) > abs(worst[name][0]):
                        worst[name] = (value, float(vin))
    for name, (value, vin) in sorted(worst.items()):
        results.append(Result(f"worst_{name}", value, "%", scope={"vin_set_v": vin},
                              details={"what": "largest magnitude over the line voltages"}))
    return results
