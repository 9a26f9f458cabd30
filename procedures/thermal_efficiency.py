"""Efficiency map and regulation at several ambient temperatures, with a thermal chamber.

For each ambient (``ambient_c``) the chamber is set (ramp limited to ``ramp_k_per_min``) with
the DUT running at ``soak_load_a`` and the first line voltage, and the ambient is accepted in
three steps: the chamber's own stable flag (its air within ±``soak_band_k`` of the setpoint
for ``soak_time_s``), then a stability criterion on the chamber's air read-back and on every
hot spot of the temperature meter (regression change over ``stable_window_s`` at most
``stable_max_change_k``; :mod:`benchctl.stability`, after IEC 62301:2011 5.3), so the DUT's
parts have followed the air. Then line × load is swept: at each point the hot spots are
again waited stable (a point at thermal equilibrium: losses depend on the parts' temperature)
when ``point_thermal_stable``, the input and output power settled, and V, I, P of both
meters, the air and every channel of the temperature meter read ``n_readings`` times.

Derived: efficiency per point and ambient, load regulation per (ambient, line), line
regulation per (ambient, load), and the efficiency change against the lowest ambient.
A point whose ambient or hot spots did not become stable is stored unsettled with the reason.
At the end the chamber returns to ``final_setpoint_c``.

Caution: a chamber at temperature and a hot DUT burn; the bench runs at the station's
voltages. Follow local codes and licensed practice for the chamber and the DUT's supply.
"""

from __future__ import annotations

from benchctl.procedure import Parameter, Parameters, Result, Role, power_parameters

NAME = "thermal_efficiency"
DESCRIPTION = "efficiency and regulation over line x load at several chamber ambients (soak, stability, sweep)"
ROLES = ("source", "load", "input_meter", "output_meter", Role("chamber", "thermal_chamber"),
         Role("temp_meter", "temperature_meter"))

PARAMETERS = [
    Parameter("ambient_c", "degC", [25.0, 55.0, 85.0], minimum=-100.0, maximum=300.0, kind="float_list",
              help="chamber ambients, in the order they are run"),
    Parameter("vin_v", "V", [36.0, 48.0, 75.0], minimum=0.0, maximum=1500.0, kind="float_list",
              help="input voltages"),
    Parameter("iout_a", "A", [1.0, 2.5, 5.0], minimum=0.0, maximum=1000.0, kind="float_list",
              help="load currents"),
    Parameter("soak_load_a", "A", None, minimum=0.0, maximum=1000.0, optional=True,
              help="load while the chamber soaks (default: the highest of iout_a)"),
    *power_parameters(startup_delay_s=0.05),
    Parameter("ramp_k_per_min", "K/min", 3.0, minimum=0.01, maximum=100.0, help="chamber ramp-rate limit"),
    Parameter("soak_band_k", "K", 1.0, minimum=0.01, maximum=20.0, help="chamber stable: air within this band"),
    Parameter("soak_time_s", "s", 300.0, minimum=0.0, maximum=36000.0, help="chamber stable: for this long"),
    Parameter("chamber_timeout_s", "s", 7200.0, minimum=0.0, maximum=86400.0,
              help="give up waiting for the chamber's stable flag (the ambient is then flagged)"),
    Parameter("poll_s", "s", 5.0, minimum=0.0, maximum=600.0, help="interval between stable-flag queries"),
    Parameter("stable_window_s", "s", 120.0, minimum=0.0, maximum=36000.0,
              help="stability criterion: window of the regression on the air and each hot spot"),
    Parameter("stable_max_change_k", "K", 0.2, minimum=0.0, maximum=20.0,
              help="stability criterion: largest change over the window"),
    Parameter("stable_timeout_s", "s", 3600.0, minimum=0.0, maximum=86400.0,
              help="give up waiting for the stability criterion (the point is then unsettled)"),
    Parameter("sample_interval_s", "s", 5.0, minimum=0.0, maximum=600.0,
              help="stability criterion: interval between temperature readings"),
    Parameter("point_thermal_stable", "", True, kind="bool",
              help="wait for the hot spots to be stable at every point (thermal equilibrium)"),
    Parameter("settle_rel_tol", "", 2e-4, minimum=0.0, maximum=0.1, help="settle: relative residual of Pin, Pout"),
    Parameter("settle_abs_tol_w", "W", 1e-3, minimum=0.0, maximum=100.0, help="settle: absolute residual"),
    Parameter("settle_timeout_s", "s", 10.0, minimum=0.0, maximum=600.0, help="settle: give up (point unsettled)"),
    Parameter("n_readings", "", 3, minimum=1, maximum=1000, kind="int", help="readings per point"),
    Parameter("final_setpoint_c", "degC", 25.0, minimum=-100.0, maximum=300.0,
              help="chamber setpoint at the end (the room)"),
]


def plan(p: Parameters) -> list[dict]:
    """Ambient outermost (a soak is slow), then line, then load ascending."""
    return [{"ambient_set_c": amb, "vin_set_v": vin, "iout_set_a": i}
            for amb in p.ambient_c for vin in p.vin_v for i in sorted(set(p.iout_a))]


def hot_spots(temp_meter) -> list[str]:
    """The temperature meter's channels other than the ambient."""
    return [c for c in temp_meter.channels() if c != "ambient"]


def wait_thermal_stable(bench, temp_meter, p: Parameters, channels, extra=None) -> tuple[bool, str, dict]:
    """Every channel (and ``extra``: name -> read) stable by the criterion; (ok, reason, info)."""
    info: dict = {}
    reasons = []
    reads = dict(extra or {})
    reads.update({c: (lambda c=c: temp_meter.measure_temperature(c)) for c in channels})
    for name, read in reads.items():
        if p.stable_window_s <= 0:
            break
        r = bench.wait_stable(read, window_s=p.stable_window_s, max_change_rel=0.0,
                              max_change_abs=p.stable_max_change_k, interval_s=p.sample_interval_s,
                              timeout_s=p.stable_timeout_s)
        info[name] = r.info()
        if not r.stable:
            reasons.append(f"{name} not stable: {r.reason or f'change {r.change:.3g} K over {r.window_s:.3g} s'}")
    return not reasons, "; ".join(reasons), info


def soak(bench, chamber, temp_meter, p: Parameters, ambient_c: float) -> tuple[bool, str, dict]:
    """Set the chamber to ``ambient_c`` and accept it: stable flag, then the stability criterion
    on the air read-back and every hot spot. Returns (ok, reason, info) and stores an event."""
    chamber.set_ramp_rate(p.ramp_k_per_min)
    chamber.set_soak(p.soak_band_k, p.soak_time_s)
    chamber.set_setpoint(ambient_c)
    chamber.set_running(True)
    started = bench.clock()
    flagged = False
    while bench.settle_enabled:
        if chamber.is_stable():
            flagged = True
            break
        if bench.clock() - started >= p.chamber_timeout_s:
            break
        bench.wait(p.poll_s)
    flag_s = bench.clock() - started
    ok, reason, info = wait_thermal_stable(bench, temp_meter, p, hot_spots(temp_meter),
                                           extra={"chamber_air": chamber.measure_temperature})
    if not flagged:
        ok = False
        reason = (f"chamber not stable within {p.chamber_timeout_s:g} s; " + reason).strip("; ")
    info.update(chamber_stable_flag=flagged, chamber_flag_wait_s=flag_s, soak_wall_s=bench.clock() - started)
    bench.event("soak" if ok else "warning",
                f"ambient {ambient_c:g} °C {'accepted' if ok else 'NOT stable'} after {bench.clock() - started:.3g} s"
                + (f": {reason}" if reason else ""), ambient_set_c=ambient_c, **{k: v for k, v in info.items()
                                                                                 if not isinstance(v, dict)})
    return ok, reason, info


def read_temperatures(temp_meter, chamber) -> dict:
    """Readers of the air and every temperature-meter channel (``t_<label>_c``)."""
    readers = {f"t_{c}_c": (lambda c=c: temp_meter.measure_temperature(c)) for c in temp_meter.channels()}
    readers["chamber_air_c"] = chamber.measure_temperature
    return readers


def end_chamber(bench, chamber, p: Parameters) -> None:
    """Back to the room and off (the DUT is already down)."""
    chamber.set_setpoint(p.final_setpoint_c)
    chamber.set_running(False)
    bench.event("info", f"chamber back to {p.final_setpoint_c:g} °C and off")


def run(bench, p: Parameters) -> None:
    source, load = bench.source, bench.load
    meter_in, meter_out = bench.input_meter, bench.output_meter
    chamber, temp_meter = bench.role("chamber"), bench.role("temp_meter")
    points = plan(p)
    soak_load = max(p.iout_a) if p.soak_load_a is None else p.soak_load_a
    bench.power_up(points[0]["vin_set_v"], soak_load, source_current_limit_a=p.source_current_limit_a,
                   startup_delay_s=p.startup_delay_s)
    powers = {"pin_w": meter_in.measure_power, "pout_w": meter_out.measure_power}
    readers = {**_meter_readers(meter_in, "vin_v", "iin_a", "pin_w"),
               **_meter_readers(meter_out, "vout_v", "iout_a", "pout_w"), **read_temperatures(temp_meter, chamber)}
    channels = hot_spots(temp_meter)
    ambient_now = None
    ambient_ok, ambient_reason = True, ""
    try:
        for point in bench.sweep(points):
            if point["ambient_set_c"] != ambient_now:
                ambient_now = point["ambient_set_c"]
                bench.set_operating_point(point["vin_set_v"], soak_load)
                ambient_ok, ambient_reason, _ = soak(bench, chamber, temp_meter, p, ambient_now)
            bench.set_operating_point(point["vin_set_v"], point["iout_set_a"])
            thermal_ok, thermal_reason, thermal_info = True, "", {}
            if p.point_thermal_stable and bench.settle_enabled:
                thermal_ok, thermal_reason, thermal_info = wait_thermal_stable(bench, temp_meter, p, channels)
            settled = bench.settle_readings(powers, settle_on=("pin_w", "pout_w"), rel_tol=p.settle_rel_tol,
                                            abs_tol=p.settle_abs_tol_w, timeout_s=p.settle_timeout_s)
            settled = settled.with_extra(thermal=thermal_info)
            if not ambient_ok:
                settled = settled.unsettled_by(f"ambient not stable: {ambient_reason}")
            if not thermal_ok:
                settled = settled.unsettled_by(f"hot spots not stable: {thermal_reason}")
            readings = bench.measure_together(readers, n=p.n_readings)
            bench.record({"ambient_set_c": point["ambient_set_c"], "vin_set_v": point["vin_set_v"],
                          "iout_set_a": point["iout_set_a"]}, readings=readings, settle=settled,
                         tag=f"{point['ambient_set_c']:g}C")
        bench.power_down()
    finally:
        end_chamber(bench, chamber, p)


def _meter_readers(meter, v_name: str, i_name: str, p_name: str) -> dict:
    if getattr(meter, "has_measure_all", False):
        return {(v_name, i_name, p_name): meter.measure_all}
    return {v_name: meter.measure_voltage, i_name: meter.measure_current, p_name: meter.measure_power}


def analyse(points, p: Parameters, accuracy=None) -> list[Result]:
    """Efficiency per point; load and line regulation per ambient; efficiency change against the lowest
    ambient. The efficiency and the hot spot carry their uncertainty (JCGM 100:2008) where the station
    states the meters' accuracy."""
    import numpy as np

    from benchctl.analysis.efficiency import efficiency
    from benchctl.analysis.uncertainty import Uncertain, efficiency_uncertainty
    from benchctl.procedures.efficiency_map import UNCERTAINTY_METHOD as POWER_METHOD, _readings as power_readings
    from benchctl.procedures.temperature_rise import temperature_readings, with_uncertainty
    from benchctl.analysis.quality import point_flags
    from benchctl.analysis.regulation import line_regulation_by_load, load_regulation_by_line

    results: list[Result] = []
    if points.empty:
        return results
    vout_nom = float(np.median(points["vout_v"].to_numpy(float)))
    eff = efficiency(points["pout_w"], points["pin_w"])
    amb = points["ambient_set_c"].to_numpy(float)
    vin = points["vin_set_v"].to_numpy(float)
    iout = points["iout_set_a"].to_numpy(float)
    settled = points["settled"].tolist() if "settled" in points.columns else [None] * len(points)
    infos = points["settle_info"].tolist() if "settle_info" in points.columns else [None] * len(points)
    reasons = points["settle_reason"].tolist() if "settle_reason" in points.columns else [""] * len(points)

    def details(k: int, extra: dict | None = None) -> dict:
        flags, why = point_flags(settled[k], infos[k], reasons[k])
        out = dict(extra or {})
        if flags:
            out.update(flags=list(flags), flag_reasons=why)
        return out

    hot = [c for c in points.columns if c.startswith("t_") and c.endswith("_c") and "_sd_" not in c
           and c != "t_ambient_c"]
    r_pin, r_pout = power_readings(points, "pin_w", accuracy), power_readings(points, "pout_w", accuracy)
    temps_u = temperature_readings(points, [c[2:-2] for c in hot], accuracy)
    for k, seq in enumerate(points["seq"]):
        scope = {"seq": int(seq), "ambient_set_c": float(amb[k]), "vin_set_v": float(vin[k]), "iout_set_a": float(iout[k])}
        if iout[k] > 0 and np.isfinite(eff[k]):
            u = efficiency_uncertainty(r_pout[k], r_pin[k])
            info, u_fields = with_uncertainty(details(k), u)
            info["uncertainty_method"] = POWER_METHOD
            results.append(Result("efficiency", float(eff[k]), "", scope=scope, details=info, **u_fields))
        results.append(Result("loss_w", float(points["pin_w"].iloc[k] - points["pout_w"].iloc[k]), "W", scope=scope,
                              details=details(k)))
        if hot:
            temps = {c: float(points[c].iloc[k]) for c in hot}
            name = max(temps, key=lambda c: temps[c])
            r = temps_u[name[2:-2]][k]
            info, u_fields = with_uncertainty(details(k, {"channel": name[2:-2]}), Uncertain(r.value, r.u, 2.0, r.note))
            results.append(Result("hot_spot_c", temps[name], "degC", scope=scope, details=info, **u_fields))
    for a in sorted(set(amb)):
        sel = amb == a
        for r in load_regulation_by_line(vin[sel], iout[sel], points["vout_v"].to_numpy(float)[sel],
                                         convention="textbook"):
            results.append(Result("load_regulation_pct", r.load_regulation_pct, "%", scope={
                "ambient_set_c": float(a), "vin_set_v": r.vin_v}, details={"definition": "(V_NL - V_FL)/V_FL x 100"}))
        for r in line_regulation_by_load(vin[sel], iout[sel], points["vout_v"].to_numpy(float)[sel], vout_nom):
            results.append(Result("line_regulation_pct", r.line_regulation_pct, "%", scope={
                "ambient_set_c": float(a), "iout_set_a": r.iout_a},
                details={"definition": "(Vo at Vin,max - Vo at Vin,min)/Vo,nom x 100"}))
    lowest = float(np.min(amb))
    for k in range(len(points)):
        if amb[k] == lowest or not (iout[k] > 0):
            continue
        ref = np.flatnonzero((amb == lowest) & (vin == vin[k]) & (iout == iout[k]))
        if ref.size and np.isfinite(eff[k]) and np.isfinite(eff[ref[0]]):
            results.append(Result("efficiency_change_pct", float(100.0 * (eff[k] - eff[ref[0]])), "%",
                                  scope={"ambient_set_c": float(amb[k]), "vin_set_v": float(vin[k]),
                                         "iout_set_a": float(iout[k])},
                                  details=details(k, {"against_ambient_c": lowest,
                                                      "definition": "100 x (eta(T) - eta(T_lowest)), points"})))
    return results
