"""Input thresholds: UVLO on and off and their hysteresis, by slow ramps and bisection.

With a light constant-current load, the source ramps up in ``ramp_step_v`` steps from
``ramp_start_v`` (each held ``dwell_s``) until the output comes up: the last and first
steps bracket the on threshold.  Then it ramps down from there until the output drops:
the off threshold's bracket.  Each bracket is narrowed by bisection
(:mod:`benchctl.analysis.thresholds`) to ``resolution_v``; every trial starts from a known
state — for the on threshold the converter is first locked out (input ``reset_v`` below
the off bracket, held ``reset_s``), for the off threshold it is first running (input above
the on bracket) — then the input is set to the trial value and the output is read after
``dwell_s``.  The converter counts as running when the output reads above
``on_fraction`` × ``vout_nominal_v``.

The thresholds are stated at the source's setpoint, ± half the final bracket (the
bisection resolution); the DUT input reads lower by the cable drop of the input current,
which the input meter's reading at the bracket shows (stored beside each threshold).
"""

from __future__ import annotations

from benchctl.procedure import Parameter, Parameters, Result

NAME = "input_thresholds"
DESCRIPTION = "UVLO on/off thresholds and hysteresis: ramps up and down, then bisection"
ROLES = ("source", "load", "output_meter")

PARAMETERS = [
    Parameter("ramp_start_v", "V", 28.0, minimum=0.0, maximum=1500.0, help="ramp start (below the off threshold)"),
    Parameter("ramp_stop_v", "V", 40.0, minimum=0.0, maximum=1500.0, help="ramp end (above the on threshold)"),
    Parameter("ramp_step_v", "V", 0.5, minimum=1e-4, maximum=100.0, help="ramp step"),
    Parameter("resolution_v", "V", 0.02, minimum=1e-5, maximum=10.0, help="bisection stops at this bracket width"),
    Parameter("dwell_s", "s", 0.15, minimum=0.0, maximum=60.0,
              help="hold at each input before the output is read (longer than the start delay + soft start)"),
    Parameter("reset_s", "s", 0.2, minimum=0.0, maximum=60.0, help="hold at the reset input before a trial"),
    Parameter("reset_margin_v", "V", 2.0, minimum=0.0, maximum=100.0,
              help="a trial starts this far beyond the other threshold's bracket"),
    Parameter("iout_a", "A", 0.5, minimum=0.0, maximum=1000.0, help="light CC load during the search"),
    Parameter("vout_nominal_v", "V", 5.0, minimum=0.0, maximum=1500.0, help="the regulated output"),
    Parameter("on_fraction", "", 0.5, minimum=0.01, maximum=0.99, help="running: output above this fraction"),
    Parameter("source_current_limit_a", "A", None, minimum=0.0, maximum=1000.0, optional=True,
              help="source current limit (default: the station's source_current_max_a)"),
]


def _ramp(p: Parameters) -> list[float]:
    from benchctl.procedure import frange

    return frange(p.ramp_start_v, p.ramp_stop_v, p.ramp_step_v)


def plan(p: Parameters) -> list[dict]:
    """The two ramps (up, down) step by step; the bisection trials follow from what they find."""
    from benchctl.analysis.thresholds import trials_needed

    up = _ramp(p)
    trials = trials_needed(p.ramp_step_v, p.resolution_v)
    return ([{"phase": "ramp_up", "vin_set_v": v} for v in up] + [{"phase": "ramp_down", "vin_set_v": v}
                                                                   for v in reversed(up)]
            + [{"phase": "bisect_on", "trial": k} for k in range(trials)]
            + [{"phase": "bisect_off", "trial": k} for k in range(trials)])


def run(bench, p: Parameters) -> None:
    from benchctl.analysis.thresholds import Bracket, bisect_threshold, ramp_bracket
    from benchctl.errors import ParameterError

    source, load, meter = bench.source, bench.load, bench.output_meter
    level = p.on_fraction * p.vout_nominal_v
    if not p.ramp_stop_v > p.ramp_start_v:
        raise ParameterError(f"ramp_stop_v {p.ramp_stop_v:g} V must be above ramp_start_v {p.ramp_start_v:g} V")
    bench.power_up(p.ramp_start_v, p.iout_a, source_current_limit_a=p.source_current_limit_a, startup_delay_s=0.0)
    readers = {"vin_v": bench.input_meter.measure_voltage} if bench.has_role("input_meter") else {}
    points = iter(bench.sweep(plan(p)))

    def state_at(vin: float, phase: str, extra: dict) -> bool:
        next(points, None)          # progress: one planned step per reading
        source.set_voltage(vin)
        bench.mark_change()
        bench.wait(p.dwell_s)
        vout = meter.measure_voltage()
        running = vout > level
        values = {"vin_set_v": vin, "vout_v": vout, "running": 1.0 if running else 0.0, **extra}
        for name, read in readers.items():
            values[name] = read()
        bench.record(values, units={"running": "", "trial": ""}, tag=phase)
        return running

    def ramp(values: list[float], phase: str) -> tuple[list[float], list[bool]]:
        seen_v: list[float] = []
        seen: list[bool] = []
        for v in values:
            seen_v.append(v)
            seen.append(state_at(v, phase, {}))
            if len(seen) > 1 and seen[-1] != seen[0]:
                break
        return seen_v, seen

    up = _ramp(p)
    up_v, up_s = ramp(up, "ramp_up")
    on_br = ramp_bracket(up_v, up_s)
    if on_br is None or up_s[0]:
        bench.event("warning", f"the output did not come up between {p.ramp_start_v:g} and {p.ramp_stop_v:g} V "
                    "(or was already up at the start); widen the ramp", phase="ramp_up")
        bench.power_down()
        return
    down_from = [v for v in reversed(up) if v <= on_br.high_v]
    down_v, down_s = ramp(down_from, "ramp_down")
    off_br = ramp_bracket(down_v, down_s)
    if off_br is None:
        bench.event("warning", f"the output did not drop down to {p.ramp_start_v:g} V; lower ramp_start_v",
                    phase="ramp_down")
        bench.power_down()
        return
    def on_trial(v: float) -> bool:
        source.set_voltage(max(off_br.low_v - p.reset_margin_v, 0.0))
        bench.wait(p.reset_s)
        return state_at(v, "bisect_on", {"trial": 1.0})

    def off_trial(v: float) -> bool:
        source.set_voltage(on_br.high_v + p.reset_margin_v)
        bench.wait(p.reset_s)
        return state_at(v, "bisect_off", {"trial": 1.0})     # running: above the off threshold

    on = bisect_threshold(on_trial, on_br, p.resolution_v)
    off = bisect_threshold(off_trial, Bracket(off_br.low_v, off_br.high_v), p.resolution_v)
    bench.event("thresholds", f"UVLO on {on.value_v:.4f} V ± {on.half_width_v:.4f} V, "
                f"off {off.value_v:.4f} V ± {off.half_width_v:.4f} V",
                on_v=on.value_v, on_half_width_v=on.half_width_v, off_v=off.value_v,
                off_half_width_v=off.half_width_v, on_trials=on.trials, off_trials=off.trials)
    bench.record({"uvlo_on_v": on.value_v, "uvlo_on_half_width_v": on.half_width_v,
                  "uvlo_off_v": off.value_v, "uvlo_off_half_width_v": off.half_width_v,
                  "on_bracket_low_v": on.bracket.low_v, "on_bracket_high_v": on.bracket.high_v,
                  "off_bracket_low_v": off.bracket.low_v, "off_bracket_high_v": off.bracket.high_v},
                 tag="thresholds")
    for _ in points:            # steps planned but not needed (the ramps stop at the change) count as done
        pass
    bench.power_down()


def analyse(points, p: Parameters) -> list[Result]:
    """UVLO on, off and hysteresis with the bisection's half-width as their bound."""
    results: list[Result] = []
    rows = points[points["tag"] == "thresholds"] if not points.empty else points
    if rows.empty:
        return [Result("uvlo_on_v", None, "V", details={"reason": "no threshold found; see the run's warnings"}),
                Result("uvlo_off_v", None, "V", details={"reason": "no threshold found; see the run's warnings"})]
    row = rows.iloc[-1]
    on, off = float(row["uvlo_on_v"]), float(row["uvlo_off_v"])
    u_on, u_off = float(row["uvlo_on_half_width_v"]), float(row["uvlo_off_half_width_v"])
    method = "ramp bracket, then bisection to the resolution (Burden & Faires §2.1); ± half the final bracket"
    # a threshold known only to ± w: uniform within the bracket, u = w/sqrt(3) (GUM 4.3.7)
    results.append(Result("uvlo_on_v", on, "V", uncertainty=u_on / 3 ** 0.5, expanded_uncertainty=2 * u_on / 3 ** 0.5,
                          details={"method": method, "half_width_v": u_on}))
    results.append(Result("uvlo_off_v", off, "V", uncertainty=u_off / 3 ** 0.5,
                          expanded_uncertainty=2 * u_off / 3 ** 0.5, details={"method": method, "half_width_v": u_off}))
    u_h = ((u_on ** 2 + u_off ** 2) / 3) ** 0.5
    results.append(Result("uvlo_hysteresis_v", on - off, "V", uncertainty=u_h, expanded_uncertainty=2 * u_h,
                          details={"method": "on - off", "bound_v": u_on + u_off}))
    return results
