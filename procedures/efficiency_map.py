"""Efficiency and regulation map over the line x load envelope.

For every input voltage, the load current is stepped (ascending, and optionally back down
for a hysteresis check); at each point the output is settled, then input and output
voltage, current and power are read with the meters and recorded. Derived results:
efficiency per point, line and load regulation, output deviation from nominal, the
four-point average efficiency at 25/50/75/100 % load with the indicative external-supply
limit, and the no-load input power.
"""

from __future__ import annotations

from benchctl.procedure import Parameter, Parameters, Result, ascending_descending, power_parameters

NAME = "efficiency_map"
DESCRIPTION = "efficiency, line and load regulation over line x load"
ROLES = ("source", "load", "input_meter", "output_meter")

PARAMETERS = [
    Parameter("vin_v", "V", [36.0, 48.0, 60.0, 75.0], minimum=0.0, maximum=1500.0, kind="float_list",
              help="input voltages to sweep"),
    Parameter("iout_rated_a", "A", 5.0, minimum=0.0, maximum=1000.0, help="rated (nameplate) output current"),
    Parameter("load_pct", "%", [0.0, 10.0, 20.0, 25.0, 40.0, 50.0, 60.0, 75.0, 90.0, 100.0],
              minimum=0.0, maximum=150.0, kind="float_list", help="load points in % of rated current"),
    Parameter("iout_a", "A", None, minimum=0.0, maximum=1000.0, kind="float_list", optional=True,
              help="explicit load currents; overrides load_pct when given"),
    Parameter("descending", "", False, kind="bool", help="also step the load back down (hysteresis)"),
    Parameter("vout_nom_v", "V", 5.0, minimum=0.0, maximum=1500.0, help="nominal output voltage"),
    *power_parameters(startup_delay_s=0.05),
    Parameter("settle_rel_tol", "", 2e-4, minimum=0.0, maximum=0.1, help="settle: relative agreement of readings"),
    Parameter("settle_abs_tol_v", "V", 1e-3, minimum=0.0, maximum=1.0, help="settle: absolute agreement of readings"),
    Parameter("settle_abs_tol_a", "A", 2e-4, minimum=0.0, maximum=10.0, help="settle: absolute agreement of input current readings"),
    Parameter("settle_timeout_s", "s", 5.0, minimum=0.0, maximum=600.0, help="settle: give up (point unsettled)"),
    Parameter("load_regulation_convention", "", "textbook", kind="str", choices=("textbook", "rated"),
              help="denominator of load regulation: V at full load (textbook) or the rated voltage"),
]


def load_currents(p: Parameters) -> list[float]:
    if p.iout_a is not None:
        return sorted(set(p.iout_a))
    return sorted({round(p.iout_rated_a * pct / 100.0, 9) for pct in p.load_pct})


def plan(p: Parameters) -> list[dict]:
    """Every operating point in the order it is measured."""
    points = []
    for vin in p.vin_v:
        for tag, iout in ascending_descending(load_currents(p), p.descending):
            points.append({"vin_set_v": vin, "iout_set_a": iout, "tag": tag})
    return points


def run(bench, p: Parameters) -> None:
    source, load = bench.source, bench.load
    meter_in, meter_out = bench.input_meter, bench.output_meter
    points = plan(p)
    bench.power_up(points[0]["vin_set_v"], points[0]["iout_set_a"],
                   source_current_limit_a=p.source_current_limit_a, startup_delay_s=p.startup_delay_s)
    vin_now = points[0]["vin_set_v"]
    for point in bench.sweep(points):
        if point["vin_set_v"] != vin_now:
            source.set_voltage(point["vin_set_v"])
            vin_now = point["vin_set_v"]
        load.set_current(point["iout_set_a"])
        # Settle the output voltage, then the input current (a load step moves the input
        # current far more than the regulated output).
        settled = bench.settle(
            meter_out.measure_voltage, rel_tol=p.settle_rel_tol, abs_tol=p.settle_abs_tol_v,
            timeout_s=p.settle_timeout_s,
        )
        if settled.settled:
            settled = bench.settle(
                meter_in.measure_current, rel_tol=p.settle_rel_tol, abs_tol=p.settle_abs_tol_a,
                timeout_s=p.settle_timeout_s,
            )
        vin = meter_in.measure_voltage()
        iin = meter_in.measure_current()
        pin = meter_in.measure_power()
        vout = meter_out.measure_voltage()
        iout = meter_out.measure_current()
        pout = meter_out.measure_power()
        bench.record(
            {
                "vin_set_v": point["vin_set_v"], "iout_set_a": point["iout_set_a"],
                "vin_v": vin, "iin_a": iin, "pin_w": pin,
                "vout_v": vout, "iout_a": iout, "pout_w": pout,
            },
            settle=settled, tag=point["tag"],
        )
    load.set_input(False)
    source.set_output(False)


def analyse(points, p: Parameters) -> list[Result]:
    """Derived results from the stored points (a pandas DataFrame, one row per point)."""
    import numpy as np

    from benchctl.analysis.average_efficiency import four_point_average, no_load_power_limit_w
    from benchctl.analysis.efficiency import efficiency, loss_w, peak_efficiency
    from benchctl.analysis.regulation import (
        line_regulation_by_load,
        load_regulation_by_line,
        output_deviation_pct,
    )

    results: list[Result] = []
    if points.empty:
        return results
    eff = efficiency(points["pout_w"], points["pin_w"])
    loss = loss_w(points["pout_w"], points["pin_w"])
    dev = output_deviation_pct(points["vout_v"], p.vout_nom_v)
    for k, seq in enumerate(points["seq"]):
        scope = {"seq": int(seq), "vin_set_v": float(points["vin_set_v"].iloc[k]), "iout_set_a": float(points["iout_set_a"].iloc[k])}
        if np.isfinite(eff[k]) and scope["iout_set_a"] > 0:  # undefined at no load: Pout is ~0 there
            results.append(Result("efficiency", float(eff[k]), "", scope=scope))
        results.append(Result("loss_w", float(loss[k]), "W", scope=scope))
        results.append(Result("vout_deviation_pct", float(dev[k]), "%", scope=scope))

    vin_set = points["vin_set_v"].to_numpy(float)
    iout_set = points["iout_set_a"].to_numpy(float)
    vout = points["vout_v"].to_numpy(float)
    source_note = "(Vo at Vin,max - Vo at Vin,min)/Vo,nom x 100 at fixed load (common practice)"
    for r in line_regulation_by_load(vin_set, iout_set, vout, p.vout_nom_v):
        results.append(Result("line_regulation_pct", r.line_regulation_pct, "%",
                              details={**r.__dict__, "definition": source_note}, scope={"iout_set_a": r.iout_a}))
    definition = ("(V_NL - V_FL)/V_FL x 100 (textbook)" if p.load_regulation_convention == "textbook"
                  else "(Vo,min load - Vo,max load)/V_rated x 100 (IEC 61204 style, from memory)")
    for r in load_regulation_by_line(vin_set, iout_set, vout, convention=p.load_regulation_convention,
                                     vout_rated_v=p.vout_nom_v):
        results.append(Result("load_regulation_pct", r.load_regulation_pct, "%",
                              details={**r.__dict__, "definition": definition}, scope={"vin_set_v": r.vin_v}))
    peak = peak_efficiency(vin_set, iout_set, eff)
    if peak is not None:
        results.append(Result("peak_efficiency", peak.efficiency, "", scope={"vin_set_v": peak.vin_v, "iout_set_a": peak.iout_a}))
    results.append(Result("max_abs_vout_deviation_pct", float(np.nanmax(np.abs(dev))), "%"))

    for vin in sorted(set(vin_set)):
        sel = vin_set == vin
        avg = four_point_average(vin, iout_set[sel], eff[sel], iout_rated_a=p.iout_rated_a, vout_nom_v=p.vout_nom_v)
        results.append(Result(
            "average_efficiency_4pt", avg.average_efficiency if avg.found else None, "",
            details={"found": avg.found, "reason": avg.reason, "limit_efficiency": avg.limit_efficiency,
                     "supply_class": avg.supply_class, "meets_indicative_limit": avg.meets_indicative_limit,
                     "point_efficiencies": list(avg.point_efficiencies), "note": avg.note,
                     "source": "10 CFR 430 App. Z average; limit 10 CFR 430.32(w) Level VI (from memory)"},
            scope={"vin_set_v": float(vin)},
        ))
        no_load = sel & (iout_set == 0.0)
        if no_load.any():
            pin0 = float(points["pin_w"].to_numpy(float)[no_load].mean())
            results.append(Result(
                "no_load_input_power_w", pin0, "W",
                details={"indicative_limit_w": no_load_power_limit_w(p.vout_nom_v * p.iout_rated_a),
                         "note": "indicative only: Level VI no-load limit for external supplies (from memory)"},
                scope={"vin_set_v": float(vin)},
            ))
    return results
