"""Closed-loop output impedance against frequency at chosen line x load points.

Set-up (common practice): the analyzer's source drives the electronic load's current
modulation input, so the load draws its CC level plus a small sine; the analyzer's ch1
is on the load's current monitor (scaled to amperes by 1/r_mon, the monitor's V/A read
from the load) and ch2 on the output voltage at the DUT's output terminals; in its ratio
function it reports H = v_out/i. Z_out = −H (the current drawn is taken out of the
converter; Erickson & Maksimović, *Fundamentals of Power Electronics*, 2nd ed., ch. 9:
Z_out = Z_out,open/(1 + T)). The load modulator's own bandwidth divides out of the ratio
(it only lowers the stimulus, so the noise grows above it); the current monitor's single
pole, read from the load, is divided out (``monitor_correction``).

At each point the source and load are set, the output is settled, the modulation is
switched on for the sweep and off after it. The sine's peak current, gain × amplitude,
must stay below ``max_swing_fraction`` of the DC load (the load never reverses and the
converter stays at its operating point: small signal) and the DC level plus the swing
inside the station's load current limit; a point that breaks either is refused before
anything is set. The trace is stored as the array ``zout`` (freq_hz, mag_ohm, mag_dbohm,
phase_deg, re, im) linked to a point with the peak |Z|, where it is, and |Z| at the
lowest frequency; a peak at the band edge is flagged.
"""

from __future__ import annotations

import numpy as np

from benchctl.procedure import Parameter, Parameters, Result, Role, power_parameters

NAME = "output_impedance"
DESCRIPTION = "closed-loop output impedance against frequency (load modulation, analyzer ratio)"
ROLES = ("source", "load", Role("analyzer", "loop_analyzer"))

PARAMETERS = [
    Parameter("vin_v", "V", [36.0, 48.0, 75.0], minimum=0.0, maximum=1500.0, kind="float_list",
              help="line voltages"),
    Parameter("iout_a", "A", [2.5, 5.0], minimum=0.0, maximum=1000.0, kind="float_list",
              help="DC load currents (each with every line voltage)"),
    Parameter("vout_nom_v", "V", 5.0, minimum=0.0, maximum=1500.0, help="nominal output voltage"),
    *power_parameters(startup_delay_s=0.05),
    Parameter("settle_rel_tol", "", 1e-3, minimum=0.0, maximum=0.1, help="settle: relative agreement of Vout"),
    Parameter("settle_abs_tol_v", "V", 2e-3, minimum=0.0, maximum=1.0, help="settle: absolute agreement of Vout"),
    Parameter("settle_timeout_s", "s", 5.0, minimum=0.0, maximum=600.0, help="settle: give up after"),
    Parameter("start_hz", "Hz", 10.0, minimum=1e-3, maximum=1e8, help="sweep start frequency"),
    Parameter("stop_hz", "Hz", 100e3, minimum=1e-3, maximum=1e8, help="sweep stop frequency"),
    Parameter("points", "", 81, minimum=3, maximum=10001, kind="int", help="sweep points (log spaced)"),
    Parameter("bandwidth_hz", "Hz", 10.0, minimum=1e-3, maximum=1e6, help="analyzer measurement bandwidth"),
    Parameter("averaging", "", 1, minimum=1, maximum=1024, kind="int", help="integrations averaged per point"),
    Parameter("stimulus_v", "V", 0.25, minimum=0.0, maximum=100.0,
              help="analyzer source amplitude at the load's modulation input, V peak"),
    Parameter("modulation_gain_a_per_v", "A/V", 2.0, minimum=1e-3, maximum=100.0,
              help="the load's modulation transconductance"),
    Parameter("max_swing_fraction", "", 0.5, minimum=0.0, maximum=1.0,
              help="largest peak modulation current as a fraction of the DC load (small signal)"),
    Parameter("monitor_correction", "", True, kind="bool",
              help="divide out the load current monitor's single pole (its bandwidth read from the load)"),
    Parameter("wait_method", "", "opc", kind="str", choices=("opc", "poll"),
              help="wait for the sweep with *OPC? or by polling the status"),
]


def plan(p: Parameters) -> list[dict]:
    """Every line voltage with every load current, in that order."""
    return [{"vin_set_v": float(v), "iout_set_a": float(i)} for v in p.vin_v for i in p.iout_a]


def swing_a(p: Parameters) -> float:
    """Peak modulation current at low frequency, A."""
    return float(p.stimulus_v * p.modulation_gain_a_per_v)


def _check_points(bench, p: Parameters, points: list[dict]) -> None:
    from benchctl.errors import ParameterError

    swing = swing_a(p)
    top = bench.limits.load_current_max_a
    for point in points:
        i = point["iout_set_a"]
        if swing > p.max_swing_fraction * i:
            raise ParameterError(
                f"a modulation of ±{swing:g} A (stimulus_v x modulation_gain_a_per_v) is more than "
                f"{p.max_swing_fraction:g} of the {i:g} A load: lower stimulus_v or raise the load")
        if i + swing > top:
            raise ParameterError(f"{i:g} A + {swing:g} A of modulation exceeds the station's load_current_max_a "
                                 f"{top:g} A: lower the load or the stimulus")


def run(bench, p: Parameters) -> None:
    from benchctl.analysis.output_impedance import impedance_from_ratio, impedance_summary, magnitude_db_ohm, phase_deg

    source, load, analyzer = bench.source, bench.load, bench.role("analyzer")
    points = plan(p)
    _check_points(bench, p, points)
    monitor_v_per_a = load.monitor_scale_v_per_a()
    monitor_bw = load.monitor_bandwidth_hz() if p.monitor_correction else None
    modulator_bw = load.modulation_bandwidth_hz()
    load.set_modulation(False)
    load.set_modulation_gain(p.modulation_gain_a_per_v)
    analyzer.set_function("ratio")
    analyzer.set_channel_scale(1, 1.0 / monitor_v_per_a)
    analyzer.set_channel_scale(2, 1.0)
    analyzer.set_sweep(p.start_hz, p.stop_hz, p.points, "log")
    analyzer.set_bandwidth(p.bandwidth_hz)
    analyzer.set_averaging(p.averaging)
    analyzer.set_injection(p.stimulus_v)
    bench.power_up(points[0]["vin_set_v"], points[0]["iout_set_a"],
                   source_current_limit_a=p.source_current_limit_a, startup_delay_s=p.startup_delay_s)
    try:
        for point in bench.sweep(points):
            bench.set_operating_point(point["vin_set_v"], point["iout_set_a"])
            settled = bench.settle(load.measure_voltage, rel_tol=p.settle_rel_tol, abs_tol=p.settle_abs_tol_v,
                                   timeout_s=p.settle_timeout_s, quantity="vout_v")
            load.set_modulation(True)
            try:
                trace = analyzer.measure(method=p.wait_method)
            finally:
                load.set_modulation(False)
            f = np.asarray(trace.freq_hz, float)
            z = impedance_from_ratio(f, trace.response, monitor_bandwidth_hz=monitor_bw)
            s = impedance_summary(f, z)
            vin, vout, iout = source.measure_voltage(), load.measure_voltage(), load.measure_current()
            values = {
                "vin_set_v": point["vin_set_v"], "iout_set_a": point["iout_set_a"],
                "vin_v": vin, "vout_v": vout, "iout_a": iout,
                "stimulus_v": p.stimulus_v, "swing_a": swing_a(p),
                "zout_peak_ohm": s.peak_ohm, "zout_peak_freq_hz": s.peak_freq_hz,
                "zout_peak_at_edge": 1.0 if s.peak_at_band_edge else 0.0,
                "zout_low_freq_ohm": s.low_freq_ohm,
                "band_min_hz": s.band_min_hz, "band_max_hz": s.band_max_hz,
            }
            seq = bench.record(values, settle=settled, units={"zout_peak_at_edge": "", "stimulus_v": "V"})
            bench.record_array(
                "zout", {"freq_hz": f, "mag_ohm": np.abs(z), "mag_dbohm": magnitude_db_ohm(z),
                         "phase_deg": phase_deg(z), "re": z.real.copy(), "im": z.imag.copy()},
                units={"mag_dbohm": "dBohm", "re": "ohm", "im": "ohm"}, point_seq=seq,
                meta={"vin_set_v": point["vin_set_v"], "iout_set_a": point["iout_set_a"], "vout_v": vout,
                      "convention": "Z = -v_out/i_load at the output terminals",
                      "monitor_scale_v_per_a": monitor_v_per_a, "monitor_bandwidth_hz": monitor_bw,
                      "modulation_bandwidth_hz": modulator_bw, "stimulus_v": p.stimulus_v,
                      "modulation_gain_a_per_v": p.modulation_gain_a_per_v, "bandwidth_hz": p.bandwidth_hz,
                      "notes": list(s.notes)})
            if s.peak_at_band_edge:
                bench.event("warning", f"output impedance at {point['vin_set_v']:g} V, {point['iout_set_a']:g} A: "
                            + "; ".join(s.notes))
    finally:
        analyzer.set_function("loop")
    bench.power_down()


def analyse(points, p: Parameters) -> list[Result]:
    """Per point: peak |Z| (flagged at a band edge), its frequency, |Z| at the lowest frequency; the worst peak."""
    results: list[Result] = []
    if points.empty or "zout_peak_ohm" not in points.columns:
        return results
    method = "Z = -v_out/i_load by load modulation (Erickson & Maksimovic 2nd ed. ch. 9: Zout,open/(1 + T))"
    for _, r in points.iterrows():
        scope = {"vin_set_v": float(r["vin_set_v"]), "iout_set_a": float(r["iout_set_a"])}
        edge = bool(r.get("zout_peak_at_edge", 0.0))
        details: dict = {"method": method, "seq": int(r["seq"]), "peak_freq_hz": float(r["zout_peak_freq_hz"]),
                         "band_hz": [float(r["band_min_hz"]), float(r["band_max_hz"])]}
        if edge:
            details.update(flags=["at_band_edge"],
                           flag_reasons="largest |Z| at the end of the sweep: the peak may lie outside the band")
        results.append(Result("zout_peak_ohm", float(r["zout_peak_ohm"]), "ohm", scope=scope, details=details))
        results.append(Result("zout_peak_freq_hz", float(r["zout_peak_freq_hz"]), "Hz", scope=scope,
                              details={k: v for k, v in details.items() if k != "peak_freq_hz"}))
        results.append(Result("zout_low_freq_ohm", float(r["zout_low_freq_ohm"]), "ohm", scope=scope,
                              details={"method": method, "at_hz": float(r["band_min_hz"])}))
    col = points["zout_peak_ohm"].to_numpy(float)
    if np.isfinite(col).any():
        k = int(np.nanargmax(col))
        row = points.iloc[k]
        details = {"what": "largest peak |Z| over the points", "points": int(len(points))}
        if bool(row.get("zout_peak_at_edge", 0.0)):
            details.update(flags=["at_band_edge"], flag_reasons="that peak lies at the end of its sweep")
        results.append(Result("max_zout_peak_ohm", float(col[k]), "ohm", details=details,
                              scope={"vin_set_v": float(row["vin_set_v"]), "iout_set_a": float(row["iout_set_a"])}))
    return results
