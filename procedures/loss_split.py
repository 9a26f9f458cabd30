"""Where the losses go: the loss against load at each line voltage as fixed + linear + quadratic parts.

At each input voltage the load is stepped through ``iout_a`` (the fit points) and through
``check_iout_a`` (default: midway between neighbouring fit points), each point settled on
the input and output power and read ``n_readings`` times like the efficiency map.  Per line
voltage the loss P_in − P_out of the fit points is fitted as P_loss = a + b·I + c·I²
(:mod:`benchctl.analysis.loss_split`, common practice) weighted by each point's Type A
uncertainty u² = (sd_in² + sd_out²)/N (GUM 4.2.3) with the Birge ratio where the quadratic
form fits worse than the scatter; the parts a, b·I, c·I² are stored with their standard
uncertainties.  At the check points (not in the fit) the efficiency is predicted from the
fit with its propagated uncertainty and compared with the measured one: the stated error
of the interpolation is the largest |measured − predicted| and the largest predicted u.
"""

from __future__ import annotations

from benchctl.procedure import Parameter, Parameters, Result, power_parameters

NAME = "loss_split"
DESCRIPTION = "loss against load per line voltage: fixed + linear + quadratic parts, predicted efficiency"
ROLES = ("source", "load", "input_meter", "output_meter")

PARAMETERS = [
    Parameter("vin_v", "V", [36.0, 48.0, 75.0], minimum=0.0, maximum=1500.0, kind="float_list",
              help="input voltages"),
    Parameter("iout_a", "A", [1.5, 2.0, 2.5, 3.0, 3.5, 4.0, 4.5, 5.0], minimum=0.0, maximum=1000.0,
              kind="float_list", help="load currents of the fit (4 or more; one conduction mode)"),
    Parameter("check_iout_a", "A", None, minimum=0.0, maximum=1000.0, kind="float_list", optional=True,
              help="load currents where the fit's prediction is checked (default: midway between fit points)"),
    *power_parameters(startup_delay_s=0.05),
    Parameter("settle_rel_tol", "", 2e-4, minimum=0.0, maximum=0.1, help="settle: relative residual of Pin, Pout"),
    Parameter("settle_abs_tol_w", "W", 1e-3, minimum=0.0, maximum=100.0, help="settle: absolute residual"),
    Parameter("settle_timeout_s", "s", 10.0, minimum=0.0, maximum=600.0, help="settle: give up (point unsettled)"),
    Parameter("n_readings", "", 5, minimum=1, maximum=1000, kind="int", help="readings per point (mean and sd)"),
]


def _checks(p: Parameters) -> list[float]:
    if p.check_iout_a is not None:
        return sorted(set(p.check_iout_a))
    fit = sorted(set(p.iout_a))
    return [round(0.5 * (a + b), 9) for a, b in zip(fit, fit[1:])]


def plan(p: Parameters) -> list[dict]:
    """Per line voltage: the fit loads ascending, then the check loads."""
    from benchctl.errors import ParameterError

    if len(set(p.iout_a)) < 4:
        raise ParameterError(f"loss_split needs at least 4 distinct fit currents in iout_a, got {p.iout_a!r}")
    return ([{"vin_set_v": v, "iout_set_a": i, "tag": "fit"} for v in p.vin_v for i in sorted(set(p.iout_a))]
            + [{"vin_set_v": v, "iout_set_a": i, "tag": "check"} for v in p.vin_v for i in _checks(p)])


def run(bench, p: Parameters) -> None:
    source, load = bench.source, bench.load
    meter_in, meter_out = bench.input_meter, bench.output_meter
    points = sorted(plan(p), key=lambda pt: pt["vin_set_v"])
    bench.power_up(points[0]["vin_set_v"], points[0]["iout_set_a"],
                   source_current_limit_a=p.source_current_limit_a, startup_delay_s=p.startup_delay_s)
    powers = {"pin_w": meter_in.measure_power, "pout_w": meter_out.measure_power}
    readers = {"pin_w": meter_in.measure_power, "pout_w": meter_out.measure_power,
               "vout_v": meter_out.measure_voltage, "iout_a": meter_out.measure_current}
    for point in bench.sweep(points):
        bench.set_operating_point(point["vin_set_v"], point["iout_set_a"])
        settled = bench.settle_readings(powers, settle_on=("pin_w", "pout_w"), rel_tol=p.settle_rel_tol,
                                        abs_tol=p.settle_abs_tol_w, timeout_s=p.settle_timeout_s)
        readings = bench.measure_together(readers, n=p.n_readings)
        bench.record({"vin_set_v": point["vin_set_v"], "iout_set_a": point["iout_set_a"]}, readings=readings,
                     settle=settled, tag=point["tag"])
    del source, load
    bench.power_down()


def loss_table(points):
    """(vin, I, P_loss, u_P_loss or None, vout, tag) rows from a points table of powers."""
    import numpy as np

    out = []
    for _, row in points.iterrows():
        if "pin_w" not in row.index or "pout_w" not in row.index:
            continue
        n = row.get("n_readings")
        sd_in, sd_out = row.get("pin_sd_w"), row.get("pout_sd_w")
        u = None
        if n and sd_in is not None and sd_out is not None and np.isfinite(sd_in) and np.isfinite(sd_out):
            u = float(np.sqrt((sd_in ** 2 + sd_out ** 2) / n))
        i = row["iout_a"] if "iout_a" in row.index and np.isfinite(row["iout_a"]) else row["iout_set_a"]
        out.append((float(row["vin_set_v"]), float(i), float(row["pin_w"] - row["pout_w"]), u,
                    float(row["vout_v"]) if "vout_v" in row.index else float("nan"), str(row.get("tag", ""))))
    return out


def analyse(points, p: Parameters) -> list[Result]:
    """Per line voltage: a, b, c with u; the parts at the highest fit load; predicted vs measured efficiency."""
    import numpy as np

    from benchctl.analysis.loss_split import fit_loss_split, predict_efficiency
    from benchctl.errors import AnalysisInputError

    results: list[Result] = []
    rows = loss_table(points)
    method = "P_loss = a + b·I + c·I², weighted least squares, Birge ratio (common practice)"
    for vin in sorted({r[0] for r in rows}):
        fit = [r for r in rows if r[0] == vin and r[5] != "check"]
        scope = {"vin_set_v": vin}
        us = [r[3] for r in fit]
        weighted = all(u is not None and u > 0 for u in us)
        try:
            split = fit_loss_split([r[1] for r in fit], [r[2] for r in fit],
                                   u_ploss_w=us if weighted else None, vin_v=vin, birge=True)
        except AnalysisInputError as exc:
            results.append(Result("loss_fixed_w", None, "W", scope=scope, details={"reason": str(exc)}))
            continue
        info = {"method": method, "dof": split.dof, "weighted": split.weighted,
                "residual_rms_w": split.residual_rms_w, "covariance": [list(r) for r in split.covariance]}
        for name, value, u, unit in (("loss_fixed_w", split.fixed_w, split.u_fixed_w, "W"),
                                     ("loss_linear_w_per_a", split.linear_w_per_a, split.u_linear_w_per_a, "W/A"),
                                     ("loss_quadratic_w_per_a2", split.quadratic_w_per_a2,
                                      split.u_quadratic_w_per_a2, "W/A2")):
            results.append(Result(name, value, unit, scope=scope, uncertainty=u, expanded_uncertainty=2 * u,
                                  details=info))
        i_max = max(r[1] for r in fit)
        parts = split.parts_w(i_max)
        for key in ("fixed_w", "linear_w", "quadratic_w"):
            results.append(Result(f"loss_part_{key}", float(parts[key]), "W", scope={**scope, "iout_a": i_max},
                                  details={"method": method}))
        errors, u_preds = [], []
        for r in (r for r in rows if r[0] == vin and r[5] == "check"):
            vout = r[4] if np.isfinite(r[4]) else float(np.mean([f[4] for f in fit]))
            pred = predict_efficiency(split, vout, r[1])
            pout = vout * r[1]
            measured = pout / (pout + r[2])
            errors.append(measured - pred.efficiency)
            u_preds.append(pred.u_efficiency)
            results.append(Result("predicted_efficiency", pred.efficiency, "", scope={**scope, "iout_a": r[1]},
                                  uncertainty=pred.u_efficiency, expanded_uncertainty=2 * pred.u_efficiency,
                                  details={"measured_efficiency": measured, "error": measured - pred.efficiency}))
        if errors:
            results.append(Result("loss_fit_efficiency_error", float(np.max(np.abs(errors))), "", scope=scope,
                                  details={"method": "largest |measured − predicted| at the check points",
                                           "largest_predicted_u": float(np.max(u_preds))}))
    return results
