"""Switch-node (drain) voltage: peak, ringing frequency and damping, parasitics and an RC snubber.

At each operating point the drain (switch-node) voltage is captured at full bandwidth
around the switching edge (edge trigger on the drain channel with a hold-off), stored,
and a damped sinusoid is fitted to the ring that follows the peak
(:func:`benchctl.analysis.ringing.fit_ringing`): ring frequency, natural frequency,
damping ratio, Q. With ``c_add_f`` > 0 the two-capacitor method runs as well: a known
capacitance is added at the node (``scope.set_fixture_capacitance``: on the simulated
bench a command of the simulated DUT fixture, on a real station the command that
switches a fixture capacitor, set in the station file), the ring is measured again, and
C_par = C_add/((f1/f2)² − 1), L_par = 1/((2π·f1)²·C_par) (snubber application-note
practice, e.g. R. Severns, "Design of Snubbers for Power Circuits" — from memory). The
RC snubber suggested is R = √(L_par/C_par), C = ``snubber_c_multiple`` × C_par, with
its loss C·V²·fs (Mohan, Undeland & Robbins, Power Electronics, 3rd ed., ch. 27 —
from memory).
"""

from __future__ import annotations

import numpy as np

from benchctl.procedure import Parameter, Parameters, Result, power_parameters

NAME = "switch_node"
DESCRIPTION = "drain peak, ringing frequency and damping; two-capacitor parasitics and an RC snubber"
ROLES = ("source", "load", "scope")

PARAMETERS = [
    Parameter("vin_v", "V", [48.0, 75.0], minimum=0.0, maximum=1500.0, kind="float_list", help="input voltages"),
    Parameter("iout_a", "A", [5.0], minimum=0.0, maximum=1000.0, kind="float_list", help="load currents"),
    Parameter("fsw_hz", "Hz", 150e3, minimum=1.0, maximum=1e9, help="switching frequency (snubber loss)"),
    Parameter("drain_channel", "", 2, minimum=1, maximum=8, kind="int", help="scope channel on the drain / switch node"),
    Parameter("drain_scale_v_per_div", "V", 20.0, minimum=1e-3, maximum=1e4, help="drain channel V/div"),
    Parameter("drain_offset_v", "V", 60.0, minimum=-1e4, maximum=1e4, help="drain channel centre value"),
    Parameter("trigger_level_fraction", "", 0.5, minimum=0.01, maximum=0.99,
              help="edge trigger level as a fraction of the input voltage"),
    Parameter("trigger_holdoff_s", "s", 200e-9, minimum=0.0, maximum=1.0,
              help="the drain must stay below the level this long before an edge counts (skips the ring)"),
    Parameter("record_s", "s", 3e-6, minimum=1e-9, maximum=1.0, help="record length"),
    Parameter("pre_trigger_s", "s", 3e-7, minimum=0.0, maximum=1.0, help="record before the edge"),
    Parameter("points", "", 10000, minimum=100, maximum=2_000_000, kind="int", help="record points"),
    Parameter("c_add_f", "F", 0.0, minimum=0.0, maximum=1e-6,
              help="known capacitance added for the two-capacitor method (0 = skip it)"),
    Parameter("snubber_c_multiple", "", 3.0, minimum=1.0, maximum=100.0, help="snubber C as a multiple of C_par"),
    *power_parameters(startup_delay_s=0.1),
    Parameter("settle_s", "s", 0.02, minimum=0.0, maximum=60.0, help="wait after each change"),
    Parameter("acquire_timeout_s", "s", 10.0, minimum=0.1, maximum=600.0, help="longest wait for one capture"),
    Parameter("max_reacquisitions", "", 3, minimum=0, maximum=10, kind="int",
              help="re-captures with a twice taller screen while the drain trace clips"),
]


def plan(p: Parameters) -> list[dict]:
    return [{"vin_set_v": vin, "iout_set_a": i} for vin in p.vin_v for i in sorted(p.iout_a)]


def run(bench, p: Parameters) -> None:
    from benchctl.analysis.ringing import fit_ringing, parasitics_from_two_frequencies, rc_snubber
    from benchctl.analysis.ringing import ring_start_index
    from benchctl.acquire import acquire_unclipped, report_clipping

    source, load, scope = bench.source, bench.load, bench.role("scope")
    ch = p.drain_channel
    scope.set_data_format("int16")
    scope.set_record(p.record_s, p.points, pre_trigger_s=p.pre_trigger_s)
    scope.set_channel_enabled(ch, True)
    scope.set_coupling(ch, "DC")
    scope.set_scale(ch, p.drain_scale_v_per_div)
    scope.set_offset(ch, p.drain_offset_v)
    scope.set_bandwidth_limit(ch, None)
    scope.set_fixture_capacitance(0.0)
    points = plan(p)
    bench.power_up(points[0]["vin_set_v"], points[0]["iout_set_a"],
                   source_current_limit_a=p.source_current_limit_a, startup_delay_s=p.startup_delay_s)

    def capture(vin: float):
        scope.set_trigger(ch, level=p.trigger_level_fraction * vin, slope="rising", holdoff_s=p.trigger_holdoff_s)
        acq = acquire_unclipped(scope, lambda attempt: scope.single(p.acquire_timeout_s), [ch],
                                watch={ch: "drain channel"}, max_retries=p.max_reacquisitions)
        wf = acq.waveform(ch)
        fit = fit_ringing(wf.t_s, wf.values, start_index=ring_start_index(wf.values))
        return wf, fit, acq

    vin_now = points[0]["vin_set_v"]
    for point in bench.sweep(points):
        vin = point["vin_set_v"]
        if vin != vin_now:
            source.set_voltage(vin)
            vin_now = vin
        load.set_current(point["iout_set_a"])
        bench.wait(p.settle_s)
        wf, fit, acq = capture(vin)
        values = {
            "vin_set_v": vin, "iout_set_a": point["iout_set_a"],
            "drain_peak_v": float(np.max(wf.values)), "drain_settled_v": fit.offset_v,
            "ring_freq_hz": fit.f_ring_hz, "ring_natural_freq_hz": fit.f_natural_hz,
            "ring_damping_ratio": fit.damping_ratio, "ring_q": fit.q_factor, "ring_fit_ok": 1.0 if fit.fit_ok else 0.0,
            "clipped_samples": float(wf.clipped_samples), "clipped_high": 1.0 if wf.clipped_high_samples else 0.0,
            "clipped_low": 1.0 if wf.clipped_low_samples else 0.0, "captures": float(acq.attempts),
        }
        extra: dict[str, float] = {}
        acq2 = None
        if p.c_add_f > 0:
            scope.set_fixture_capacitance(p.c_add_f)
            try:
                bench.wait(p.settle_s)
                _, fit2, acq2 = capture(vin)
            finally:
                scope.set_fixture_capacitance(0.0)
            extra["ring_natural_freq_cadd_hz"] = fit2.f_natural_hz
            extra["c_add_f"] = p.c_add_f
            extra["clipped_cadd"] = 1.0 if acq2.clipped else 0.0
            lc = parasitics_from_two_frequencies(fit.f_natural_hz, fit2.f_natural_hz, p.c_add_f)
            sn = rc_snubber(lc.c_par_f, lc.l_par_h, v_switch_v=fit.offset_v, fsw_hz=p.fsw_hz,
                            c_multiple=p.snubber_c_multiple)
            extra.update({"c_par_f": lc.c_par_f, "l_par_h": lc.l_par_h, "z0_ohm": lc.z0_ohm,
                          "snubber_r_ohm": sn.r_ohm, "snubber_c_f": sn.c_f, "snubber_loss_w": sn.loss_w})
        seq = bench.record({**values, **extra},
                           units={"ring_damping_ratio": "", "ring_q": "", "ring_fit_ok": "", "clipped_samples": "",
                                  "clipped_high": "", "clipped_low": "", "captures": "", "clipped_cadd": ""})
        where = f"{vin:g} V, {point['iout_set_a']:g} A"
        report_clipping(bench, acq, where, seq=seq, remedy="raise drain_scale_v_per_div or max_reacquisitions")
        if acq2 is not None:
            report_clipping(bench, acq2, f"{where} with c_add_f", seq=seq,
                            remedy="raise drain_scale_v_per_div or max_reacquisitions")
        bench.record_array("waveform", {"t_s": wf.t_s, "v_drain_v": wf.values}, point_seq=seq, meta={
            "kind": "switch_node", "vin_set_v": vin, "iout_set_a": point["iout_set_a"], "coupling": "DC",
            "bandwidth_limit_hz": None, "acquisition": acq.meta(), "fit": {
                "f_ring_hz": fit.f_ring_hz, "decay_rate_per_s": fit.decay_rate_per_s,
                "amplitude_v": fit.amplitude_v, "phase_rad": fit.phase_rad, "offset_v": fit.offset_v,
                "start_time_s": fit.start_time_s, "samples_used": fit.samples_used, "fit_ok": fit.fit_ok,
                "fit_reason": fit.fit_reason}})
        if not fit.fit_ok:
            bench.event("warning", f"ring fit at {vin:g} V, {point['iout_set_a']:g} A: {fit.fit_reason}", seq=seq)
    bench.power_down()


def _flag(row, name: str) -> bool:
    value = row.get(name) if hasattr(row, "get") else None
    return value is not None and value == value and bool(value)


def analyse(points, p: Parameters) -> list[Result]:
    from benchctl.acquire import clip_flags, add_flags

    results: list[Result] = []
    if points.empty:
        return results
    any_high = False
    for _, row in points.iterrows():
        scope = {"seq": int(row["seq"]), "vin_set_v": float(row["vin_set_v"]), "iout_set_a": float(row["iout_set_a"])}
        high, low = _flag(row, "clipped_high"), _flag(row, "clipped_low")
        any_high |= high
        clipped = high or low or bool(row.get("clipped_samples", 0) or 0)
        peak_flags = clip_flags(clipped, bound="lower_bound" if high else None,
                                reason="the drain trace still touched the top of the screen after the re-captures: "
                                       "the true peak is at least this" if high else
                                       "the drain trace touched the bottom of the screen")
        results.append(Result("drain_peak_v", float(row["drain_peak_v"]), "V", details=peak_flags, scope=scope))
        fit_note = {"method": "damped-sinusoid least-squares fit (scipy.optimize.least_squares)",
                    "fit_ok": bool(row["ring_fit_ok"])}
        fit_note = add_flags(fit_note, clip_flags(clipped, reason="the ring was fitted to a clipped trace"))
        results.append(Result("ring_freq_hz", float(row["ring_freq_hz"]), "Hz", details=fit_note, scope=scope))
        results.append(Result("ring_damping_ratio", float(row["ring_damping_ratio"]), "", details=fit_note, scope=scope))
        if "c_par_f" in row and row["c_par_f"] == row["c_par_f"]:
            src = "two-capacitor method (Severns, Design of Snubbers for Power Circuits, from memory)"
            lc_flags = clip_flags(clipped or _flag(row, "clipped_cadd"),
                                  reason="a ring used by the two-capacitor method was fitted to a clipped trace")
            results.append(Result("parasitic_c_f", float(row["c_par_f"]), "F",
                                  details={"method": src, **lc_flags}, scope=scope))
            results.append(Result("parasitic_l_h", float(row["l_par_h"]), "H",
                                  details={"method": src, **lc_flags}, scope=scope))
            results.append(Result("snubber_r_ohm", float(row["snubber_r_ohm"]), "ohm", scope=scope, details={
                "c_f": float(row["snubber_c_f"]), "loss_w": float(row["snubber_loss_w"]),
                "method": "R = sqrt(L/C), C = k x C_par, P = C V^2 fs (Mohan, Undeland & Robbins 3rd ed. ch. 27, "
                          "from memory)", **lc_flags}))
    if len(points):
        k = int(points["drain_peak_v"].to_numpy(float).argmax())
        # a clipped point's true peak is at least its stored value, so the maximum is then a lower bound
        results.append(Result("max_drain_peak_v", float(points["drain_peak_v"].iloc[k]), "V",
                              details=clip_flags(any_high, bound="lower_bound",
                                                 reason="at least one drain trace still clipped at the top"),
                              scope={"vin_set_v": float(points["vin_set_v"].iloc[k]),
                                     "iout_set_a": float(points["iout_set_a"].iloc[k])}))
    return results

