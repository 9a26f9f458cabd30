"""The interlock: the one place where station limits are enforced.

Every setpoint a procedure asks for is checked here *before* anything is sent, and every
reading is checked as it comes back (see :mod:`benchctl.guarded`, which wraps the
drivers). While any output is on, a background watch reads the source and the DUT
output at the station's ``watch_period_s``. On a trip the source output is turned off
first, then the load input, the reason (limit, value, instrument) is kept for the run's
event log, and the procedure is stopped at its next bench call or wait.

The interlock is a second line of defence: it does not replace the instruments' own
protection (which it programs too), fuses, guarding and licensed practice.
"""

from __future__ import annotations

import logging
import threading
import time
from dataclasses import dataclass, field
from typing import Any, Callable

from benchctl.errors import InterlockTrip, SetpointRefused
from benchctl.station import StationLimits

logger = logging.getLogger(__name__)


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


@dataclass
class _Watched:
    name: str
    read: Callable[[], float]


class Interlock:
    """Station limits, reading checks, the background watch and the safe shutdown."""

    def __init__(
        self,
        limits: StationLimits,
        *,
        watch_period_s: float = 0.1,
        clock: Callable[[], float] = time.monotonic,
    ) -> None:
        self.limits = limits
        self.watch_period_s = float(watch_period_s)
        self.clock = clock
        self._trip: TripRecord | None = None
        self._trip_event = threading.Event()
        self._lock = threading.RLock()
        self._source: Any = None
        self._load: Any = None
        self._source_on = False
        self._load_on = False
        self._watched: list[_Watched] = []
        self._watch_thread: threading.Thread | None = None
        self._stop_watch = threading.Event()
        self._outputs_changed = threading.Event()
        self.watch_errors: list[str] = []

    # -- wiring --------------------------------------------------------------------

    def attach_outputs(self, source: Any | None, load: Any | None) -> None:
        """The raw drivers the shutdown turns off (source first, then load)."""
        self._source = source
        self._load = load

    def watch(self, name: str, read: Callable[[], float]) -> None:
        """Add a guarded reading to the background watch (it checks its own limit)."""
        self._watched.append(_Watched(name, read))

    def output_state_changed(self, *, source_on: bool | None = None, load_on: bool | None = None) -> None:
        with self._lock:
            if source_on is not None:
                self._source_on = source_on
            if load_on is not None:
                self._load_on = load_on
        self._outputs_changed.set()

    @property
    def any_output_on(self) -> bool:
        return self._source_on or self._load_on

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
        maximum = float(getattr(self.limits, limit))
        if value > maximum:
            self.trip(limit, maximum, value, instrument,
                      f"{instrument}: {what} {value:g} above the station limit limits.{limit} = {maximum:g}")
        return value

    # -- trip and shutdown ---------------------------------------------------------

    @property
    def trip_record(self) -> TripRecord | None:
        return self._trip

    def raise_if_tripped(self) -> None:
        record = self._trip
        if record is not None:
            raise InterlockTrip(
                f"interlock tripped: {record.message}; outputs were turned off",
                limit=record.limit, value=record.value, instrument=record.instrument,
            )

    def trip(self, limit: str, limit_value: float, value: float, instrument: str, message: str) -> None:
        """Turn the outputs off (source, then load), remember why, and raise InterlockTrip."""
        with self._lock:
            if self._trip is None:
                t = self.clock()
                logger.error("interlock trip: %s", message)
                steps = self.shutdown()
                self._trip = TripRecord(limit, limit_value, value, instrument, message, t, tuple(steps))
                self._trip_event.set()
        self.raise_if_tripped()

    #: How long the shutdown waits for one instrument to have processed its OFF command
    #: before it switches the next one off (a dead instrument costs at most this).
    OFF_ACK_TIMEOUT_S = 0.5

    def shutdown(self) -> list[str]:
        """Outputs off in the safe order: source first, then load. Never raises; idempotent.

        Each OFF command is sent and acknowledged (``*OPC?``, at most
        :attr:`OFF_ACK_TIMEOUT_S`, no retries) before the next output is switched off, so the
        order holds at the instruments and a dead source delays the load by half a second
        at most; then each output is confirmed through the driver (error queue, read-back).
        """
        steps: list[str] = []
        outputs = [(name, driver, off) for name, driver, off in
                   (("source", self._source, "set_output"), ("load", self._load, "set_input"))
                   if driver is not None and getattr(driver, "is_open", False)]
        with self._lock:
            for name, driver, off in outputs:
                try:
                    driver.send(driver.command(off, state="OFF"))
                    driver.wait_complete(timeout_s=min(self.OFF_ACK_TIMEOUT_S, getattr(driver, "timeout_s", 2.0)))
                    steps.append(f"{name} off sent")
                except Exception as exc:  # keep going: the next output must still go off
                    logger.error("could not switch the %s off at once: %s", name, exc)
                    steps.append(f"{name} off send FAILED: {exc}")
                    drop = getattr(driver, "_drop_session", None)
                    if callable(drop):  # a late answer must not be read as the next one
                        try:
                            drop()
                        except Exception:
                            pass
            for name, driver, off in outputs:
                try:
                    getattr(driver, off)(False)
                    steps.append(f"{name} off confirmed")
                except Exception as exc:
                    logger.error("could not confirm the %s off: %s", name, exc)
                    steps.append(f"{name} off confirmation FAILED: {exc}")
            self._source_on = False
            self._load_on = False
        return steps

    # -- waiting and watching ------------------------------------------------------

    def wait(self, seconds: float, sleep: Callable[[float], None] | None = None) -> None:
        """Wait ``seconds``, woken early by a trip (then InterlockTrip is raised)."""
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
        self._watch_thread = threading.Thread(target=self._watch_loop, name="benchctl-interlock-watch", daemon=True)
        self._watch_thread.start()

    def stop_watch(self) -> None:
        self._stop_watch.set()
        self._outputs_changed.set()
        thread, self._watch_thread = self._watch_thread, None
        if thread is not None and thread is not threading.current_thread():
            thread.join(timeout=5.0)

    def _watch_loop(self) -> None:
        while not self._stop_watch.is_set() and self._trip is None:
            if not self.any_output_on:
                self._outputs_changed.wait(self.watch_period_s)
                self._outputs_changed.clear()
                continue
            started = self.clock()
            for item in self._watched:
                if self._stop_watch.is_set() or self._trip is not None or not self.any_output_on:
                    break
                try:
                    item.read()
                except InterlockTrip:
                    return
                except Exception as exc:
                    # A failing watch reading is itself a reason to stop: we can no longer see the DUT.
                    message = f"interlock watch could not read {item.name}: {exc}"
                    self.watch_errors.append(message)
                    try:
                        self.trip("watch_reading", float("nan"), float("nan"), item.name, message)
                    except InterlockTrip:
                        return
            elapsed = self.clock() - started
            self._stop_watch.wait(max(0.0, self.watch_period_s - elapsed))
