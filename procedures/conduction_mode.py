"""Conduction mode (CCM/DCM) over the envelope, and the boundary load at each line voltage.

At each operating point the switch current is captured over several switching periods
and classified from its value at the start of the on-time
(:func:`benchctl.analysis.conduction_mode.classify_conduction_mode`: CCM when the start
current, extrapolated back to the turn-on edge, exceeds ``threshold_ratio`` of the peak;
common practice). Then, at each line voltage, the boundary load current is found by
bisection between ``search_min_a`` and ``search_max_a``
(:func:`benchctl.analysis.conduction_mode.find_boundary`); every bisection step is a
recorded point too (tag ``bisection``), and the boundary a point of its own (tag
``boundary``). With threshold r the detected boundary sits where valley/peak = r, i.e.
(1 + r)/(1 − r) times the textbook boundary current K = K_crit (Erickson &
Maksimović 2nd ed. ch. 5, from memory); a small r keeps that shift small.
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
    Parameter("threshold_ratio", "", 0.1, minimum=1e-4, maximum=0.99,
              help="start/peak switch current above which a cycle counts as CCM (the boundary found lies at "
                   "(1+r)/(1-r) x the textbook one; a small r misreads light-load DCM, where the start "
                   "current is near the measurement's own offset)"),
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
]


def plan(p: Parameters) -> list[dict]:
    """The map points; the bisection points are found while running."""
    return [{"vin_set_v": vin, "iout_set_a": i} for vin in p.vin_v for i in sorted(p.iout_a)]


def run(bench, p: Parameters) -> None:
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
        scope.single(p.acquire_timeout_s)
        isw = scope.fetch_waveform(ch)
        gate = scope.fetch_waveform(p.gate_channel).values if p.gate_channel else None
        r = classify_conduction_mode(isw.t_s, isw.values, v_gate_v=gate, fsw_hz=p.fsw_hz,
                                     threshold_ratio=p.threshold_ratio)
        seq = bench.record({"vin_set_v": vin, "iout_set_a": iout, "ccm": 1.0 if r.mode == "CCM" else 0.0,
                            "start_current_a": r.start_current_a, "peak_current_a": r.peak_current_a,
                            "start_to_peak": r.ratio, "threshold_ratio": p.threshold_ratio,
                            "clipped_samples": float(isw.clipped_samples)},
                           units={"ccm": "", "start_to_peak": "", "threshold_ratio": "", "clipped_samples": ""},
                           tag=tag)
        if tag == "map":
            bench.record_array("waveform", {"t_s": isw.t_s, "i_switch_a": isw.values}, point_seq=seq, meta={
                "kind": "conduction_mode", "vin_set_v": vin, "iout_set_a": iout, "mode": r.mode,
                "reason": r.reason})
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
    load.set_input(False)
    source.set_output(False)


def analyse(points, p: Parameters) -> list[Result]:
    import numpy as np

    results: list[Result] = []
    if points.empty:
        return results
    method = "switch current at the start of the on-time vs threshold x peak (common practice)"
    tags = points["tag"] if "tag" in points.columns else None
    for _, row in points.iterrows():
        tag = row.get("tag", "")
        if tag == "map":
            results.append(Result("conduction_mode_ccm", float(row["ccm"]), "",
                                  details={"mode": "CCM" if row["ccm"] else "DCM", "method": method,
                                           "start_to_peak": float(row["start_to_peak"])},
                                  scope={"seq": int(row["seq"]), "vin_set_v": float(row["vin_set_v"]),
                                         "iout_set_a": float(row["iout_set_a"])}))
        elif tag == "boundary":
            found = bool(row["boundary_found"])
            results.append(Result("ccm_dcm_boundary_a", float(row["boundary_iout_a"]) if found else None, "A",
                                  details={"found": found, "lo_a": float(row["boundary_lo_a"]),
                                           "hi_a": float(row["boundary_hi_a"]),
                                           "threshold_ratio": float(row["threshold_ratio"]),
                                           "reason": "bisection on the load current" if found else
                                           "the mode is the same at both ends of the search range; widen it",
                                           "method": method},
                                  scope={"vin_set_v": float(row["vin_set_v"])}))
    results += _extrapolated_boundaries(points)
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
