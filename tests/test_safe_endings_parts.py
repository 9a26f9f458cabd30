"""The parts of a safe ending, one at a time.

* The one shutdown order at a normal end: the efficiency map ends through
  ``Bench.power_down``; the audit logs show the source's OFF, then the load's voltage read
  back while the output discharges, then the load's OFF.
* A driver's output-off does not wait behind a retry chain holding its session: it goes
  over a short-lived connection of its own (the audit log shows a second peer).
* ``Interlock.power_down`` with a dead source still switches the load off, then raises.
* The watch: a quantity with a second source keeps being read while the first is silent;
  with no source answering it trips after ``watch_missed_periods`` periods (counted, not
  timed); instruments are read in parallel.
* Termination signals (POSIX.1-2017 <signal.h>: SIGINT, SIGTERM, SIGHUP) raise where a
  run may be interrupted, wait for a store write to finish, are acknowledged but not
  raised a second time, and stay ignored when the process was started to ignore them.
"""

from __future__ import annotations

import os
import signal
import threading
import time

import pytest

from benchctl.errors import InstrumentError, InstrumentTimeout
from benchctl.interlock import Interlock, WatchSource
from benchctl.procedure import load_procedure
from benchctl.runner import execute
from benchctl.station import StationLimits, parse_station
from benchctl.termination import StopSignal, StopSignals
from benchctl.simulated_instruments.faults import FaultPlan

LIMITS = StationLimits(source_voltage_max_v=60.0, source_current_max_a=2.0, dut_output_voltage_max_v=6.0,
                       load_current_max_a=5.0, load_power_max_w=30.0)
WAIT_S = 30.0  # condition waits end far sooner; generous for a loaded machine


def _until(condition, what: str, timeout_s: float = WAIT_S) -> None:
    deadline = time.monotonic() + timeout_s
    while not condition():
        if time.monotonic() > deadline:
            raise AssertionError(f"timed out waiting for {what}")
        time.sleep(0.002)


# -- the order at a normal end ---------------------------------------------------------


def test_normal_end_switches_the_source_off_first_and_discharges_the_output(simulated_bench, benchctl_store):
    bench = simulated_bench("flyback-48v-5v", time_scale=50.0)
    emap = load_procedure("efficiency_map")
    params = emap.resolve_parameters(values={**bench.procedure_parameters(), "vin_v": [48.0],
                                             "load_pct": [50.0, 100.0]})
    outcome = execute(emap, params, parse_station(bench.station_toml()), benchctl_store)
    assert outcome.status == "completed", outcome.message
    src = bench.instruments["source"].audit
    load = bench.instruments["load"].audit
    on = next(e for e in load.states("input") if e.value is True)
    src_off = next(e for e in src.entries() if e.kind == "command" and e.text == "OUTP OFF" and e.t_s > on.t_s)
    load_off = next(e for e in load.entries() if e.kind == "command" and e.text == "INP OFF" and e.t_s > on.t_s)
    # Source first; between the two, the load's own read-back watched the output discharge.
    assert src_off.t_s < load_off.t_s
    assert any(e.kind == "command" and e.text == "MEAS:VOLT?" and src_off.t_s < e.t_s < load_off.t_s
               for e in load.entries())
    assert src.states("output")[-1].value is False and load.states("input")[-1].value is False
    assert src.states("output")[-1].t_s <= load.states("input")[-1].t_s
    assert any(s.startswith("output discharge:") and "<=" in s for s in outcome.shutdown_steps), \
        outcome.shutdown_steps


# -- the driver's off path ------------------------------------------------------------


def test_output_off_does_not_wait_behind_a_retry_chain(simulated_bench):
    from benchctl.drivers.electronic_load import ElectronicLoad

    bench = simulated_bench("flyback-48v-5v", time_scale=50.0)
    # A retry chain that holds the session long: 0.3 s per attempt, 3 s between attempts.
    load = ElectronicLoad(bench.resources["load"], name="load", timeout_s=0.3, options={"retry_delay_s": 3.0}).open()
    plan = FaultPlan(bench)
    try:
        load.set_input(True)
        # The load stops answering for a moment; the query's first attempt times out and the chain waits.
        plan.fire("unresponsive@load:for=0.5")
        def query() -> None:
            try:
                load.current_setpoint()
            except InstrumentError:
                pass  # whether it gets its answer once the load answers again does not matter here

        chain = threading.Thread(target=query, daemon=True)
        chain.start()
        _until(lambda: load.last_command == "CURR?" and load._session is None, "the first attempt given up")
        how = load.output_off_now(deadline_s=3.0)
        assert "separate connection" in how, how
        assert chain.is_alive(), "the off was confirmed while the retry chain still held the session"
        entries = bench.instruments["load"].audit.entries()
        off = next(e for e in entries if e.kind == "command" and e.text == "INP OFF")
        first_peer = next(e for e in entries if e.kind == "command").source
        assert off.source != first_peer  # over a connection of its own
        assert bench.instruments["load"].audit.states("input")[-1].value is False
        load.stop_retries()
        chain.join(timeout=WAIT_S)
        assert not chain.is_alive()
    finally:
        plan.clear()
        load.close()


def test_power_down_with_a_dead_source_still_switches_the_load_off_then_raises(simulated_bench):
    from benchctl.drivers.dc_source import DcSource
    from benchctl.drivers.electronic_load import ElectronicLoad

    bench = simulated_bench("flyback-48v-5v", time_scale=50.0)
    source = DcSource(bench.resources["source"], name="source").open()
    load = ElectronicLoad(bench.resources["load"], name="load").open()
    interlock = Interlock(LIMITS, shutdown_deadline_s=0.3)
    interlock.attach_outputs(source, load)
    plan = FaultPlan(bench)
    try:
        load.set_input(True)
        plan.fire("unresponsive@source")
        with pytest.raises(InstrumentError, match="source off confirmation FAILED"):
            interlock.power_down()
        assert bench.instruments["load"].audit.states("input")[-1].value is False
    finally:
        plan.clear()
        source.close()
        load.close()


# -- the watch --------------------------------------------------------------------------


class _Source:
    """A fake watch source: answers, or is silent (raises InstrumentTimeout after holding its deadline)."""

    def __init__(self, instrument: str, *, silent: bool = False, hold: bool = False) -> None:
        self.instrument = instrument
        self.silent = silent
        self.hold = hold
        self.calls: list[tuple[float, float]] = []  # (start, end), time.monotonic()
        self.lock = threading.Lock()

    def read(self, deadline_s: float) -> float:
        start = time.monotonic()
        try:
            if self.silent:
                if self.hold:
                    time.sleep(deadline_s)
                raise InstrumentTimeout("no answer", instrument=self.instrument, command="MEAS:VOLT?")
            return 1.0
        finally:
            with self.lock:
                self.calls.append((start, time.monotonic()))

    @property
    def source(self) -> WatchSource:
        return WatchSource(self.instrument, self.read)


def _interlock(**kwargs) -> Interlock:
    interlock = Interlock(LIMITS, watch_period_s=0.01, watch_deadline_s=0.05, **kwargs)
    interlock.output_state_changed(source_on=True)
    return interlock


def test_a_second_source_keeps_a_quantity_watched_and_instruments_are_read_in_parallel():
    meter = _Source("output_meter", silent=True, hold=True)
    load = _Source("load")
    interlock = _interlock()
    interlock.watch("output voltage", [meter.source, load.source])
    interlock.start_watch()
    try:
        _until(lambda: len(meter.calls) >= 4 and len(load.calls) >= 4, "several watch periods")
    finally:
        interlock.stop_watch()
    assert interlock.trip_record is None, interlock.trip_record
    # The load was read while the meter's reading was still waiting out its deadline: in parallel.
    with meter.lock, load.lock:
        assert any(m0 <= l0 <= m1 for m0, m1 in meter.calls for l0, _ in load.calls)


@pytest.mark.parametrize("missed", [1, 3])
def test_no_source_answering_trips_after_the_set_number_of_periods(missed):
    meter = _Source("output_meter", silent=True)
    load = _Source("load", silent=True)
    interlock = _interlock(watch_missed_periods=missed)
    interlock.watch("output voltage", [meter.source, load.source])
    interlock.start_watch()
    try:
        _until(lambda: interlock.trip_record is not None, "the trip")
    finally:
        interlock.stop_watch()
    trip = interlock.trip_record
    assert trip.limit == "watch_missed_periods" and trip.value == missed and trip.limit_value == missed
    assert "output voltage (from output_meter or load)" in trip.message and "no answer" in trip.message
    assert len(meter.calls) == missed and len(load.calls) == missed  # one reading of each per period


def test_a_miss_of_an_optional_check_does_not_trip():
    scope = _Source("scope", silent=True)
    interlock = _interlock(watch_missed_periods=1)
    interlock.watch("scope power-on status", [scope.source], required=False)
    interlock.start_watch()
    try:
        _until(lambda: len(scope.calls) >= 5, "several periods")
    finally:
        interlock.stop_watch()
    assert interlock.trip_record is None


# -- termination signals ------------------------------------------------------------------


def _deliver(signals: StopSignals, count: int) -> None:
    _until(lambda: len(signals.received) >= count, "the signal handler")


def test_first_signal_raises_where_allowed_and_later_ones_are_only_acknowledged():
    said: list[str] = []
    started: list[StopSignal] = []
    with StopSignals(notify=said.append) as signals:
        signals.on_first = started.append
        signals.budget_s = 1.5
        with pytest.raises(StopSignal) as info:
            with signals.interruptible():
                os.kill(os.getpid(), signal.SIGTERM)
                _deliver(signals, 1)
        assert info.value.signal_name == "SIGTERM" and "SIGTERM" in str(info.value)
        assert started == [info.value]  # the shutdown was started at once
        os.kill(os.getpid(), signal.SIGINT)  # during the shutdown: acknowledged, not raised
        os.kill(os.getpid(), signal.SIGHUP)
        _deliver(signals, 3)
        signals.raise_if_received()  # already raised: nothing more
    assert "shutting down" in said[0] and "1.5 s" in said[0]
    assert sum("received again" in s for s in said) == 2


def test_a_signal_waits_for_the_store_write_to_finish():
    with StopSignals() as signals:
        finished = []
        with pytest.raises(StopSignal):
            with signals.interruptible():
                with signals.deferred():
                    os.kill(os.getpid(), signal.SIGHUP)
                    _deliver(signals, 1)
                    finished.append(True)  # the write completes
        assert finished == [True]


def test_a_signal_after_the_body_is_raised_once_the_run_is_stored():
    with StopSignals() as signals:
        os.kill(os.getpid(), signal.SIGTERM)  # not interruptible here: only recorded
        _deliver(signals, 1)
        with pytest.raises(StopSignal):
            signals.raise_if_received()


def test_an_ignored_signal_stays_ignored():
    previous = signal.signal(signal.SIGHUP, signal.SIG_IGN)
    try:
        with StopSignals() as signals:
            with signals.interruptible():
                os.kill(os.getpid(), signal.SIGHUP)
                time.sleep(0.05)  # nothing to wait for: an ignored signal is never delivered
            assert signals.received == []
        assert signal.getsignal(signal.SIGHUP) is signal.SIG_IGN
    finally:
        signal.signal(signal.SIGHUP, previous)
