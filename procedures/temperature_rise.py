"""Component temperature rise against load, and the derating curve (highest load at each ambient).

At each ambient (``ambient_c``; with a chamber, soaked and accepted as in
``thermal_efficiency``: the chamber's stable flag, then the stability criterion on its air
and on every hot spot; without a chamber role, the room as it is — give one ambient) the load
is stepped through ``iout_a`` at ``vin_v``. After each step every channel of the temperature
meter is sampled every ``sample_interval_s`` until each hot spot is stable (regression change
over ``stable_window_s`` at most ``stable_max_change_k``); the warm-up record is stored and the
temperatures and rises ΔT = T_part − T_ambient (the meter's ambient channel) are recorded.

Derived: each part's rise per point; from the warm-up after each step, each part's thermal
time constant and final temperature from a first-order fit (T∞ + (T0 − T∞)·e^(−t/τ),
:func:`benchctl.analysis.thermal.fit_first_order`); and, per ambient, the derated load: the
highest load keeping every hot spot at or under ``hot_spot_limit_c``, by linear interpolation
between the measured loads that bracket the limit (:func:`benchctl.analysis.thermal.derated_load`;
flagged "not_reached" or "exceeded_everywhere" when no bracket exists).

Caution: the DUT runs hot on purpose; hot spots of 100 °C and more burn. The station's
``hot_spot_temperature_max_c`` trips the run. Follow local codes and licensed practice.
"""

from __future__ import annotations

from benchctl.procedure import Parameter, Parameters, Result, Role, power_parameters

NAME = "temperature_rise"
DESCRIPTION = "component temperature rise against load per ambient, warm-up time constants, derating curve"
ROLES = ("source", "load", Role("temp_meter", "temperature_meter"), Role("chamber", "thermal_chamber", optional=True))

PARAMETERS = [
    Parameter("ambient_c", "degC", [25.0, 50.0, 70.0], minimum=-100.0, maximum=300.0, kind="float_list",
              help="chamber ambients (without a chamber: one value, the room's, for the record)"),
    Parameter("vin_v", "V", 48.0, minimum=0.0, maximum=1500.0, help="input voltage"),
    Parameter("iout_a", "A", [1.0, 2.0, 3.0, 4.0, 5.0], minimum=0.0, maximum=1000.0, kind="float_list",
              help="load currents, stepped up at each ambient"),
    Parameter("hot_spot_limit_c", "degC", 105.0, minimum=-100.0, maximum=500.0,
              help="derating: the hot-spot temperature no part may exceed"),
    *power_parameters(startup_delay_s=0.05),
    Parameter("ramp_k_per_min", "K/min", 3.0, minimum=0.01, maximum=100.0, help="chamber ramp-rate limit"),
    Parameter("soak_band_k", "K", 1.0, minimum=0.01, maximum=20.0, help="chamber stable: air within this band"),
    Parameter("soak_time_s", "s", 300.0, minimum=0.0, maximum=36000.0, help="chamber stable: for this long"),
    Parameter("chamber_timeout_s", "s", 7200.0, minimum=0.0, maximum=86400.0, help="give up on the stable flag"),
    Parameter("poll_s", "s", 5.0, minimum=0.0, maximum=600.0, help="interval between stable-flag queries"),
    Parameter("stable_window_s", "s", 120.0, minimum=0.0, maximum=36000.0,
              help="stability criterion: window of the regression on each hot spot"),
    Parameter("stable_max_change_k", "K", 0.2, minimum=0.0, maximum=20.0,
              help="stability criterion: largest change over the window"),
    Parameter("stable_timeout_s", "s", 3600.0, minimum=0.0, maximum=86400.0, help="give up waiting (unsettled)"),
    Parameter("sample_interval_s", "s", 5.0, minimum=0.0, maximum=600.0, help="warm-up record: sampling interval"),
    Parameter("final_setpoint_c", "degC", 25.0, minimum=-100.0, maximum=300.0, help="chamber setpoint at the end"),
]


def plan(p: Parameters) -> list[dict]:
    return [{"ambient_set_c": a, "iout_set_a": i} for a in p.ambient_c for i in sorted(set(p.iout_a))]


def _warm_up(bench, temp_meter, channels, hot, p: Parameters):
    """Sample every channel until every hot spot is stable; (stable, reason, t_s, {channel: values})."""
    import numpy as np

    from benchctl.stability import regression_change

    t0 = bench.clock()
    ts: list[float] = []
    series: dict[str, list[float]] = {c: [] for c in channels}
    while True:
        for c in channels:
            series[c].append(temp_meter.measure_temperature(c))
        now = bench.clock() - t0
        ts.append(now)
        t = np.asarray(ts)
        recent = t >= now - p.stable_window_s
        if now >= p.stable_window_s and recent.sum() >= 10:
            changes = {c: regression_change(t[recent], np.asarray(series[c])[recent]) for c in hot}
            if all(v <= p.stable_max_change_k for v in changes.values()):
                return True, "", ts, series
        if now >= p.stable_timeout_s or not bench.settle_enabled:
            return False, f"hot spots not stable within {p.stable_timeout_s:g} s", ts, series
        bench.wait(p.sample_interval_s)


def _fits(ts, series, hot) -> dict:
    """τ (``tau_<part>_s``) and T∞ (``tinf_<part>_c``) of each part's warm-up; NaN where the part moved
    less than 1 K (no time constant to find) or the fit fails."""
    import math

    import numpy as np

    from benchctl.analysis.thermal import fit_first_order
    from benchctl.errors import AnalysisInputError

    out: dict = {}
    t = np.asarray(ts, float)
    for c in hot:
        y = np.asarray(series[c], float)
        tau = tinf = math.nan
        if y.size >= 4 and abs(float(y[-1] - y[0])) >= 1.0:
            try:
                fit = fit_first_order(t - t[0], y)
                tau, tinf = fit.tau_s, fit.t_final_c
            except AnalysisInputError:
                pass
        out[f"tau_{c}_s"], out[f"tinf_{c}_c"] = tau, tinf
    return out


def run(bench, p: Parameters) -> None:
    from benchctl.procedures.thermal_efficiency import end_chamber, hot_spots, soak

    temp_meter = bench.role("temp_meter")
    chamber = bench.role("chamber") if bench.has_role("chamber") else None
    channels = list(temp_meter.channels())
    hot = hot_spots(temp_meter)
    points = plan(p)
    if chamber is None and len(set(p.ambient_c)) > 1:
        from benchctl.errors import ParameterError

        raise ParameterError("temperature_rise: several ambients need a chamber role (kind thermal_chamber); "
                             "give one ambient_c for the room")
    bench.power_up(p.vin_v, points[0]["iout_set_a"], source_current_limit_a=p.source_current_limit_a,
                   startup_delay_s=p.startup_delay_s)
    ambient_now, ambient_ok, ambient_reason = None, True, ""
    try:
        for point in bench.sweep(points):
            if point["ambient_set_c"] != ambient_now:
                ambient_now = point["ambient_set_c"]
                if chamber is not None:
                    bench.set_operating_point(p.vin_v, 0.0)
                    ambient_ok, ambient_reason, _ = soak(bench, chamber, temp_meter, p, ambient_now)
            bench.set_operating_point(p.vin_v, point["iout_set_a"])
            ok, reason, ts, series = _warm_up(bench, temp_meter, channels, hot, p)
            values = {"ambient_set_c": point["ambient_set_c"], "vin_set_v": p.vin_v, "iout_set_a": point["iout_set_a"],
                      "iout_a": bench.load.measure_current(), "thermal_stable": 1.0 if ok and ambient_ok else 0.0}
            amb = series["ambient"][-1] if "ambient" in series else float("nan")
            units = {"thermal_stable": ""}
            for c in channels:
                values[f"t_{c}_c"] = series[c][-1]
                if c in hot:
                    values[f"rise_{c}_k"] = series[c][-1] - amb
                    units[f"rise_{c}_k"] = "K"
            values.update(_fits(ts, series, hot))
            seq = bench.record(values, units=units, tag=f"{point['ambient_set_c']:g}C")
            if not (ok and ambient_ok):
                bench.event("warning", f"point {seq}: {'; '.join(x for x in (ambient_reason, reason) if x)}")
            bench.record_array("warm_up", {"t_s": ts, **{f"t_{c}_c": series[c] for c in channels}}, point_seq=seq,
                               meta={"kind": "warm_up", "ambient_set_c": point["ambient_set_c"],
                                     "iout_set_a": point["iout_set_a"], "stable": bool(ok and ambient_ok)})
        bench.power_down()
    finally:
        if chamber is not None:
            end_chamber(bench, chamber, p)


#: The station role whose accuracy gives the temperatures their uncertainty.
METER_ROLE = "temp_meter"
UNCERTAINTY_METHOD = ("JCGM 100:2008 (GUM): type B from the temperature meter's accuracy in the station file (4.3, "
                      "rectangular a/sqrt(3) unless stated), each thermocouple's error fixed for its channel and "
                      "independent between channels; first-order propagation (5.1.2, 5.2.2); U = 2u (6.2.1)")


def temperature_readings(points, channels, accuracy) -> dict:
    """{channel: [ReadingUncertainty per point]} of the ``t_<channel>_c`` columns."""
    from benchctl.analysis.uncertainty import temperature_reading_uncertainty

    inst = (accuracy or {}).get(METER_ROLE)
    spec = inst.quantities.get("temperature") if inst is not None else None
    instrument = inst.instrument if inst is not None else METER_ROLE
    return {c: [temperature_reading_uncertainty(float(v), spec, instrument=instrument, channel=c)
                for v in points[f"t_{c}_c"].to_numpy(float)] for c in channels}


def with_uncertainty(details: dict, u) -> tuple[dict, dict]:
    """(details with the method or why the uncertainty is unknown, Result uncertainty fields)."""
    out = {**details, "uncertainty_method": UNCERTAINTY_METHOD}
    if not u.known:
        out["uncertainty_note"] = u.note or "uncertainty unknown"
        return out, {}
    return out, {"uncertainty": u.u, "expanded_uncertainty": u.expanded}


def analyse(points, p: Parameters, accuracy=None) -> list[Result]:
    """Rises per point, first-order fits of the warm-ups, derated load per ambient; the
    temperatures, rises and derated loads with their uncertainty when the station states the
    temperature meter's accuracy (``[instruments.temp_meter.accuracy] temperature = ...``)."""
    import math

    import numpy as np

    from benchctl.analysis.thermal import derated_load
    from benchctl.analysis.uncertainty import Uncertain, derated_load_uncertainty, temperature_rise_uncertainty

    results: list[Result] = []
    if points.empty:
        return results
    hot = [c[5:-2] for c in points.columns if c.startswith("rise_") and c.endswith("_k") and "_sd_" not in c]
    stable = points["thermal_stable"].to_numpy(float) if "thermal_stable" in points.columns else np.ones(len(points))
    amb = points["ambient_set_c"].to_numpy(float)
    iout = points["iout_a"].to_numpy(float) if "iout_a" in points.columns else points["iout_set_a"].to_numpy(float)

    def flags(idx) -> dict:
        bad = [int(k) for k in idx if stable[k] != 1.0]
        return {"flags": ["unsettled"], "flag_reasons": "hot spots or ambient not stable at "
                + ", ".join(f"{amb[k]:g} °C {iout[k]:g} A" for k in bad)} if bad else {}

    readings = temperature_readings(points, [*hot, "ambient"] if "t_ambient_c" in points.columns else hot, accuracy)
    no_ambient = Uncertain(math.nan, math.nan, 2.0, "no ambient channel recorded")
    for k, seq in enumerate(points["seq"]):
        scope = {"seq": int(seq), "ambient_set_c": float(amb[k]), "iout_set_a": float(points["iout_set_a"].iloc[k])}
        for c in hot:
            u_rise = temperature_rise_uncertainty(readings[c][k], readings["ambient"][k]) if "ambient" in readings \
                else no_ambient
            details, u = with_uncertainty({"definition": "T_part - T_ambient (meter's ambient channel)",
                                           **flags([k])}, u_rise)
            results.append(Result(f"rise_{c}_k", float(points[f"rise_{c}_k"].iloc[k]), "K", scope=scope,
                                  details=details, **u))
            details, u = with_uncertainty(flags([k]), Uncertain(readings[c][k].value, readings[c][k].u, 2.0,
                                                                readings[c][k].note))
            results.append(Result(f"t_{c}_c", float(points[f"t_{c}_c"].iloc[k]), "degC", scope=scope,
                                  details=details, **u))
    for k, seq in enumerate(points["seq"]):
        scope = {"seq": int(seq), "ambient_set_c": float(amb[k]), "iout_set_a": float(points["iout_set_a"].iloc[k])}
        for c in hot:
            if f"tau_{c}_s" not in points.columns:
                continue
            tau = float(points[f"tau_{c}_s"].iloc[k])
            details = {"method": "least-squares fit of T_inf + (T0 - T_inf) exp(-t/tau) to the warm-up after the "
                                 "load step (first-order network)",
                       "t_final_c": float(points[f"tinf_{c}_c"].iloc[k])}
            if not np.isfinite(tau):
                details.update(flags=["not_found"], flag_reasons="no first-order approach in the warm-up "
                                                                 "(the part moved less than 1 K or the fit failed)")
            results.append(Result(f"tau_{c}_s", tau if np.isfinite(tau) else None, "s", scope=scope, details=details))
    for a in sorted(set(amb)):
        sel = np.flatnonzero(amb == a)
        per_part = {c: derated_load(iout[sel], points[f"t_{c}_c"].to_numpy(float)[sel], p.hot_spot_limit_c,
                                    ambient_c=float(a)) for c in hot}
        if not per_part:
            continue
        exceeded = [c for c, d in per_part.items() if d.load_a is None]
        if exceeded:
            value, flag = None, "exceeded_everywhere"
            limiting = exceeded[0]
        else:
            limiting = min(per_part, key=lambda c: per_part[c].load_a)  # type: ignore[arg-type, return-value]
            value, flag = per_part[limiting].load_a, per_part[limiting].flag
        details = {"limit_c": p.hot_spot_limit_c, "limiting_part": limiting,
                   "method": "linear interpolation of the hot spot against load between the bracketing loads "
                             "(common practice)",
                   "parts": {c: {"load_a": d.load_a, "flag": d.flag, "reason": d.reason} for c, d in per_part.items()},
                   **flags(sel)}
        if flag:
            details.setdefault("flags", []).append(flag)
            details["flag_reasons"] = (details.get("flag_reasons", "") + " " + per_part[limiting].reason).strip()
        u_fields: dict = {}
        bracket = per_part[limiting].bracket
        if bracket is not None:
            (j1, j2), column = (int(sel[bracket[0]]), int(sel[bracket[1]])), readings[limiting]
            details, u_fields = with_uncertainty(details, derated_load_uncertainty(
                float(iout[j1]), float(iout[j2]), column[j1], column[j2], p.hot_spot_limit_c))
        results.append(Result("derated_load_a", value, "A", scope={"ambient_set_c": float(a)}, details=details,
                              **u_fields))
    return results
