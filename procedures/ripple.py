"""Output ripple (pk-pk and RMS) over line x load, with the scope's bandwidth limit recorded.

At each operating point the output voltage is captured AC coupled through the scope's
bandwidth limit (20 MHz by default, common practice), over a whole number of switching
periods, stored as a waveform, and measured with
:func:`benchctl.analysis.ripple.output_ripple`. The bandwidth limit actually in force is
read back from the scope and stored with every point. A trace that touches the screen's
limits is captured again with a taller screen (:func:`benchctl.acquire.acquire_unclipped`,
at most ``max_reacquisitions`` times); if it still clips, pk-pk and RMS are stored as lower
bounds (clipping only shrinks them) with the flags ``clipped`` and ``lower_bound``, and a
warning event says so.
"""

from __future__ import annotations

from benchctl.procedure import Parameter, Parameters, Result, power_parameters

NAME = "ripple"
DESCRIPTION = "output ripple pk-pk and RMS over line x load (scope bandwidth limit recorded)"
ROLES = ("source", "load", "scope")

PARAMETERS = [
    Parameter("vin_v", "V", [36.0, 48.0, 75.0], minimum=0.0, maximum=1500.0, kind="float_list", help="input voltages"),
    Parameter("iout_a", "A", [0.5, 2.5, 5.0], minimum=0.0, maximum=1000.0, kind="float_list", help="load currents"),
    Parameter("fsw_hz", "Hz", 150e3, minimum=1.0, maximum=1e9,
              help="switching frequency: the record holds a whole number of its periods"),
    Parameter("periods", "", 10, minimum=1, maximum=100000, kind="int", help="switching periods per record"),
    Parameter("points", "", 20000, minimum=100, maximum=2_000_000, kind="int", help="record points"),
    Parameter("vout_channel", "", 1, minimum=1, maximum=8, kind="int", help="scope channel on the output voltage"),
    Parameter("vout_scale_v_per_div", "V", 0.02, minimum=1e-5, maximum=100.0, help="output channel V/div (AC coupled)"),
    Parameter("bandwidth_limit_hz", "Hz", 20e6, minimum=0.0, maximum=1e10,
              help="scope bandwidth limit (0 = full bandwidth); 20 MHz is common practice"),
    *power_parameters(startup_delay_s=0.1),
    Parameter("settle_s", "s", 0.05, minimum=0.0, maximum=60.0, help="wait after each load change"),
    Parameter("acquire_timeout_s", "s", 10.0, minimum=0.1, maximum=600.0, help="longest wait for one capture"),
    Parameter("max_reacquisitions", "", 3, minimum=0, maximum=10, kind="int",
              help="re-captures with a twice taller screen while the output trace clips"),
]


def plan(p: Parameters) -> list[dict]:
    return [{"vin_set_v": vin, "iout_set_a": i} for vin in p.vin_v for i in sorted(p.iout_a)]


def run(bench, p: Parameters) -> None:
    from benchctl.acquire import acquire_unclipped, report_clipping
    from benchctl.analysis.ripple import output_ripple

    source, load, scope = bench.source, bench.load, bench.role("scope")
    points = plan(p)
    ch = p.vout_channel
    scope.set_data_format("int16")
    scope.set_record(p.periods / p.fsw_hz, p.points)
    scope.set_channel_enabled(ch, True)
    scope.set_coupling(ch, "AC")
    scope.set_offset(ch, 0.0)
    scope.set_scale(ch, p.vout_scale_v_per_div)
    scope.set_bandwidth_limit(ch, p.bandwidth_limit_hz or None)
    scope.set_trigger("immediate")
    bw = scope.bandwidth_limit_hz(ch)
    bench.power_up(points[0]["vin_set_v"], points[0]["iout_set_a"],
                   source_current_limit_a=p.source_current_limit_a, startup_delay_s=p.startup_delay_s)
    vin_now = points[0]["vin_set_v"]
    for point in bench.sweep(points):
        if point["vin_set_v"] != vin_now:
            source.set_voltage(point["vin_set_v"])
            vin_now = point["vin_set_v"]
        load.set_current(point["iout_set_a"])
        bench.wait(p.settle_s)
        acq = acquire_unclipped(scope, lambda attempt: scope.single(p.acquire_timeout_s), [ch],
                                watch={ch: "output channel"}, max_retries=p.max_reacquisitions)
        wf = acq.waveform(ch)
        r = output_ripple(wf.t_s, wf.values, fsw_hz=p.fsw_hz)
        seq = bench.record({
            "vin_set_v": point["vin_set_v"], "iout_set_a": point["iout_set_a"],
            "ripple_pk_pk_v": r.pk_pk_v, "ripple_rms_v": r.rms_ac_v,
            "ripple_freq_hz": r.dominant_freq_hz if r.dominant_freq_hz is not None else float("nan"),
            "bandwidth_limit_hz": bw if bw is not None else float("nan"),
            "clipped_samples": float(wf.clipped_samples), "captures": float(acq.attempts),
        }, units={"clipped_samples": "", "captures": ""})
        bench.record_array("waveform", {"t_s": wf.t_s, "vout_ac_v": wf.values}, point_seq=seq, meta={
            "kind": "ripple", "vin_set_v": point["vin_set_v"], "iout_set_a": point["iout_set_a"],
            "coupling": "AC", "bandwidth_limit_hz": bw, "fsw_hz": p.fsw_hz, "periods_used": r.periods_used,
            "acquisition": acq.meta(),
        })
        report_clipping(bench, acq, f"{point['vin_set_v']:g} V, {point['iout_set_a']:g} A", seq=seq,
                        remedy="raise vout_scale_v_per_div or max_reacquisitions")
    bench.power_down()


def analyse(points, p: Parameters) -> list[Result]:
    import numpy as np

    from benchctl.acquire import clip_flags

    results: list[Result] = []
    if points.empty:
        return results
    # Clipping is a contraction toward the screen: it can only shrink pk-pk and (by
    # Var(f(X)) <= Var(X) for a 1-Lipschitz f) the RMS about the mean, so both are lower bounds.
    reason = "the output trace still touched the screen's limits after the re-captures: the true ripple is larger"
    clipped = points["clipped_samples"].fillna(0).to_numpy(float) > 0 if "clipped_samples" in points else \
        np.zeros(len(points), bool)
    for (_, row), cut in zip(points.iterrows(), clipped):
        bw = row["bandwidth_limit_hz"]
        scope = {"seq": int(row["seq"]), "vin_set_v": float(row["vin_set_v"]), "iout_set_a": float(row["iout_set_a"])}
        details = {"bandwidth_limit_hz": float(bw) if np.isfinite(bw) else None,
                   "method": "AC part over whole switching periods (common practice)",
                   **clip_flags(bool(cut), bound="lower_bound", reason=reason)}
        results.append(Result("ripple_pk_pk_v", float(row["ripple_pk_pk_v"]), "V", details=details, scope=scope))
        results.append(Result("ripple_rms_v", float(row["ripple_rms_v"]), "V", details=details, scope=scope))
    k = int(np.argmax(points["ripple_pk_pk_v"].to_numpy(float)))
    results.append(Result("max_ripple_pk_pk_v", float(points["ripple_pk_pk_v"].iloc[k]), "V",
                          details=clip_flags(bool(clipped.any()), bound="lower_bound",
                                             reason="at least one output trace still clipped"),
                          scope={"vin_set_v": float(points["vin_set_v"].iloc[k]),
                                 "iout_set_a": float(points["iout_set_a"].iloc[k])}))
    return results
