"""Line rejection: the line-to-output transfer (input ripple rejection) against frequency.

The station's function generator injects a sine on the DUT's input line through the
coupling the station declares (an injection transformer in series with the source lead:
``options.coupling_v_per_v`` of the generator). At each frequency the scope captures the
input ripple (VIN probe) and the output ripple (VOUT), both AC coupled, over
``cycles`` whole periods; each is fitted with a sine at the injected frequency
(:func:`benchctl.analysis.line_response.line_rejection`), and the rejection is
20·log10(|Vout|/|Vin|) dB. The ratio uses the measured input ripple, so the coupling's own
accuracy does not enter it. A trace whose output ripple fills less than a division is taken
again at a finer scale (up to ``max_rescales`` times); one still below the scope's noise is
flagged ``below_noise`` rather than reported as a good figure.

The generator's peak excursion at the DUT input is checked by the interlock so that source ±
excursion stays inside 0 ... source_voltage_max_v (:class:`benchctl.guarded.GuardedGenerator`);
the generator is switched off at the end, however the run ends.
"""

from __future__ import annotations

import math

from benchctl.procedure import Parameter, Parameters, Result, Role, power_parameters

NAME = "line_rejection"
DESCRIPTION = "line-to-output transfer (input ripple rejection) vs frequency with the station's generator"
ROLES = ("source", "load", "scope", Role("generator", "function_generator"))

PARAMETERS = [
    Parameter("vin_v", "V", 48.0, minimum=0.0, maximum=1500.0, help="input voltage"),
    Parameter("iout_a", "A", 2.0, minimum=0.0, maximum=1000.0, help="load current"),
    Parameter("frequency_hz", "Hz", [100.0, 300.0, 1000.0, 3000.0, 10000.0], minimum=1e-3, maximum=1e7,
              kind="float_list", help="injection frequencies"),
    Parameter("injection_vpk", "V", 0.5, minimum=1e-4, maximum=100.0,
              help="injected amplitude at the DUT input, V peak (the generator's Vpp follows from the coupling)"),
    Parameter("cycles", "", 10, minimum=2, maximum=1000, kind="int", help="whole periods per record"),
    Parameter("points", "", 20000, minimum=100, maximum=2_000_000, kind="int", help="record points"),
    Parameter("vout_channel", "", 1, minimum=1, maximum=8, kind="int", help="scope channel on the output"),
    Parameter("vin_channel", "", 2, minimum=1, maximum=8, kind="int", help="scope channel on the DUT input"),
    Parameter("vout_scale_v_per_div", "V", 0.01, minimum=1e-5, maximum=100.0,
              help="output channel V/div of the first capture (AC); refined from the ripple found"),
    Parameter("max_rescales", "", 3, minimum=0, maximum=10, kind="int", help="re-captures at a finer output scale"),
    *power_parameters(startup_delay_s=0.1),
    Parameter("settle_cycles", "", 5, minimum=0, maximum=1000, kind="int",
              help="periods waited after a frequency change before the capture"),
    Parameter("acquire_timeout_s", "s", 30.0, minimum=0.1, maximum=600.0, help="longest wait for one capture"),
]

#: A fit amplitude below this many divisions of the screen is at the scope's noise (common practice).
NOISE_DIVISIONS = 0.02


def plan(p: Parameters) -> list[dict]:
    return [{"vin_set_v": p.vin_v, "iout_set_a": p.iout_a, "frequency_hz": f} for f in p.frequency_hz]


def run(bench, p: Parameters) -> None:
    import numpy as np

    from benchctl.analysis.line_response import line_rejection

    scope, gen = bench.role("scope"), bench.role("generator")
    scope.set_data_format("int16")
    setter = getattr(scope, "set_fixture_probe", None)
    if setter is not None:
        setter(p.vout_channel, "vout")
        setter(p.vin_channel, "vin")
    for ch in (p.vout_channel, p.vin_channel):
        scope.set_channel_enabled(ch, True)
        scope.set_coupling(ch, "AC")
        scope.set_offset(ch, 0.0)
        scope.set_bandwidth_limit(ch, None)
    scope.set_scale(p.vin_channel, p.injection_vpk / 3.0)
    scope.set_trigger("immediate")
    vpp = 2.0 * p.injection_vpk / gen.coupling_v_per_v
    bench.power_up(p.vin_v, p.iout_a, source_current_limit_a=p.source_current_limit_a,
                   startup_delay_s=p.startup_delay_s)
    try:
        gen.set_output(False)
        gen.set_function("sine")
        gen.set_offset(0.0)
        gen.set_amplitude(vpp)
        scale = p.vout_scale_v_per_div
        first = True
        for point in bench.sweep(plan(p)):
            f = point["frequency_hz"]
            gen.set_frequency(f)
            if first:
                gen.set_output(True)
                first = False
            scope.set_record(p.cycles / f, p.points)
            bench.wait(p.settle_cycles / f)
            rej = None
            captures = 0
            for attempt in range(p.max_rescales + 1):
                scope.set_scale(p.vout_channel, scale)
                scope.arm()
                scope.wait_acquired(p.acquire_timeout_s)
                captures += 1
                vout, vin = scope.fetch_waveform(p.vout_channel), scope.fetch_waveform(p.vin_channel)
                rej = line_rejection(vout.t_s, vin.values, vout.values, f)
                peak = float(np.max(np.abs(vout.values)))   # ripple of every kind, not only the fitted sine
                fits = not vout.clipped_samples and peak > 1.5 * scale
                if fits or attempt == p.max_rescales:
                    break
                scale = max(peak / 3.5, 1e-5) if not vout.clipped_samples else scale * 4.0
            assert rej is not None
            below_noise = rej.vout_amplitude_v < NOISE_DIVISIONS * scale
            seq = bench.record({
                "vin_set_v": p.vin_v, "iout_set_a": p.iout_a, "frequency_hz": f,
                "vin_ripple_v": rej.vin_amplitude_v, "vout_ripple_v": rej.vout_amplitude_v,
                "line_gain": rej.gain, "rejection_db": rej.rejection_db, "phase_deg": rej.phase_deg,
                "vout_scale_v_per_div": scale, "below_noise": 1.0 if below_noise else 0.0,
                "clipped_samples": float(vout.clipped_samples), "captures": float(captures),
            }, units={"frequency_hz": "Hz", "line_gain": "V/V", "rejection_db": "dB", "phase_deg": "deg",
                      "below_noise": "", "clipped_samples": "", "captures": "", "vout_scale_v_per_div": "V"})
            bench.record_array("waveform", {"t_s": vout.t_s, "vout_ac_v": vout.values, "vin_ac_v": vin.values},
                               point_seq=seq, meta={"kind": "line_rejection", "frequency_hz": f})
            if below_noise:
                bench.event("warning", f"{f:g} Hz: output ripple at the scope's noise; the rejection is a bound. "
                            "Raise injection_vpk", seq=seq)
    finally:
        gen.off_now()
    bench.power_down()


def analyse(points, p: Parameters) -> list[Result]:
    """Rejection per frequency and the least rejection over the band."""
    import numpy as np

    results: list[Result] = []
    if points.empty:
        return results
    for _, row in points.iterrows():
        flagged = bool(row.get("below_noise", 0.0)) or bool(row.get("clipped_samples", 0.0))
        results.append(Result("line_rejection_db", float(row["rejection_db"]), "dB",
                              scope={"seq": int(row["seq"]), "frequency_hz": float(row["frequency_hz"]),
                                     "vin_set_v": float(row["vin_set_v"]), "iout_set_a": float(row["iout_set_a"])},
                              details={"method": "sine fits at the injected frequency, 20 log10(|Vout|/|Vin|)",
                                       "below_noise": bool(row.get("below_noise", 0.0)),
                                       "bound": "upper_bound" if flagged else None}))
    worst = int(np.argmax(points["rejection_db"].to_numpy(float)))
    results.append(Result("min_line_rejection_db", -float(points["rejection_db"].iloc[worst]), "dB",
                          scope={"frequency_hz": float(points["frequency_hz"].iloc[worst])},
                          details={"meaning": "the least rejection over the band, as a positive number of dB"}))
    return results
