"""Efficiency and regulation map over the line x load envelope.

For every input voltage, the load current is stepped (ascending, and optionally back down
for a hysteresis check). At each point the input and output power are read together (one
thread per meter) until the fit of their approach predicts both within the settle
tolerance (:mod:`benchctl.settle`); optionally the input power must also be stable over a
longer window (slow thermal drift, :mod:`benchctl.stability`; a warm-up at full load can
precede the first point). Then input and output voltage, current and power and the
source's read-back are read ``n_readings`` times, every instrument at the same moment (a
meter's V, I and P of one integration where its driver can trigger then fetch), and
recorded as means with their standard deviations; the load current and the source
voltage are verified against their setpoints first, and a point that fails either check
is recorded with ``settled = False`` and the reason.

Rule for the quantities not fitted: input power is the quantity an efficiency point is for
and the slowest to settle (the input filter sits behind the output, and Pin = Pout/η
follows every change downstream); output power is settled with it; the voltages and
currents are read after both, and the load current and source voltage are verified.

Derived results:
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
    Parameter("settle_rel_tol", "", 2e-4, minimum=0.0, maximum=0.1,
              help="settle: largest predicted residual of Pin and Pout, relative to the value"),
    Parameter("settle_abs_tol_w", "W", 1e-3, minimum=0.0, maximum=100.0,
              help="settle: largest predicted residual of Pin and Pout, absolute (light load)"),
    Parameter("settle_timeout_s", "s", 10.0, minimum=0.0, maximum=600.0, help="settle: give up (point unsettled)"),
    Parameter("settle_min_dwell_s", "s", 0.0, minimum=0.0, maximum=3600.0,
              help="settle: least time at each point after its setpoint changed"),
    Parameter("settle_max_tau_s", "s", 10.0, minimum=0.001, maximum=3600.0,
              help="settle: slowest time constant waited out; slower changes are drift (see drift_window_s)"),
    Parameter("dut_time_constant_s", "s", None, minimum=0.0, maximum=3600.0, optional=True,
              help="the DUT's slowest settling time constant (default: the station's, else fitted from the readings)"),
    Parameter("n_readings", "", 5, minimum=1, maximum=1000, kind="int",
              help="readings per quantity and point, taken together and averaged (their sd is stored)"),
    Parameter("verify_rel_tol", "", 5e-3, minimum=0.0, maximum=0.5,
              help="verification: load current and source voltage within this fraction of the setpoint ..."),
    Parameter("verify_abs_tol_a", "A", 1e-3, minimum=0.0, maximum=10.0, help="... plus this for the load current"),
    Parameter("verify_abs_tol_v", "V", 1e-2, minimum=0.0, maximum=100.0, help="... plus this for the source voltage"),
    Parameter("drift_window_s", "s", 0.0, minimum=0.0, maximum=3600.0,
              help="slow drift: window over which Pin must be stable at each point (0: no drift check)"),
    Parameter("drift_max_change_rel", "", 5e-4, minimum=0.0, maximum=0.1,
              help="slow drift: largest change of Pin over the window (regression), relative"),
    Parameter("drift_timeout_s", "s", 600.0, minimum=0.0, maximum=36000.0,
              help="slow drift: give up waiting (point unsettled)"),
    Parameter("warmup_s", "s", 0.0, minimum=0.0, maximum=36000.0,
              help="hold at full load and the first line voltage before the first point (then the drift check)"),
    Parameter("load_regulation_convention", "", "textbook", kind="str", choices=("textbook", "rated"),
              help="denominator of load regulation: V at full load (textbook) or the rated voltage"),
    Parameter("external_supply_limits", "", True, kind="bool",
              help="compare the four-point average and the no-load power with the Level VI limits for external "
                   "power supplies (indicative only: written for AC-DC supplies; turn off for a point-of-load "
                   "converter, where they mean nothing)"),
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
    if p.warmup_s > 0:
        _warm_up(bench, p, points[0]["vin_set_v"], max(load_currents(p)))
    powers = {"pin_w": _power_reader(meter_in), "pout_w": _power_reader(meter_out)}
    readers = {**_meter_readers(meter_in, "vin_v", "iin_a", "pin_w"),
               **_meter_readers(meter_out, "vout_v", "iout_a", "pout_w"), "vsrc_v": source.measure_voltage}
    for point in bench.sweep(points):
        vin_set, iout_set = point["vin_set_v"], point["iout_set_a"]
        bench.set_operating_point(vin_set, iout_set)
        settled = bench.settle_readings(
            powers, settle_on=("pin_w", "pout_w"), rel_tol=p.settle_rel_tol, abs_tol=p.settle_abs_tol_w,
            time_constant_s=p.dut_time_constant_s, min_dwell_s=p.settle_min_dwell_s, timeout_s=p.settle_timeout_s,
            max_tau_s=p.settle_max_tau_s,
        )
        if p.drift_window_s > 0 and bench.settle_enabled:
            drift = bench.wait_stable(meter_in.measure_power, window_s=p.drift_window_s,
                                      max_change_rel=p.drift_max_change_rel, max_change_abs=p.settle_abs_tol_w,
                                      timeout_s=p.drift_timeout_s)
            settled = (settled.with_extra(drift=drift.info()) if drift.stable
                       else settled.unsettled_by(f"input power drifting: {drift.reason}", drift=drift.info()))
        readings = bench.measure_together(readers, n=p.n_readings)
        check = bench.verify({
            "iout_a": (iout_set, readings.mean("iout_a"),
                       bench.setpoint_tolerance(iout_set, p.verify_rel_tol, p.verify_abs_tol_a)),
            "vsrc_v": (vin_set, readings.mean("vsrc_v"),
                       bench.setpoint_tolerance(vin_set, p.verify_rel_tol, p.verify_abs_tol_v)),
        })
        settled = settled.with_verification(check.verified, check.as_dict(), check.reason)
        bench.record({"vin_set_v": vin_set, "iout_set_a": iout_set}, readings=readings, settle=settled,
                     tag=point["tag"])
    bench.power_down()


def _power_reader(meter):
    """The meter's power for the settle. Where the driver gives V, I and P of one integration, all
    three are read (in the same aperture) and V and I checked against the station limits: the
    interlock watch counts that as its own reading of the meter and need not take the
    instrument away from the settle every period."""
    if getattr(meter, "has_measure_all", False):
        return lambda: meter.measure_all()[2]
    return meter.measure_power


def _meter_readers(meter, v_name: str, i_name: str, p_name: str) -> dict:
    """A meter's V, I and P: of one integration where the driver can trigger then fetch, else one by one."""
    if getattr(meter, "has_measure_all", False):
        return {(v_name, i_name, p_name): meter.measure_all}
    return {v_name: meter.measure_voltage, i_name: meter.measure_current, p_name: meter.measure_power}


def _warm_up(bench, p: Parameters, vin_v: float, iout_a: float) -> None:
    """Hold full load at the first line voltage for ``warmup_s``; then, with a drift window, wait
    until the input power is stable (common practice: characterise a warm converter)."""
    bench.set_operating_point(vin_v, iout_a)
    if p.drift_window_s > 0:
        bench.warm_up(bench.input_meter.measure_power, duration_s=p.warmup_s, window_s=p.drift_window_s,
                      max_change_rel=p.drift_max_change_rel, timeout_s=p.drift_timeout_s)
    else:
        bench.wait(p.warmup_s)
        bench.event("warm_up", f"warm-up {p.warmup_s:g} s at {vin_v:g} V, {iout_a:g} A (no drift check)")


#: The instrument (station role) and the measured quantity each recorded value comes from:
#: the accuracy of that role's quantity in the station file gives the value its type B uncertainty.
MEASURED_BY = {
    "vin_v": ("input_meter", "voltage"), "iin_a": ("input_meter", "current"), "pin_w": ("input_meter", "power"),
    "vout_v": ("output_meter", "voltage"), "iout_a": ("output_meter", "current"), "pout_w": ("output_meter", "power"),
}

UNCERTAINTY_METHOD = ("JCGM 100:2008 (GUM): type B from the station's instrument accuracy (4.3, rectangular "
                      "a/sqrt(3) unless stated), type A s/sqrt(N) of the readings (4.2.3), first-order propagation "
                      "(5.1.2, 5.2.2; the % of reading error of one instrument shared by its readings on one range), "
                      "U = 2u (6.2.1)")


def _readings(points, name: str, accuracy) -> list:
    """The uncertainty of every point's ``name`` (benchctl.analysis.uncertainty.ReadingUncertainty)."""
    import numpy as np

    from benchctl.analysis.uncertainty import reading_uncertainty, scatter_column

    role, quantity = MEASURED_BY[name]
    inst = (accuracy or {}).get(role)
    spec = inst.quantities.get(quantity) if inst is not None else None
    instrument = inst.instrument if inst is not None else role
    values = points[name].to_numpy(float)
    sd_col = scatter_column(name)
    sds = points[sd_col].to_numpy(float) if sd_col in points.columns else np.full(len(points), np.nan)
    ns = points["n_readings"].to_numpy(float) if "n_readings" in points.columns else np.ones(len(points))
    return [reading_uncertainty(v, spec, instrument=instrument if spec is not None else role,
                                quantity=f"{quantity} ({role})", sd=sd, n_readings=n)
            for v, sd, n in zip(values, sds, ns)]


def _with_u(details: dict, u, flags: tuple[list[str], str]) -> dict:
    out = dict(details)
    out["uncertainty_method"] = UNCERTAINTY_METHOD
    if not u.known:
        out["uncertainty_note"] = u.note or "uncertainty unknown"
    if flags[0]:
        out["flags"] = list(flags[0])
        out["flag_reasons"] = flags[1]
    return out


def _u_fields(u) -> dict:
    return {"uncertainty": u.u, "expanded_uncertainty": u.expanded} if u.known else {}


def analyse(points, p: Parameters, accuracy=None) -> list[Result]:
    """Derived results from the stored points (a pandas DataFrame, one row per point).

    ``accuracy`` is the station's instrument accuracy by role (the runner reads it from the
    station text stored with the run): efficiency, loss, output deviation, line and load
    regulation, the peak and four-point average efficiency and the no-load input power carry
    their standard and expanded (k = 2) uncertainty when the accuracy of the meters is known
    (JCGM 100:2008; :mod:`benchctl.analysis.uncertainty`). Results computed from points that
    did not settle or whose setpoints were not verified carry ``flags`` ("unsettled",
    "unverified") and ``flag_reasons`` in their details.
    """
    import numpy as np

    from benchctl.references import cite
    from benchctl.analysis.average_efficiency import LOAD_FRACTIONS, four_point_average, no_load_power_limit_w
    from benchctl.analysis.efficiency import efficiency, loss_w, peak_efficiency
    from benchctl.analysis.quality import merge_flags, point_flags
    from benchctl.analysis.regulation import (
        line_regulation_by_load,
        load_regulation_by_line,
        output_deviation_pct,
    )
    from benchctl.analysis.uncertainty import (
        average_efficiency_uncertainty,
        efficiency_uncertainty,
        line_regulation_uncertainty,
        load_regulation_uncertainty,
        loss_uncertainty,
        propagate,
    )

    results: list[Result] = []
    if points.empty:
        return results
    n_pts = len(points)
    eff = efficiency(points["pout_w"], points["pin_w"])
    loss = loss_w(points["pout_w"], points["pin_w"])
    dev = output_deviation_pct(points["vout_v"], p.vout_nom_v)
    r_pin, r_pout, r_vout = (_readings(points, n, accuracy) for n in ("pin_w", "pout_w", "vout_v"))
    settled = points["settled"].tolist() if "settled" in points.columns else [None] * n_pts
    infos = points["settle_info"].tolist() if "settle_info" in points.columns else [None] * n_pts
    reasons = points["settle_reason"].tolist() if "settle_reason" in points.columns else [""] * n_pts
    pflags = [point_flags(settled[k], infos[k], reasons[k]) for k in range(n_pts)]
    vin_set = points["vin_set_v"].to_numpy(float)
    iout_set = points["iout_set_a"].to_numpy(float)
    vout = points["vout_v"].to_numpy(float)
    labels = [f"{vin_set[k]:g} V, {iout_set[k]:g} A" for k in range(n_pts)]

    def flags_of(idx) -> tuple[list[str], str]:
        idx = list(idx)
        return merge_flags([pflags[k] for k in idx], where=[labels[k] for k in idx])

    def u_dev(k: int):
        return propagate(dev[k], [100.0 / p.vout_nom_v], [r_vout[k]])

    for k, seq in enumerate(points["seq"]):
        scope = {"seq": int(seq), "vin_set_v": float(vin_set[k]), "iout_set_a": float(iout_set[k])}
        fl = flags_of([k])
        if np.isfinite(eff[k]) and scope["iout_set_a"] > 0:  # undefined at no load: Pout is ~0 there
            u = efficiency_uncertainty(r_pout[k], r_pin[k])
            results.append(Result("efficiency", float(eff[k]), "", scope=scope, details=_with_u({}, u, fl),
                                  **_u_fields(u)))
        u = loss_uncertainty(r_pout[k], r_pin[k])
        results.append(Result("loss_w", float(loss[k]), "W", scope=scope, details=_with_u({}, u, fl), **_u_fields(u)))
        u = u_dev(k)
        results.append(Result("vout_deviation_pct", float(dev[k]), "%", scope=scope, details=_with_u({}, u, fl),
                              **_u_fields(u)))

    def rows_at(vin: float, iout: float) -> list[int]:
        return [k for k in range(n_pts) if round(vin_set[k], 4) == round(vin, 4) and round(iout_set[k], 4) == round(iout, 4)]

    source_note = "(Vo at Vin,max - Vo at Vin,min)/Vo,nom x 100 at fixed load (common practice)"
    for r in line_regulation_by_load(vin_set, iout_set, vout, p.vout_nom_v):
        lo, hi = rows_at(r.vin_min_v, r.iout_a), rows_at(r.vin_max_v, r.iout_a)
        u = line_regulation_uncertainty([r_vout[k] for k in lo], [r_vout[k] for k in hi], p.vout_nom_v)
        results.append(Result("line_regulation_pct", r.line_regulation_pct, "%",
                              details=_with_u({**r.__dict__, "definition": source_note}, u, flags_of(lo + hi)),
                              scope={"iout_set_a": r.iout_a}, **_u_fields(u)))
    definition = ("(V_NL - V_FL)/V_FL x 100 (textbook)" if p.load_regulation_convention == "textbook"
                  else "(Vo,min load - Vo,max load)/V_rated x 100 (IEC 61204 style, from memory)")
    for r in load_regulation_by_line(vin_set, iout_set, vout, convention=p.load_regulation_convention,
                                     vout_rated_v=p.vout_nom_v):
        nl, fl_rows = rows_at(r.vin_v, r.iout_min_a), rows_at(r.vin_v, r.iout_max_a)
        u = load_regulation_uncertainty([r_vout[k] for k in nl], [r_vout[k] for k in fl_rows],
                                        convention=p.load_regulation_convention, vout_rated_v=p.vout_nom_v)
        results.append(Result("load_regulation_pct", r.load_regulation_pct, "%",
                              details=_with_u({**r.__dict__, "definition": definition}, u, flags_of(nl + fl_rows)),
                              scope={"vin_set_v": r.vin_v}, **_u_fields(u)))
    peak = peak_efficiency(vin_set, iout_set, eff)
    if peak is not None:
        kp = int(np.nanargmax(eff))
        u = efficiency_uncertainty(r_pout[kp], r_pin[kp])
        results.append(Result("peak_efficiency", peak.efficiency, "", details=_with_u({}, u, flags_of([kp])),
                              scope={"vin_set_v": peak.vin_v, "iout_set_a": peak.iout_a}, **_u_fields(u)))
    kd = int(np.nanargmax(np.abs(dev)))
    u = u_dev(kd)  # |deviation| has the deviation's uncertainty
    results.append(Result("max_abs_vout_deviation_pct", float(np.nanmax(np.abs(dev))), "%",
                          details=_with_u({"vin_set_v": float(vin_set[kd]), "iout_set_a": float(iout_set[kd])}, u,
                                          flags_of(range(n_pts))),
                          **_u_fields(u)))

    rel_tol = 0.02  # as four_point_average's default: a load counts within 2 % of rated of its fraction
    for vin in sorted(set(vin_set)):
        sel = vin_set == vin
        avg = four_point_average(vin, iout_set[sel], eff[sel], iout_rated_a=p.iout_rated_a, vout_nom_v=p.vout_nom_v,
                                 rel_tol=rel_tol)
        details = {"found": avg.found, "reason": avg.reason, "point_efficiencies": list(avg.point_efficiencies),
                   "source": cite("CFR-430-APP-Z")}
        if p.external_supply_limits:
            details.update({"limit_efficiency": avg.limit_efficiency, "supply_class": avg.supply_class,
                            "meets_indicative_limit": avg.meets_indicative_limit, "note": avg.note,
                            "limit_source": cite("CFR-430.32W", "Level VI")})
        fields: dict = {}
        if avg.found:
            groups, used = [], []
            for frac in LOAD_FRACTIONS:
                idx = [k for k in np.flatnonzero(sel)
                       if abs(iout_set[k] - frac * p.iout_rated_a) <= rel_tol * p.iout_rated_a and np.isfinite(eff[k])]
                groups.append([(r_pout[k], r_pin[k]) for k in idx])
                used += idx
            u = average_efficiency_uncertainty(groups)
            details = _with_u(details, u, flags_of(used))
            fields = _u_fields(u)
        results.append(Result("average_efficiency_4pt", avg.average_efficiency if avg.found else None, "",
                              details=details, scope={"vin_set_v": float(vin)}, **fields))
        no_load = [int(k) for k in np.flatnonzero(sel & (iout_set == 0.0))]
        if no_load:
            pin0 = float(points["pin_w"].to_numpy(float)[no_load].mean())
            u = propagate(pin0, [1.0 / len(no_load)] * len(no_load), [r_pin[k] for k in no_load])
            results.append(Result(
                "no_load_input_power_w", pin0, "W",
                details=_with_u({"indicative_limit_w": no_load_power_limit_w(p.vout_nom_v * p.iout_rated_a),
                                 "note": "indicative only: Level VI no-load limit for external supplies",
                                 "limit_source": cite("CFR-430.32W", "Level VI")}
                                if p.external_supply_limits else {}, u, flags_of(no_load)),
                scope={"vin_set_v": float(vin)}, **_u_fields(u),
            ))
    return results
