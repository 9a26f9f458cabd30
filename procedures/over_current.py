"""Over-current protection: the OCP threshold by a slow CC load ramp past the rating, then bisection.

CAUTION: this procedure loads the DUT above its rated output current on purpose, inside a
declared test envelope (``test_envelope``: the load current and power limits widened to the
ramp's end, never beyond the station's ``[limits.absolute]``). Expect the DUT's current limit
or hiccup to act; keep clear of the DUT and follow local codes and licensed practice.

At ``vin_v`` the constant-current load ramps up in ``ramp_step_a`` steps from
``ramp_start_a`` (each held ``dwell_s``); the DUT counts as regulating while the output reads
above ``regulated_fraction`` × ``vout_nominal_v``.  The last regulated and the first limited
step bracket the threshold; bisection (:mod:`benchctl.analysis.thresholds`, Burden & Faires
§2.1) narrows it to ``resolution_a``.  Every trial starts from a known state: the load back
at ``reset_a`` (below the bracket) for ``reset_s`` — long enough for a hiccup's retry and
soft start — then the trial level for ``dwell_s``.  The threshold is stated at the load's
setpoint ± half the final bracket; the output current read at the last regulated trial is
stored beside it.
"""

from __future__ import annotations

from benchctl.procedure import Parameter, Parameters, Result

NAME = "over_current"
DESCRIPTION = "OCP threshold: CC load ramp past the rating in a test envelope, then bisection"
ROLES = ("source", "load", "output_meter")

PARAMETERS = [
    Parameter("vin_v", "V", 48.0, minimum=0.0, maximum=1500.0, help="input voltage"),
    Parameter("ramp_start_a", "A", 4.5, minimum=0.0, maximum=1000.0, help="ramp start (below the threshold)"),
    Parameter("ramp_stop_a", "A", 7.5, minimum=0.0, maximum=1000.0, help="ramp end (above the threshold)"),
    Parameter("ramp_step_a", "A", 0.25, minimum=1e-4, maximum=100.0, help="ramp step"),
    Parameter("resolution_a", "A", 0.02, minimum=1e-5, maximum=10.0, help="bisection stops at this bracket width"),
    Parameter("dwell_s", "s", 0.1, minimum=0.0, maximum=60.0,
              help="hold at each load before the output is read (longer than the output's collapse)"),
    Parameter("reset_a", "A", 4.0, minimum=0.0, maximum=1000.0, help="load a trial starts from (regulating)"),
    Parameter("reset_s", "s", 0.15, minimum=0.0, maximum=60.0,
              help="hold at reset_a before a trial (longer than a hiccup period plus the soft start)"),
    Parameter("vout_nominal_v", "V", 5.0, minimum=0.0, maximum=1500.0, help="the regulated output"),
    Parameter("regulated_fraction", "", 0.9, minimum=0.01, maximum=0.999,
              help="regulating: output above this fraction of nominal"),
    Parameter("envelope_margin", "", 0.1, minimum=0.0, maximum=1.0,
              help="the envelope's load current limit is ramp_stop_a × (1 + margin)"),
]


def test_envelope(p: Parameters) -> dict[str, float]:
    """The load current past the rating (ramp end + margin) and its worst-case power at 1.2 × nominal."""
    i_max = p.ramp_stop_a * (1.0 + p.envelope_margin)
    return {"load_current_max_a": i_max, "load_power_max_w": i_max * 1.2 * p.vout_nominal_v}


def _ramp(p: Parameters) -> list[float]:
    from benchctl.procedure import frange

    return frange(p.ramp_start_a, p.ramp_stop_a, p.ramp_step_a)


def plan(p: Parameters) -> list[dict]:
    """The ramp step by step, then the bisection trials."""
    from benchctl.analysis.thresholds import trials_needed

    trials = trials_needed(p.ramp_step_a, p.resolution_a)
    return [{"phase": "ramp", "iout_set_a": i} for i in _ramp(p)] + [{"phase": "bisect", "trial": k}
                                                                    for k in range(trials)]


def run(bench, p: Parameters) -> None:
    from benchctl.analysis.thresholds import bisect_threshold, ramp_bracket
    from benchctl.errors import ParameterError

    load, meter = bench.load, bench.output_meter
    if not p.ramp_stop_a > p.ramp_start_a:
        raise ParameterError(f"ramp_stop_a {p.ramp_stop_a:g} A must be above ramp_start_a {p.ramp_start_a:g} A")
    if not p.reset_a < p.ramp_start_a:
        raise ParameterError(f"reset_a {p.reset_a:g} A must be below ramp_start_a {p.ramp_start_a:g} A "
                             "(a trial starts from a regulating load)")
    level = p.regulated_fraction * p.vout_nominal_v
    bench.event("caution", f"loading the DUT up to {p.ramp_stop_a:g} A, past its rating, to find the "
                "over-current threshold; expect its current limit or hiccup to act")
    bench.power_up(p.vin_v, p.reset_a, startup_delay_s=p.reset_s)
    bench.wait(p.reset_s)
    points = iter(bench.sweep(plan(p)))

    def state_at(i_a: float, phase: str, extra: dict) -> bool:
        next(points, None)
        load.set_current(i_a)
        bench.mark_change()
        bench.wait(p.dwell_s)
        vout = meter.measure_voltage()
        iout = meter.measure_current()
        limited = vout < level
        bench.record({"iout_set_a": i_a, "vout_v": vout, "iout_a": iout, "limited": 1.0 if limited else 0.0,
                      **extra}, units={"limited": "", "trial": ""}, tag=phase)
        return limited

    seen_i: list[float] = []
    seen: list[bool] = []
    for i in _ramp(p):
        seen_i.append(i)
        seen.append(state_at(i, "ramp", {}))
        if seen[-1]:
            break
    bracket = ramp_bracket(seen_i, seen) if len(seen) > 1 else None
    if bracket is None or seen[0]:
        bench.event("warning", f"the output did not leave regulation between {p.ramp_start_a:g} and "
                    f"{p.ramp_stop_a:g} A (or was limited at the start); widen the ramp", phase="ramp")
        bench.power_down()
        return

    def trial(i_a: float) -> bool:
        load.set_current(p.reset_a)
        bench.wait(p.reset_s)
        return state_at(i_a, "bisect", {"trial": 1.0})

    found = bisect_threshold(trial, bracket, p.resolution_a)
    bench.event("threshold", f"OCP threshold {found.value_v:.4f} A ± {found.half_width_v:.4f} A",
                ocp_a=found.value_v, half_width_a=found.half_width_v, trials=found.trials)
    bench.record({"ocp_threshold_a": found.value_v, "ocp_half_width_a": found.half_width_v,
                  "bracket_low_a": found.bracket.low_v, "bracket_high_a": found.bracket.high_v,
                  "ramp_low_a": bracket.low_v, "ramp_high_a": bracket.high_v},
                 tag="threshold")
    for _ in points:            # planned trials not needed count as done
        pass
    bench.power_down()


def analyse(points, p: Parameters) -> list[Result]:
    """The OCP threshold with the bisection's half-width as its bound."""
    rows = points[points["tag"] == "threshold"] if not points.empty else points
    if rows.empty:
        return [Result("ocp_threshold_a", None, "A", details={"reason": "no threshold found; see the run's warnings"})]
    row = rows.iloc[-1]
    value, half = float(row["ocp_threshold_a"]), float(row["ocp_half_width_a"])
    method = "CC ramp bracket, then bisection to the resolution (Burden & Faires §2.1); ± half the final bracket"
    # known only to ± w: uniform within the bracket, u = w/sqrt(3) (GUM 4.3.7)
    return [Result("ocp_threshold_a", value, "A", uncertainty=half / 3 ** 0.5, expanded_uncertainty=2 * half / 3 ** 0.5,
                   details={"method": method, "half_width_a": half})]
