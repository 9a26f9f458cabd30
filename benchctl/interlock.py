"""The interlock: the one place where station limits are enforced, and the one way outputs go off.

Every setpoint a procedure asks for is checked here *before* anything is sent, and every
reading is checked as it comes back (see :mod:`benchctl.guarded`, which wraps the
drivers). While any output is on, a background watch reads the DUT's input and output
every ``watch_period_s``:

* its readings are never retried, and each period is decided ``watch_deadline_s`` after
  it started (default: the period, at least 0.5 s) whatever the driver is doing for the
  procedure (a retry chain does not hold the watch up); a reading that answers later is
  still checked against its limit;
* instruments are read in parallel (one thread each), so a hung meter delays nothing else;
* each watched quantity has every source the station offers — the input from the input
  meter and the source's own read-back, the output voltage from the output meter and
  the load's own read-back — and every answer is checked against its limit;
* a quantity the procedure itself has just read through the guards (checked against the
  same limit less than half a period before the watch's period starts) counts as read for
  that period and is not read again: on integrating meters (a power-line cycle a reading)
  the watch would otherwise queue in front of the procedure's own readings. The longest
  time between two checks of a quantity stays under 1.5 periods;
* a quantity none of whose sources answered in time for ``watch_missed_periods``
  periods in a row (default 3) trips the run, and so does an output instrument (source,
  load) that stops answering: the watch can no longer see, or switch, the DUT.

**The shutdown order** (:meth:`Interlock.shutdown`, used at every end — a normal end
through :meth:`Interlock.power_down`, a trip, a termination signal, a failure): the
**source goes off first**, then, with the source confirmed off, the load stays on until
the DUT output has fallen below :attr:`Interlock.DISCHARGE_FRACTION` of the station's
``dut_output_voltage_max_v`` (at most :attr:`Interlock.DISCHARGE_MAX_S`), and **then the
load goes off**. A station with several sources and loads (open roles of those kinds) ends
the same way: every source off, every load kept on until the output it reads back is
discharged (all within that one wait), then every load off. Why this order: with the source off first no energy enters the DUT any
more, and the still-loaded converter runs down its input capacitors to its under-voltage
lockout while the load drains the output capacitors — the bench ends with the least
stored energy. The other order unloads a converter that is still powered: its output
overshoots on the load release (worst with an open feedback loop, the very fault a trip
is often about), and once everything is off the output capacitors stay charged, ready to
discharge into a probe or a short.

Each output goes off through its driver's ``output_off_now``: one message that switches
it off and reads it back, never retried, over within ``shutdown_deadline_s`` (default
0.5 s) even when the instrument is hung or its driver is busy in a retry chain; the next
output goes off regardless. A shutdown never raises; two at once run one after the other.

The interlock is a second line of defence: it does not replace the instruments' own
protection (which it programs too), fuses, guarding and licensed practice.
"""

from __future__ import annotations

import functools
import logging
import math
import queue
import threading
import time
from dataclasses import dataclass, field, replace
from typing import Any, Callable, Sequence

from benchctl.errors import InstrumentConnectionError, InstrumentError, InstrumentTimeout, InterlockTrip, SetpointRefused
from benchctl.station import StationLimits

logger = logging.getLogger(__name__)

#: Defaults of the station options (``[station]`` keys of the same names).
DEFAULT_WATCH_MISSED_PERIODS = 3
DEFAULT_SHUTDOWN_DEADLINE_S = 0.5
#: The smallest default watch deadline (s): an integrating reading takes a power-line cycle
#: or more (20 ms at 50 Hz), two of one instrument wait for each other and for the
#: procedure's, and a loaded machine stalls a process for tens of ms; the station may set
#: its own (an instrument with a long aperture needs more).
MIN_DEFAULT_WATCH_DEADLINE_S = 0.5


def default_watch_deadline_s(watch_period_s: float) -> float:
    """The watch deadline when the station gives none: the period, at least 0.5 s."""
    return max(float(watch_period_s), MIN_DEFAULT_WATCH_DEADLINE_S)


@dataclass(frozen=True)
class TripRecord:
    """Why and when the interlock tripped, and what shutting down did."""

    limit: str
    limit_value: float
    value: float
    instrument: str
    message: str
    t_monotonic_s: float
    shutdown: tuple[str, ...] = field(default=())


@dataclass(frozen=True)
class WatchSource:
    """One way to read a watched quantity: ``read(deadline_s)`` returns it within ``deadline_s``
    (checking its own limit) or raises. Sources of one ``instrument`` are read one after
    another; different instruments in parallel."""

    instrument: str
    read: Callable[[float], Any]
    #: For a check that the instrument answers at all: ``time.monotonic()`` of its last
    #: answer to anyone (a procedure's exchange shows it alive too), or None.
    answered_at: Callable[[], float] | None = None
    #: (instrument, station limit) of the reading: a procedure's reading checked by
    #: :meth:`Interlock.check_reading` under the same pair counts for the watch (None: never).
    fresh_key: tuple[str, str] | None = None


@dataclass
class _Watched:
    name: str
    sources: tuple[WatchSource, ...]
    required: bool
    misses: int = 0
    last_error: str = ""


def _named_outputs(outputs: Any, default_name: str) -> list[tuple[str, Any]]:
    """``attach_outputs``'s argument as (name, driver) pairs in order."""
    if outputs is None:
        return []
    if isinstance(outputs, dict):
        return [(str(name), d) for name, d in outputs.items() if d is not None]
    if isinstance(outputs, (list, tuple)):
        return [(str(getattr(d, "name", "") or f"{default_name}{k}"), d) for k, d in enumerate(outputs, 1)
                if d is not None]
    return [(default_name, outputs)]


class _Missed(Exception):
    """A watch source that did not answer in time (its instrument's earlier reading took the period)."""


class _Worker:
    """A daemon thread that runs one instrument's watch readings, one after another."""

    def __init__(self, instrument: str) -> None:
        self.instrument = instrument
        self.busy = False
        self._jobs: queue.SimpleQueue = queue.SimpleQueue()
        self._thread = threading.Thread(target=self._loop, name=f"benchctl-watch-{instrument}", daemon=True)
        self._thread.start()

    def submit(self, job: Callable[[], None], done: threading.Event) -> None:
        """Run ``job``; ``done`` is set once it ended and the worker is free again."""
        self.busy = True
        self._jobs.put((job, done))

    def stop(self) -> None:
        self._jobs.put(None)

    def _loop(self) -> None:
        while True:
            item = self._jobs.get()
            if item is None:
                return
            job, done = item
            try:
                job()
            except BaseException:  # pragma: no cover - a job reports its own errors
                logger.exception("watch reading of %s failed", self.instrument)
            finally:
                self.busy = False
                done.set()


def _read_back_now(load: Any, deadline_s: float) -> float:
    """The load's voltage read-back, answered within ``deadline_s`` (the shutdown must not wait longer)."""
    try:
        return float(load.query_float_now("measure_voltage", deadline_s=deadline_s, answer_by_deadline=True))
    except TypeError:  # a driver with only the watch's form: bounded by its own timeout
        return float(load.query_float_now("measure_voltage", deadline_s=deadline_s))


class Interlock:
    """Station limits, reading checks, the background watch and the one safe shutdown."""

    #: The load keeps draining the DUT output until it is below this fraction of the
    #: station's ``dut_output_voltage_max_v`` (the output capacitors are then discharged) ...
    DISCHARGE_FRACTION = 0.1
    #: ... for at most this long (s); then the load goes off anyway.
    DISCHARGE_MAX_S = 0.5
    #: Time between two read-backs of the output while it discharges (s).
    DISCHARGE_POLL_S = 0.005

    def __init__(
        self,
        limits: StationLimits,
        *,
        watch_period_s: float = 0.1,
        watch_deadline_s: float | None = None,
        watch_missed_periods: int = DEFAULT_WATCH_MISSED_PERIODS,
        shutdown_deadline_s: float = DEFAULT_SHUTDOWN_DEADLINE_S,
        clock: Callable[[], float] = time.monotonic,
    ) -> None:
        self.limits = limits
        self.watch_period_s = float(watch_period_s)
        self.watch_deadline_s = (default_watch_deadline_s(watch_period_s) if watch_deadline_s is None
                                 else float(watch_deadline_s))
        self.watch_missed_periods = int(watch_missed_periods)
        self.shutdown_deadline_s = float(shutdown_deadline_s)
        self.clock = clock
        self._trip: TripRecord | None = None
        self._stop: BaseException | None = None
        self._trip_event = threading.Event()
        self._lock = threading.RLock()
        self._shutdown_lock = threading.Lock()
        self._sources: list[tuple[str, Any]] = []  # (role, raw driver), in shutdown order
        self._loads: list[tuple[str, Any]] = []
        self._on: dict[str, bool] = {}  # output name -> on
        self._watched: list[_Watched] = []
        self._watch_thread: threading.Thread | None = None
        self._workers: dict[str, _Worker] = {}
        self._stop_watch = threading.Event()
        self._outputs_changed = threading.Event()
        self.watch_errors: list[str] = []
        self._checked_at: dict[tuple[str, str], float] = {}  # (instrument, limit) -> clock() of its last check
        #: What the shutdown started by :meth:`stop` did (empty until it ran).
        self.stop_shutdown_steps: list[str] = []

    # -- wiring --------------------------------------------------------------------

    def attach_outputs(self, source: Any | None, load: Any | None) -> None:
        """The raw drivers the shutdown turns off: every source first, then every load.

        Each of ``source`` and ``load`` is one driver (named ``source`` / ``load``), None,
        a mapping role -> driver, or a sequence of drivers (named by their ``name``); the
        order given is the order they go off in.
        """
        self._sources = _named_outputs(source, "source")
        self._loads = _named_outputs(load, "load")

    def watch(self, name: str, sources: Sequence[WatchSource], *, required: bool = True) -> None:
        """Watch quantity ``name`` through ``sources`` (any one answering in time is enough).

        ``required``: when none answers for ``watch_missed_periods`` periods in a row the run
        trips; otherwise a miss is only logged (a check that other readings cover).
        """
        if not sources:
            raise ValueError(f"watched quantity {name!r} needs at least one source")
        self._watched.append(_Watched(name, tuple(sources), required))

    def output_switched(self, name: str, on: bool) -> None:
        """Output ``name`` (a role) was switched on or off: the watch runs while any is on."""
        with self._lock:
            self._on[name] = bool(on)
        self._outputs_changed.set()

    def output_state_changed(self, *, source_on: bool | None = None, load_on: bool | None = None) -> None:
        """The outputs named ``source`` and ``load`` switched (see :meth:`output_switched`)."""
        if source_on is not None:
            self.output_switched("source", source_on)
        if load_on is not None:
            self.output_switched("load", load_on)

    @property
    def any_output_on(self) -> bool:
        with self._lock:
            return any(self._on.values())

    @property
    def outputs(self) -> list[tuple[str, Any]]:
        """The outputs in shutdown order: (name, driver), every source first, then every load."""
        return [*self._sources, *self._loads]

    @property
    def shutdown_budget_s(self) -> float:
        """The longest one shutdown takes (s): each output's deadline and the discharge wait."""
        n = len(self.outputs)
        return n * self.shutdown_deadline_s + (self.DISCHARGE_MAX_S if self._sources and self._loads else 0.0)

    # -- checks --------------------------------------------------------------------

    def refuse_above(self, limit: str, value: float, instrument: str, what: str) -> None:
        """Refuse a setpoint whose ``value`` exceeds station limit ``limit`` (nothing is sent)."""
        self.raise_if_tripped()
        maximum = float(getattr(self.limits, limit))
        if not (value == value) or value > maximum or value < 0:  # NaN, above, negative
            raise SetpointRefused(
                f"{instrument}: {what} {value:g} is outside the station limit "
                f"limits.{limit} = {maximum:g}; nothing was sent. Lower the procedure parameter "
                "or, if the bench and DUT are rated for it, raise the limit in the station file",
                limit=limit, value=value, instrument=instrument,
            )

    def check_reading(self, limit: str, value: float, instrument: str, what: str) -> float:
        """Trip when a reading exceeds station limit ``limit``; returns the reading otherwise."""
        self._checked_at[(instrument, limit)] = self.clock()
        maximum = float(getattr(self.limits, limit))
        if value > maximum:
            self.trip(limit, maximum, value, instrument,
                      f"{instrument}: {what} {value:g} above the station limit limits.{limit} = {maximum:g}")
        return value

    # -- trip, stop and shutdown ---------------------------------------------------

    @property
    def trip_record(self) -> TripRecord | None:
        return self._trip

    def raise_if_tripped(self) -> None:
        """Raise InterlockTrip after a trip, or the stop exception after :meth:`stop`."""
        record = self._trip
        if record is not None:
            raise InterlockTrip(
                f"interlock tripped: {record.message}; the outputs were switched off (source first, then load)",
                limit=record.limit, value=record.value, instrument=record.instrument,
            )
        stop = self._stop
        if stop is not None:
            raise stop

    def trip(self, limit: str, limit_value: float, value: float, instrument: str, message: str) -> None:
        """Remember why, turn the outputs off in the safe order, and raise InterlockTrip.

        The trip is visible at once (the procedure stops at its next bench call or wait,
        so it sends nothing more); the shutdown runs in the calling thread.
        """
        with self._lock:
            first = self._trip is None
            if first:
                record = TripRecord(limit, limit_value, value, instrument, message, self.clock())
                self._trip = record
                self._trip_event.set()
        if first:
            logger.error("interlock trip: %s", message)
            with self._shutdown_lock:
                steps = self._off_pass(emergency=True)
                with self._lock:
                    self._trip = replace(record, shutdown=tuple(steps))
        self.raise_if_tripped()

    def stop(self, reason: BaseException) -> None:
        """Stop the run from outside (a termination signal): the outputs go off at once in a
        thread of their own, retry chains give up, and every later bench call or wait raises
        ``reason``. Returns at once; a second call does nothing."""
        with self._lock:
            if self._stop is not None:
                return
            self._stop = reason
            self._trip_event.set()
        thread = threading.Thread(target=self._stop_pass, name="benchctl-shutdown", daemon=True)
        thread.start()

    def _stop_pass(self) -> None:
        with self._shutdown_lock:
            self.stop_shutdown_steps = self._off_pass(emergency=True)

    def shutdown(self) -> list[str]:
        """Every output off in the safe order, now: source, output discharged, load. Never raises.

        Retry chains of the drivers give up (the run is ending); a shutdown in progress
        elsewhere (a trip, a signal) is waited for first. Returns one line per step; a
        failed step says ``FAILED``.
        """
        with self._shutdown_lock:
            return self._off_pass(emergency=True)

    def power_down(self) -> list[str]:
        """The same order at the normal end of a procedure (:meth:`benchctl.bench.Bench.power_down`).

        Raises the instrument's error when an output was not confirmed off (after trying
        every output), so a run does not complete with its bench in doubt.
        """
        with self._shutdown_lock:
            steps = self._off_pass(emergency=False)
        failed = [s for s in steps if "FAILED" in s]
        if failed:
            raise InstrumentError("power-down: " + "; ".join(failed) + ". Switch the output off by hand and "
                                  "check the instrument")
        return steps

    def _off_pass(self, *, emergency: bool) -> list[str]:
        """Every source off, then the output(s) discharged through the loads, then every load off."""
        steps: list[str] = []
        sources = [(name, d) for name, d in self._sources if getattr(d, "is_open", False)]
        loads = [(name, d) for name, d in self._loads if getattr(d, "is_open", False)]
        if emergency:
            for _, driver in [*sources, *loads]:
                try:
                    driver.stop_retries()
                except Exception as exc:  # a lab's driver without it: the deadline still bounds us
                    logger.debug("stop_retries: %s", exc)
        sources_off = all([self._off(name, driver, steps) for name, driver in sources])
        if sources and loads:  # no source on this station: nothing to wait for
            if sources_off:
                steps.extend(self._discharge(loads))
            else:
                steps.append("output discharge skipped: the source is not confirmed off" if len(sources) == 1 else
                             "output discharge skipped: not every source is confirmed off")
        for name, driver in loads:
            self._off(name, driver, steps)
        return steps

    def _off(self, name: str, driver: Any, steps: list[str]) -> bool:
        """One output off, read back, bounded; the step appended; True when confirmed."""
        try:
            how = driver.output_off_now(deadline_s=self.shutdown_deadline_s)
        except Exception as exc:  # keep going: the next output must still go off
            logger.error("could not switch the %s off: %s", name, exc)
            steps.append(f"{name} off confirmation FAILED: {exc}")
            return False
        steps.append(f"{name} off confirmed: {how}")
        self.output_switched(name, False)
        return True

    def _discharge(self, loads: list[tuple[str, Any]]) -> list[str]:
        """Keep every load on until the DUT output it reads back is discharged; all of them within
        DISCHARGE_MAX_S in total. One step per load (its name given when there are several)."""
        threshold_v = self.DISCHARGE_FRACTION * self.limits.dut_output_voltage_max_v
        started = time.monotonic()
        end = started + self.DISCHARGE_MAX_S
        pending = {name: math.nan for name, _ in loads}
        drivers = dict(loads)
        steps: dict[str, str] = {}
        named = len(loads) > 1
        while pending:
            for name in list(pending):
                left = end - time.monotonic()
                who = f" at {name}" if named else ""
                if left <= 0:
                    steps[name] = (f"output discharge{who}: still {pending[name]:.3g} V after "
                                   f"{self.DISCHARGE_MAX_S:g} s (> {threshold_v:.3g} V); the load goes off anyway")
                    del pending[name]
                    continue
                try:
                    value = _read_back_now(drivers[name], min(left, self.shutdown_deadline_s))
                except Exception as exc:
                    steps[name] = f"output discharge{who} not watched: the load's voltage read-back failed ({exc})"
                    del pending[name]
                    continue
                pending[name] = value
                if abs(value) <= threshold_v:
                    steps[name] = (f"output discharge{who}: {value:.3g} V (<= {threshold_v:.3g} V) "
                                   f"{(time.monotonic() - started) * 1e3:.0f} ms after the source went off")
                    del pending[name]
            if pending:
                time.sleep(min(self.DISCHARGE_POLL_S, max(0.0, end - time.monotonic())))
        return [steps[name] for name, _ in loads]

    # -- waiting and watching ------------------------------------------------------

    def wait(self, seconds: float, sleep: Callable[[float], None] | None = None) -> None:
        """Wait ``seconds``, woken early by a trip or a stop (which is then raised)."""
        self.raise_if_tripped()
        if seconds > 0:
            if sleep is not None:
                sleep(seconds)
            else:
                self._trip_event.wait(seconds)
        self.raise_if_tripped()

    def start_watch(self) -> None:
        if self._watch_thread is not None or not self._watched:
            return
        self._stop_watch.clear()
        for item in self._watched:
            for source in item.sources:
                if source.instrument not in self._workers:
                    self._workers[source.instrument] = _Worker(source.instrument)
        self._watch_thread = threading.Thread(target=self._watch_loop, name="benchctl-interlock-watch", daemon=True)
        self._watch_thread.start()

    def stop_watch(self, *, wait_s: float | None = None) -> None:
        """Stop the watch; wait for it at most ``wait_s`` (default: one deadline and a second)."""
        self._stop_watch.set()
        self._outputs_changed.set()
        thread, self._watch_thread = self._watch_thread, None
        workers, self._workers = self._workers, {}
        for worker in workers.values():
            worker.stop()
        if thread is not None and thread is not threading.current_thread():
            thread.join(timeout=self.watch_deadline_s + 1.0 if wait_s is None else wait_s)

    def _watch_loop(self) -> None:
        while not self._stop_watch.is_set() and self._trip is None and self._stop is None:
            if not self.any_output_on:
                for item in self._watched:
                    item.misses = 0
                self._outputs_changed.wait(self.watch_period_s)
                self._outputs_changed.clear()
                continue
            started = self.clock()
            self._watch_period(started, started + self.watch_deadline_s)
            if self._stop_watch.is_set() or self._trip is not None or self._stop is not None:
                return
            self._stop_watch.wait(max(0.0, started + self.watch_period_s - self.clock()))

    def _read_by_procedure_since(self, item: _Watched, t_s: float) -> bool:
        """Whether a source of ``item`` was read and checked against its limit (by anyone) since ``t_s``."""
        return any(s.fresh_key is not None and self._checked_at.get(s.fresh_key, float("-inf")) >= t_s
                   for s in item.sources)

    @staticmethod
    def _answered_since(item: _Watched, t_s: float) -> bool:
        """An "it answers" check whose instrument answered someone since ``t_s`` (only timeouts missed)."""
        for source in item.sources:
            if source.answered_at is not None:
                try:
                    if source.answered_at() >= t_s:
                        return True
                except Exception:
                    pass
        return False

    def _watch_period(self, period_started: float, deadline_at: float) -> None:
        """One period: every instrument read in parallel until ``deadline_at``; count the misses."""
        results: dict[tuple[int, int], BaseException | None] = {}
        by_instrument: dict[str, list[tuple[int, int, WatchSource]]] = {}
        fresh_since = period_started - self.watch_period_s / 2.0
        fresh = {i for i, item in enumerate(self._watched) if self._read_by_procedure_since(item, fresh_since)}
        for i, item in enumerate(self._watched):
            if i in fresh:
                continue
            for k, source in enumerate(item.sources):
                by_instrument.setdefault(source.instrument, []).append((i, k, source))
        done: list[threading.Event] = []
        waiting = dict(by_instrument)  # a worker still on a reading of an earlier period gets until the deadline
        while True:
            for instrument in list(waiting):
                worker = self._workers.get(instrument)
                if worker is None:
                    return  # stopping
                if not worker.busy:
                    event = threading.Event()
                    done.append(event)
                    worker.submit(functools.partial(self._read_entries, waiting.pop(instrument), deadline_at, results),
                                  event)
            if not waiting:
                break
            left = deadline_at - self.clock()
            if left <= 0 or self._trip is not None or self._stop is not None or self._stop_watch.is_set():
                break
            self._trip_event.wait(min(left, 0.01))  # a busy worker: look again shortly
        for event in done:
            event.wait(max(0.0, deadline_at - self.clock()))
        for instrument, entries in waiting.items():
            for i, k, _ in entries:
                results[(i, k)] = _Missed(f"instrument {instrument}: still busy with a reading of an earlier period "
                                          f"when this one's deadline of {self.watch_deadline_s:g} s passed")
        if self._trip is not None or self._stop is not None or self._stop_watch.is_set():
            return
        snapshot = dict(results)
        for i, item in enumerate(self._watched):
            if i in fresh:
                item.misses = 0
                continue
            outcomes = [snapshot.get((i, k), _Missed(f"instrument {s.instrument}: no answer within the watch deadline "
                                                      f"of {self.watch_deadline_s:g} s"))
                        for k, s in enumerate(item.sources)]
            if any(o is None for o in outcomes) or self._answered_since(item, period_started):
                item.misses = 0
                continue
            real = [o for o in outcomes if not isinstance(o, _Missed)]
            item.last_error = str((real or outcomes)[-1])
            if not item.required:
                logger.debug("watch: %s not read this period: %s", item.name, item.last_error)
                continue
            item.misses += 1
            logger.warning("interlock watch: %s not read within %g s (%d of %d periods): %s", item.name,
                           self.watch_deadline_s, item.misses, self.watch_missed_periods, item.last_error)
            if item.misses >= self.watch_missed_periods:
                where = " or ".join(dict.fromkeys(s.instrument for s in item.sources))
                message = (f"interlock watch could not read {item.name} (from {where}) within "
                           f"{self.watch_deadline_s:g} s for {item.misses} periods in a row; it can no longer see "
                           f"or switch the DUT safely. Last: {item.last_error}")
                self.watch_errors.append(message)
                try:
                    self.trip("watch_missed_periods", float(self.watch_missed_periods), float(item.misses),
                              item.sources[0].instrument, message)
                except InterlockTrip:
                    return

    def _read_entries(self, entries: list[tuple[int, int, WatchSource]], deadline_at: float,
                      results: dict[tuple[int, int], BaseException | None]) -> None:
        """One instrument's readings of one period, one after another (runs in its worker)."""
        silent: BaseException | None = None  # the instrument did not answer: the rest cannot either
        for i, k, source in entries:
            if self._trip is not None or self._stop is not None or self._stop_watch.is_set():
                return
            left = deadline_at - self.clock()
            if silent is not None or left <= 0:
                results[(i, k)] = silent or _Missed(f"instrument {source.instrument}: the watch deadline of "
                                                    f"{self.watch_deadline_s:g} s passed before its turn")
                continue
            try:
                source.read(left)
                results[(i, k)] = None
            except InterlockTrip:
                return
            except (InstrumentTimeout, InstrumentConnectionError) as exc:
                results[(i, k)] = exc
                silent = exc
            except Exception as exc:
                # A wrong answer or a reset instrument is itself a reason to stop.
                name = self._watched[i].name
                message = f"interlock watch could not read {name}: {exc}"
                self.watch_errors.append(message)
                try:
                    self.trip("watch_reading", float("nan"), float("nan"), source.instrument, message)
                except InterlockTrip:
                    return
