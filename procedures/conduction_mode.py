"""Conduction mode (CCM/DCM) over the envelope, and the boundary load at each line voltage.

At each operating point the switch current is captured over several switching periods
and classified from the step of the current at the start of the on-time
(:func:`benchctl.analysis.conduction_mode.classify_conduction_mode`). By default
(``threshold_ratio`` = 0) a point is CCM when that start current lies above zero by more
than three standard uncertainties of its own estimate: a DCM cycle starts from zero, so the
label follows the physical boundary to within that detection limit (a fraction of a percent
of the peak here). A ratio r > 0 asks for the older rule, CCM when start/peak > r, which
labels light-load CCM points with a start current below r x peak as DCM and moves the
boundary found to (1 + r)/(1 − r) times the textbook one, K = K_crit (Erickson &
Maksimović 2nd ed. ch. 5, from memory).

Then, at each line voltage, the boundary load current is found by bisection between
``search_min_a`` and ``search_max_a`` (:func:`benchctl.analysis.conduction_mode.find_boundary`);
every bisection step is a recorded point too (tag ``bisection``), and the boundary a point of
its own (tag ``boundary``). The analysis also extrapolates the CCM start currents along the
load to zero, a boundary with no threshold in it, and says for every map point on which side
of that boundary it lies.

A switch-current trace that touches the screen's limits is captured again with a taller
screen (:func:`benchctl.acquire.acquire_unclipped`, at most ``max_reacquisitions`` times);
if it still clips, the point's label and currents carry the flag ``clipped`` (the peak is
then a lower bound) and a warning event says so.
"""

from __future__ import annotations

import math

from benchctl.procedure import Parameter, Parameters, Result, power_parameters

NAME = "conduction_mode"
DESCRIPTION = "CCM/DCM map from the switch current, and the boundary load by bisection"
ROLES = ("source", "load", "scope")

PARAMETERS = [
    Parameter("vin_v", "V", [36.0, 48.0, 75.0], minimum=0.0, maximum=1500.0, kind="float_list", help="input voltages"),
    Parameter("iout_a", "A", [0.25, 1.0, 2.5, 5.0], minimum=0.0, maximum=1000.0, kind="float_list",
              help="load currents of the map"),
    Parameter("search_min_a", "A", 0.1, minimum=0.0, maximum=1000.0, help="lowest load of the boundary search"),
    Parameter("search_max_a", "A", 3.0, minimum=0.0, maximum=1000.0, help="highest load of the boundary search"),
    Parameter("search_tol_a", "A", 0.01, minimum=1e-6, maximum=100.0, help="bisection stops at this bracket width"),
    Parameter("find_boundary", "", True, kind="bool", help="search the boundary at each line voltage"),
    Parameter("threshold_ratio", "", 0.0, minimum=0.0, maximum=0.99,
              help="0: CCM when the start current is above zero by 3 standard uncertainties (no threshold bias); "
                   "r > 0: CCM when start/peak > r (the boundary found then lies at (1+r)/(1-r) x the textbook one)"),
    Parameter("fsw_hz", "Hz", 150e3, minimum=1.0, maximum=1e9, help="switching frequency (record length, edge hold-off)"),
    Parameter("periods", "", 8, minimum=2, maximum=10000, kind="int", help="switching periods per record"),
    Parameter("points", "", 8000, minimum=100, maximum=2_000_000, kind="int", help="record points"),
    Parameter("switch_current_channel", "", 3, minimum=1, maximum=8, kind="int", help="scope channel on the switch current"),
    Parameter("gate_channel", "", 0, minimum=0, maximum=8, kind="int", help="scope channel on the gate drive (0 = none)"),
    Parameter("switch_current_scale_a_per_div", "A", 0.5, minimum=1e-5, maximum=1000.0,
              help="switch-current channel A/div (the screen spans -1 ... +9 divisions)"),
    *power_parameters(startup_delay_s=0.1),
    Parameter("settle_s", "s", 0.02, minimum=0.0, maximum=60.0, help="wait after each load change"),
    Parameter("acquire_timeout_s", "s", 10.0, minimum=0.1, maximum=600.0, help="longest wait for one capture"),
    Parameter("max_reacquisitions", "", 3, minimum=0, maximum=10, kind="int",
              help="re-captures with a twice taller screen while the switch-current trace clips"),
]


def plan(p: Parameters) -> list[dict]:
    """The map points; the bisection points are found while running."""
    return [{"vin_set_v": vin, "iout_set_a": i} for vin in p.vin_v for i in sorted(p.iout_a)]


def run(bench, p: Parameters) -> None:
    from benchctl.acquire import acquire_unclipped, report_clipping
    from benchctl.analysis.conduction_mode import classify_conduction_mode, find_boundary

    source, load, scope = bench.source, bench.load, bench.role("scope")
    ch = p.switch_current_channel
    scope.set_data_format("int16")
    scope.set_record(p.periods / p.fsw_hz, p.points)
    for c in (ch, p.gate_channel):
        if c:
            scope.set_channel_enabled(c, True)
            scope.set_coupling(c, "DC")
    scope.set_scale(ch, p.switch_current_scale_a_per_div)
    scope.set_offset(ch, 4.0 * p.switch_current_scale_a_per_div)
    scope.set_bandwidth_limit(ch, None)
    scope.set_trigger("immediate")
    points = plan(p)
    bench.power_up(points[0]["vin_set_v"], points[0]["iout_set_a"],
                   source_current_limit_a=p.source_current_limit_a, startup_delay_s=p.startup_delay_s)

    def measure(vin: float, iout: float, tag: str) -> str:
        load.set_current(iout)
        bench.wait(p.settle_s)
        channels = [ch] + ([p.gate_channel] if p.gate_channel else [])
        acq = acquire_unclipped(scope, lambda attempt: scope.single(p.acquire_timeout_s), channels,
                                watch={ch: "switch-current channel"}, max_retries=p.max_reacquisitions)
        isw = acq.waveform(ch)
        gate = acq.waveform(p.gate_channel).values if p.gate_channel else None
        r = classify_conduction_mode(isw.t_s, isw.values, v_gate_v=gate, fsw_hz=p.fsw_hz,
                                     threshold_ratio=p.threshold_ratio or None)
        seq = bench.record({"vin_set_v": vin, "iout_set_a": iout, "ccm": 1.0 if r.mode == "CCM" else 0.0,
                            "start_current_a": r.start_current_a, "peak_current_a": r.peak_current_a,
                            "start_to_peak": r.ratio, "threshold_ratio": p.threshold_ratio,
                            "start_uncertainty_a": r.start_uncertainty_a if r.start_uncertainty_a is not None
                            else math.nan,
                            "detection_limit_a": r.detection_limit_a if r.detection_limit_a is not None else math.nan,
                            "clipped_samples": float(isw.clipped_samples),
                            "clipped_high": 1.0 if isw.clipped_high_samples else 0.0, "captures": float(acq.attempts)},
                           units={"ccm": "", "start_to_peak": "", "threshold_ratio": "", "clipped_samples": "",
                                  "clipped_high": "", "captures": ""},
                           tag=tag)
        report_clipping(bench, acq, f"{vin:g} V, {iout:g} A", seq=seq,
                        remedy="raise switch_current_scale_a_per_div or max_reacquisitions")
        if tag == "map":
            bench.record_array("waveform", {"t_s": isw.t_s, "i_switch_a": isw.values}, point_seq=seq, meta={
                "kind": "conduction_mode", "vin_set_v": vin, "iout_set_a": iout, "mode": r.mode,
                "reason": r.reason, "rule": r.rule, "acquisition": acq.meta()})
        return r.mode

    vin_now = None
    for point in bench.sweep(points):
        if point["vin_set_v"] != vin_now:
            source.set_voltage(point["vin_set_v"])
            vin_now = point["vin_set_v"]
        measure(point["vin_set_v"], point["iout_set_a"], "map")
    if p.find_boundary:
        for vin in p.vin_v:
            source.set_voltage(vin)
            search = find_boundary(lambda i, v=vin: measure(v, i, "bisection"), p.search_min_a, p.search_max_a,
                                   p.search_tol_a)
            bench.record({"vin_set_v": vin, "boundary_iout_a": search.boundary if search.found else math.nan,
                          "boundary_lo_a": search.lo_value, "boundary_hi_a": search.hi_value,
                          "boundary_found": 1.0 if search.found else 0.0,
                          "threshold_ratio": p.threshold_ratio},
                         units={"boundary_found": "", "threshold_ratio": ""}, tag="boundary")
            if not search.found:
                bench.event("warning", f"no CCM/DCM boundary at {vin:g} V: {search.reason}")
    bench.power_down()


def analyse(points, p: Parameters) -> list[Result]:
    import numpy as np

    from benchctl.acquire import clip_flags

    results: list[Result] = []
    if points.empty:
        return results
    tags = points["tag"] if "tag" in points.columns else None
    extrapolated = _extrapolated_boundaries(points)
    boundary_at = {r.scope["vin_set_v"]: r.value for r in extrapolated if r.value is not None}
    for _, row in points.iterrows():
        tag = row.get("tag", "")
        r = float(row["threshold_ratio"]) if row.get("threshold_ratio") == row.get("threshold_ratio") else 0.0
        method = ("step of the switch current at turn-on above zero by 3 standard uncertainties (common practice)"
                  if not r else "switch current at the start of the on-time vs threshold x peak (common practice)")
        if tag == "map":
            clipped = bool(row.get("clipped_samples", 0) or 0)
            details = {"mode": "CCM" if row["ccm"] else "DCM", "method": method,
                       "start_to_peak": float(row["start_to_peak"]),
                       **clip_flags(clipped, reason="the switch-current trace still touched the screen's limits: "
                                    "the peak is at least the stored one and the label may be wrong")}
            limit = row.get("detection_limit_a")
            if limit is not None and limit == limit:
                details["detection_limit_a"] = float(limit)
            vin = float(row["vin_set_v"])
            if vin in boundary_at:
                side = "CCM" if float(row["iout_set_a"]) > boundary_at[vin] else "DCM"
                details["side_of_extrapolated_boundary"] = side
            results.append(Result("conduction_mode_ccm", float(row["ccm"]), "", details=details,
                                  scope={"seq": int(row["seq"]), "vin_set_v": vin,
                                         "iout_set_a": float(row["iout_set_a"])}))
        elif tag == "boundary":
            found = bool(row["boundary_found"])
            results.append(Result("ccm_dcm_boundary_a", float(row["boundary_iout_a"]) if found else None, "A",
                                  details={"found": found, "lo_a": float(row["boundary_lo_a"]),
                                           "hi_a": float(row["boundary_hi_a"]),
                                           "threshold_ratio": r,
                                           "reason": "bisection on the load current" if found else
                                           "the mode is the same at both ends of the search range; widen it",
                                           "method": method},
                                  scope={"vin_set_v": float(row["vin_set_v"])}))
    results += extrapolated
    if tags is not None and (tags == "map").any():
        ccm = points.loc[tags == "map", "ccm"].to_numpy(float)
        results.append(Result("dcm_point_count", float(np.sum(ccm == 0)), ""))
    return results


def _extrapolated_boundaries(points) -> list[Result]:
    """The boundary where the CCM start current, extrapolated along the load, reaches zero.

    In CCM the switch current at the start of the on-time is the average current minus
    half the ripple; at a fixed line the ripple stays (nearly) constant and the average
    grows with the load, so the start current is a straight line in the load whose zero
    is the CCM/DCM boundary (Erickson & Maksimovic 2nd ed. ch. 5, from memory). Unlike the
    threshold edge, it carries no (1+r)/(1-r) bias.
    """
    import numpy as np

    out: list[Result] = []
    if "ccm" not in points.columns or "start_current_a" not in points.columns:
        return out
    measured = points[points["ccm"].notna() & points["start_current_a"].notna()]
    for vin, group in measured.groupby("vin_set_v"):
        ccm = group[group["ccm"] == 1.0]
        loads = ccm["iout_set_a"].to_numpy(float)
        starts = ccm["start_current_a"].to_numpy(float)
        if len(np.unique(loads)) < 2:
            out.append(Result("ccm_dcm_boundary_extrapolated_a", None, "A",
                              details={"found": False, "reason": "fewer than two CCM loads at this line voltage; "
                                       "measure more loads above the boundary"}, scope={"vin_set_v": float(vin)}))
            continue
        slope, intercept = np.polyfit(loads, starts, 1)
        found = slope > 0 and -intercept / slope >= 0
        out.append(Result(
            "ccm_dcm_boundary_extrapolated_a", float(-intercept / slope) if found else None, "A",
            details={"found": bool(found), "ccm_points": int(len(loads)), "slope_a_per_a": float(slope),
                     "intercept_a": float(intercept),
                     "reason": "" if found else "the CCM start current does not fall toward zero with the load",
                     "method": "zero of a straight line through the CCM start currents against the load"},
            scope={"vin_set_v": float(vin)}))
    return out
