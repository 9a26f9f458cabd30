"""Interlock trip latency, measured on the simulated instruments' own audit clocks.

The feedback of the DUT opens right after the source output turns on, while the
efficiency map sits in its long fixed start-up wait: no procedure reading happens, so
only the interlock's background watch can see the output run away. From the fault to
the source receiving its output-off command must take no longer than one watch period
(plus the few exchanges of one watch cycle); from the reading that crossed the limit to
that command, no longer than one period either (the interlock's contract, interlock.py).
"""

from __future__ import annotations

from benchctl.procedure import load_procedure
from benchctl.runner import execute
from benchctl.station import parse_station
from benchctl.simulated_instruments.faults import apply_fault_specs

WATCH_PERIOD_S = 0.2
# One watch cycle is a handful of loopback exchanges (~1 ms each); allow for a loaded 2-core machine.
CYCLE_SLACK_S = 0.3
# The roles the watch reads each limit's quantity from (a second source each: interlock.py), and the query.
READING = {"dut_output_voltage_max_v": (("output_meter", "load"), "MEAS:VOLT?"),
           "source_voltage_max_v": (("input_meter", "source"), "MEAS:VOLT?"),
           "source_current_max_a": (("input_meter", "source"), "MEAS:CURR?")}


def test_watch_trips_within_one_period_during_a_fixed_wait(simulated_bench, benchctl_store):
    bench = simulated_bench("flyback-48v-5v", time_scale=50.0)
    station = parse_station(bench.station_toml(watch_period_s=WATCH_PERIOD_S))
    emap = load_procedure("efficiency_map")
    wait_s = 3.0  # a long fixed wait after the source turns on (startup_delay_s is wall-clock)
    params = emap.resolve_parameters(values={**bench.procedure_parameters(), "vin_v": [48.0],
                                             "load_pct": [50.0], "startup_delay_s": wait_s})
    plan = apply_fault_specs(bench, ["feedback_open@source:on=OUTP ON"])
    try:
        outcome = execute(emap, params, station, benchctl_store)
    finally:
        plan.clear()
    assert outcome.status == "tripped", outcome.message
    assert outcome.points == 0  # nothing was measured by the procedure: the watch alone saw it
    assert outcome.duration_s < wait_s  # the trip cut the wait short
    trip = outcome.trip
    assert trip.value > trip.limit_value and trip.limit in READING, trip

    t_fault = plan.fired[0].t_monotonic_s  # same clock as the audit logs (time.monotonic)
    source_log = bench.instruments["source"].audit.entries()
    off = next(e for e in source_log if e.kind == "command" and e.text == "OUTP OFF" and e.t_s > t_fault)
    roles, query = READING[trip.limit]
    assert trip.instrument in roles, trip
    readings = [e for e in bench.instruments[trip.instrument].audit.entries()
                if e.kind == "command" and e.text == query and t_fault < e.t_s <= off.t_s]
    assert readings, "the crossing reading must be in the audit log between the fault and the off command"
    crossing = readings[-1]
    from_fault_s = off.t_s - t_fault
    from_reading_s = off.t_s - crossing.t_s
    assert from_reading_s < WATCH_PERIOD_S, f"reading -> off {from_reading_s * 1e3:.1f} ms"
    assert from_fault_s <= WATCH_PERIOD_S + CYCLE_SLACK_S, f"fault -> off {from_fault_s * 1e3:.1f} ms"
    # Safe order on the audit clocks: the source went off before the load.
    src_off = bench.instruments["source"].audit.states("output")[-1]
    assert src_off.value is False and src_off.t_s <= off.t_s + 1.0
    load_off_cmds = [e for e in bench.instruments["load"].audit.entries() if e.kind == "command" and e.text == "INP OFF"
                     and e.t_s > t_fault]
    assert load_off_cmds and load_off_cmds[0].t_s >= off.t_s
