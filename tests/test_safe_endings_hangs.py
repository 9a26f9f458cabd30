"""A hung instrument neither blinds the interlock nor holds the outputs on.

Through real sockets and the simulated instruments' audit logs (one monotonic clock):

* a hung output meter while the DUT's feedback opens: the load's own voltage read-back,
  the watch's second source for the output, sees the output run away, and the source
  goes off within one watch period and one watch deadline of the fault;
* a hung source: the watch, whose readings are never retried, misses it for
  ``watch_missed_periods`` periods and trips; the source's OFF goes unanswered for its
  shutdown deadline, and the load goes off regardless;
* the time from the fault to the last output off is bounded by the watch period, the
  periods the watch waits, and the shutdown deadline — with generous slack for a loaded
  2-core machine (these are bounds that show there are no retry chains in the way, not
  timing measurements).
"""

from __future__ import annotations

import pytest

from benchctl.interlock import Interlock, default_watch_deadline_s
from benchctl.procedure import load_procedure
from benchctl.runner import execute
from benchctl.station import parse_station
from benchctl.simulated_instruments.faults import FaultPlan

#: Generous slack for a loaded 2-core machine (the bounds' terms are each well under a second).
SLACK_S = 2.0


@pytest.fixture(scope="module")
def emap():
    return load_procedure("efficiency_map")


def _run_with_fault_after_first_point(emap, bench, store, specs, *, source_current_max_a=None,
                                     load_pct=(25.0, 50.0, 75.0, 100.0)):
    text = bench.station_toml()
    values = {**bench.procedure_parameters(), "vin_v": [48.0], "load_pct": list(load_pct)}
    if source_current_max_a is not None:
        from benchctl.simulated_instruments.bench import absolute_limits_for

        text = text.replace(f"source_current_max_a = {bench.limits.source_current_max_a!r}",
                            f"source_current_max_a = {source_current_max_a!r}", 1)
        # the absolute limit of the source current follows (a key left out stays at the operating limit)
        absolute = absolute_limits_for(bench.design).source_current_max_a
        text = text.replace(f"source_current_max_a = {absolute!r}\n", "", 1)
    station = parse_station(text)
    params = emap.resolve_parameters(values=values)
    plan = FaultPlan(bench)

    def progress(done, total, values):
        if done == 1 and not plan.fired:
            for spec in specs:
                plan.fire(spec)

    try:
        outcome = execute(emap, params, station, store, progress=progress)
    finally:
        plan.clear()
    assert plan.fired, "the faults must have been injected"
    return station, outcome, max(f.t_monotonic_s for f in plan.fired)


def _first_command_after(bench, role, text, t_s):
    return next((e for e in bench.instruments[role].audit.entries()
                 if e.kind == "command" and e.text == text and e.t_s >= t_s), None)


def test_hung_output_meter_and_open_feedback_trip_through_the_loads_read_back(emap, simulated_bench,
                                                                              benchctl_store):
    bench = simulated_bench("flyback-48v-5v", time_scale=50.0)
    station, outcome, t_fault = _run_with_fault_after_first_point(
        emap, bench, benchctl_store, ["unresponsive@output_meter", "feedback_open"],
        # The source's own current limit stays below the station's, so the surge that charges the
        # output capacitors does not trip first, and the load stays light enough that its own power
        # protection does not act either: the output voltage is what trips.
        source_current_max_a=3 * bench.limits.source_current_max_a, load_pct=(10.0, 20.0, 30.0))
    assert outcome.status == "tripped", outcome.message
    trip = outcome.trip
    # The output meter answers nothing: the load's own read-back saw the output past the limit.
    assert trip.limit == "dut_output_voltage_max_v" and trip.instrument == "load", trip
    assert trip.value > station.limits.dut_output_voltage_max_v
    period = station.watch_period_s
    deadline = default_watch_deadline_s(period)
    source_off = _first_command_after(bench, "source", "OUTP OFF", t_fault)
    load_off = _first_command_after(bench, "load", "INP OFF", t_fault)
    assert source_off is not None and load_off is not None and source_off.t_s <= load_off.t_s
    # Fault -> source off: the next watch period reads the load in parallel with the hung meter.
    assert source_off.t_s - t_fault <= period + deadline + SLACK_S
    # Fault -> last output off: plus the shutdown (source off, the output discharged, load off).
    budget = Interlock(station.limits, watch_period_s=period)
    budget.attach_outputs(object(), object())
    assert load_off.t_s - t_fault <= period + deadline + budget.shutdown_budget_s + SLACK_S
    assert bench.instruments["source"].audit.states("output")[-1].value is False
    assert bench.instruments["load"].audit.states("input")[-1].value is False
    assert any(s.startswith("output discharge:") for s in trip.shutdown), trip.shutdown


def test_hung_source_trips_the_run_and_the_load_goes_off_regardless(emap, simulated_bench, benchctl_store):
    bench = simulated_bench("flyback-48v-5v", time_scale=50.0)
    station, outcome, t_fault = _run_with_fault_after_first_point(emap, bench, benchctl_store,
                                                                  ["unresponsive@source"])
    assert outcome.status in ("tripped", "failed"), outcome.message
    trip = outcome.trip
    assert trip is not None and trip.limit == "watch_missed_periods" and trip.instrument == "source", trip
    assert trip.value == station.watch_missed_periods
    assert trip.shutdown[0].startswith("source off confirmation FAILED"), trip.shutdown
    assert any(s.startswith("load off confirmed") for s in trip.shutdown), trip.shutdown
    events = benchctl_store.events(outcome.run_id)
    trip_event = events[events["kind"] == "interlock_trip"].iloc[0]
    assert "instrument source" in trip_event["message"] and "periods in a row" in trip_event["message"]
    load_off = _first_command_after(bench, "load", "INP OFF", t_fault)
    assert load_off is not None and bench.instruments["load"].audit.states("input")[-1].value is False
    period = station.watch_period_s
    cycle = max(period, default_watch_deadline_s(period))
    bound = period + station.watch_missed_periods * cycle + station.shutdown_deadline_s
    assert load_off.t_s - t_fault <= bound + SLACK_S, (load_off.t_s - t_fault, bound)
