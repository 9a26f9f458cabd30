"""Running a procedure on a station into a store, safely.

The order of a run: parameters are validated and the station checked for the roles the
procedure needs (nothing is opened before); the instruments are opened and identified;
the run begins in the store with its provenance; the instruments' own protection is
programmed from the station limits (source OVP, load OCP/OPP) and outputs are forced
off; the interlock watch starts; the procedure body runs; whatever happens — completion,
failure, an interlock trip, Ctrl-C, SIGTERM, SIGHUP — the outputs end off through the
interlock's one shutdown (source first, the output discharged through the load, then the
load), the outcome is stored as the run's status with an event, and the instruments are
closed. Derived results are computed from the stored points and stored with the run.

A termination signal (:mod:`benchctl.termination`) once the run holds the station switches
the outputs off at once, from a thread of its own, and stops the procedure at the next
point where it may be interrupted (never inside a store write); the run is stored as
interrupted with the signal named. Further signals do not cut that shutdown short.
"""

from __future__ import annotations

import datetime as _dt
import logging
import math
import time
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any, Callable, Mapping

from benchctl.bench import Bench
from benchctl.errors import BenchctlError, InstrumentError, InterlockTrip, SetpointRefused, StationLockLost
from benchctl.guarded import guard
from benchctl.interlock import Interlock, WatchSource
from benchctl.run_status import RunStatus
from benchctl.procedure import Parameters, Procedure
from benchctl.station import LOAD_KIND, SOURCE_KIND, TEMPERATURE_METER_KIND, Station
from benchctl.station_lock import held_by_this_thread, one_run_per_station
from benchctl.termination import StopSignal, StopSignals

if TYPE_CHECKING:
    from benchctl.store import Store

logger = logging.getLogger(__name__)


@dataclass(frozen=True)
class DutInfo:
    part: str = ""
    revision: str = ""
    serial: str = ""


@dataclass(frozen=True)
class RunOutcome:
    """What a run ended as. ``status`` is one of completed / failed / tripped / interrupted."""

    run_id: int
    status: str
    message: str
    points: int
    duration_s: float
    trip: Any = None
    shutdown_steps: tuple[str, ...] = field(default=())
    #: The termination signal that stopped the run (``"SIGTERM"`` ...), None for Ctrl-C or no signal.
    signal_name: str | None = None

    @property
    def ok(self) -> bool:
        return self.status == RunStatus.COMPLETED


def _outputs_of(drivers: Mapping[str, Any], station: Station, kind: str) -> dict[str, Any]:
    """The opened drivers of ``kind`` by role, in the station file's order."""
    return {role: drivers[role] for role in station.roles_of_kind(kind) if role in drivers}


def _program_protection(drivers: Mapping[str, Any], station: Station, limits: Any = None) -> None:
    """The instruments' own protection as a hardware second layer, and every output off
    (every source, then every load). ``limits``: the run's (a test envelope's), default the station's."""
    lim = station.limits if limits is None else limits
    for driver in drivers.values():
        driver.reset()
    for source in _outputs_of(drivers, station, SOURCE_KIND).values():
        source.set_output(False)
        source.set_ovp(lim.source_voltage_max_v)
        source.set_current_limit(min(lim.source_current_max_a, source.current_limit()))
    for load in _outputs_of(drivers, station, LOAD_KIND).values():
        load.set_input(False)
        load.set_current_protection(lim.load_current_max_a)
        load.set_power_protection(lim.load_power_max_w)


@one_run_per_station  # a second run on this station is refused before any instrument is opened
def execute(
    procedure: Procedure,
    params: Parameters,
    station: Station,
    store: Store,
    *,
    dut: DutInfo = DutInfo(),
    operator: str | None = None,
    settle_enabled: bool = True,
    progress: Callable[[int, int, Mapping[str, float]], None] | None = None,
    on_begin: Callable[[int], None] | None = None,
    job_id: int | None = None,
    resume_run_id: int | None = None,
    notify: Callable[[str], None] | None = None,
    accept_station_change: bool = False,
    today: _dt.date | None = None,
) -> RunOutcome:
    """Run ``procedure`` on ``station`` into ``store`` and return how it ended.

    With ``resume_run_id`` the run continues an interrupted or tripped run: the planned
    points already committed are skipped and new points go into the same run, after the
    instruments are re-opened and the protection re-armed; the gap is stored as an event.

    ``notify(text)`` tells the console what a termination signal started (the shutdown and
    how long it may take). A signal that arrives after the body ended (during the shutdown
    or the analysis) is raised as :class:`~benchctl.termination.StopSignal` once the run
    is stored, so a caller running several procedures stops too.

    Calibration: an instrument of the run whose ``calibration_due`` is before ``today``
    (default: the local date) is told through ``notify`` and stored as a
    ``calibration_overdue`` event; with ``[station] calibration_overdue = "refuse"`` the run
    is refused (:class:`~benchctl.errors.CalibrationOverdueError`) before any instrument
    is opened. Every stated calibration is stored as a ``calibration`` event.
    """
    station.require_roles(procedure.roles, needed_by=f"procedure {procedure.name}")
    roles = _roles_to_open(procedure, station)
    overdue = _calibration_check(station, roles, today=today or _dt.date.today(), notify=notify)
    envelope = _test_envelope(procedure, params, station, notify)
    started = time.monotonic()
    if resume_run_id is not None and _resume_is_complete(store, procedure, params, resume_run_id):
        return _finish_complete_resume(store, procedure, params, resume_run_id, started)
    with StopSignals(notify=notify) as signals:
        with signals.interruptible():
            drivers = _open_instruments(station, roles)
        interlock = _interlock_for(station, None if envelope is None else envelope.limits)
        interlock.attach_outputs(_outputs_of(drivers, station, SOURCE_KIND), _outputs_of(drivers, station, LOAD_KIND))
        signals.budget_s = interlock.shutdown_budget_s
        try:
            with signals.deferred():
                start = _run_start(procedure, params, station, drivers, dut, operator, job_id)
                # The run holds the station from here on (begun, or resumed, in the store).
                run_id, skip_points = _begin_or_resume(store, start, resume_run_id, accept_station_change)
        except BaseException:
            _close_all(drivers)
            raise
        # From now on a termination signal switches this run's outputs off at once.
        signals.on_first = interlock.stop
        writes = _WritesFinish(store, signals)
        hold = held_by_this_thread(station, store)
        try:
            status, message, bench = RunStatus.FAILED, "", None
            signal_name: str | None = None
            try:
                with signals.interruptible():
                    if hold is not None:  # a shared database's lock can go with its session: check it
                        hold.watch_database_lock(lambda why: interlock.stop(StationLockLost(why)))
                    _record_calibration(writes, run_id, station, roles, overdue)
                    _record_dialect_cautions(writes, run_id, drivers, notify)
                    if envelope is not None:
                        writes.record_event(run_id, "test_envelope", envelope.caution(procedure.name), {
                            "widened": {k: {"operating": a, "envelope": b} for k, (a, b) in envelope.widened.items()},
                            "absolute": dict(vars(station.absolute_limits)) if station.absolute_limits else {}})
                    if on_begin is not None:
                        on_begin(run_id)
                    bench = _bench_for(writes, run_id, drivers, interlock, settle_enabled, progress, skip_points,
                                       station.dut_time_constant_s)
                    _arm_watch(interlock, bench, drivers, station)
                    status, message = _run_body(procedure, params, bench, drivers, interlock, station, writes, run_id)
            except KeyboardInterrupt as exc:  # a stop before the body began, or as it returned
                status, message = _interrupted(store, run_id, exc)
                signal_name = getattr(exc, "signal_name", None)
            except StationLockLost as exc:  # lost already when the run began: nothing was switched on
                store.record_event(run_id, "error", str(exc), {"type": type(exc).__name__})
                status, message = RunStatus.FAILED, str(exc)
            finally:
                # No signal interrupts what follows (the handler only acknowledges it).
                steps = _shut_down(interlock, drivers, store, run_id)
                if hold is not None:
                    hold.unwatch_database_lock()
                    for note in hold.lock_notes:
                        store.record_event(run_id, "station_lock", note, {})
                    hold.lock_notes.clear()
            trip = interlock.trip_record
            if status == RunStatus.FAILED and trip is not None:  # e.g. a procedure's retry chain ended by the trip
                status, message = RunStatus.TRIPPED, f"interlock tripped: {trip.message}; the outputs were switched off"
            elif status == RunStatus.COMPLETED and trip is not None:
                # The watch tripped after the procedure's last check (in its power-down, or on a reading still in
                # flight as the watch stopped): every point is stored, but a limit was crossed while energised.
                status, message = RunStatus.TRIPPED, (f"interlock tripped after the procedure's last point: "
                                                      f"{trip.message}; the outputs were switched off")
            if status == RunStatus.COMPLETED and procedure.analyse is not None:
                try:
                    store_results(store, run_id, procedure, params)
                except Exception as exc:
                    logger.exception("analysis of run %s failed", run_id)
                    store.record_event(run_id, "error", f"analysis failed: {type(exc).__name__}: {exc}", {})
            store.end_run(run_id, status, message)
            points = store.run(run_id).n_points if resume_run_id or bench is None else bench.points_recorded
            outcome = RunOutcome(run_id, status, message, points, time.monotonic() - started,
                                 trip=interlock.trip_record, shutdown_steps=tuple(steps),
                                 signal_name=signal_name or (signals.first.signal_name if signals.first else None))
        finally:
            # Closed only once the run is stored: a watch reading still waiting on a hung
            # instrument holds its driver, and must not delay the record.
            _close_all(drivers)
        signals.raise_if_received()
    return outcome


def _roles_to_open(procedure: Procedure, station: Station) -> tuple[str, ...]:
    """The declared roles the station has, checked to have a guard for their kind (before
    anything is opened)."""
    from benchctl.errors import StationFileError
    from benchctl.guarded import has_guard

    roles = tuple(str(r) for r in procedure.roles_on(station))
    roles += tuple(r for r in _watch_only_roles(station) if r not in roles)
    unguarded = [f"{r} ({station.kind_of(r)})" for r in roles if not has_guard(station.kind_of(r))]
    if unguarded:
        raise StationFileError(
            f"station {station.name!r}: no interlock guard for role(s) {', '.join(unguarded)} used by procedure "
            f"{procedure.name}; nothing was opened. A new kind needs its guard (benchctl.guarded.register_guard)")
    return roles


def _watch_only_roles(station: Station) -> list[str]:
    """Roles opened for the interlock alone: once the station declares
    ``limits.hot_spot_temperature_max_c``, its temperature meters guard every run, whether or not
    the procedure reads temperatures (a full-load point at a hot ambient needs them most)."""
    if station.limits.hot_spot_temperature_max_c is None:
        return []
    return station.roles_of_kind(TEMPERATURE_METER_KIND)


def _calibration_check(station: Station, roles: tuple[str, ...], *, today: _dt.date,
                       notify: Callable[[str], None] | None) -> list[dict[str, Any]]:
    """The run's instruments whose calibration is past due on ``today``: told through ``notify``
    (the console's caution); refused before anything is opened when the station says so."""
    from benchctl.errors import CalibrationOverdueError

    overdue = [{"role": role, "calibration_due": cfg.calibration_due.isoformat() if cfg.calibration_due else None,
                "calibration_certificate": cfg.calibration_certificate, "days_overdue": days,
                "resource": cfg.resource}
               for role, cfg, days in station.overdue_calibrations(roles, today)]
    if not overdue:
        return []
    lines = [f"{o['role']} (due {o['calibration_due']}, {o['days_overdue']} day(s) ago"
             + (f", certificate {o['calibration_certificate']}" if o["calibration_certificate"] else "") + ")"
             for o in overdue]
    if station.calibration_overdue == "refuse":
        raise CalibrationOverdueError(
            f"station {station.name!r} ({station.path or 'in memory'}) refuses runs with an instrument past its "
            f"calibration due date (calibration_overdue = \"refuse\"): {'; '.join(lines)}. Nothing was opened. "
            "Have the instrument calibrated and update calibration_due, or use another instrument")
    text = ("CAUTION: calibration overdue: " + "; ".join(lines) + ". Its readings are not traceable; the run "
            "goes on and stores this")
    logger.warning("%s", text)
    if notify is not None:
        notify(text)
    return overdue


def _record_dialect_cautions(store: Any, run_id: int, drivers: Mapping[str, Any],
                             notify: Callable[[str], None] | None) -> None:
    """What an instrument's dialect leaves unchecked (error_check = none, completion = fixed_wait):
    told at the console and stored with the run, so a reader of its results knows."""
    found = {role: list(d.dialect_cautions()) for role, d in drivers.items()
             if callable(getattr(d, "dialect_cautions", None))}
    cautions = {role: c for role, c in found.items() if c}
    if not cautions:
        return
    text = "; ".join(c for found in cautions.values() for c in found)
    store.record_event(run_id, "caution", f"instrument dialect: {text}", {"dialect_cautions": cautions})
    if notify is not None:
        notify(f"caution: {text}")


def _record_calibration(store: Any, run_id: int, station: Station, roles: tuple[str, ...],
                        overdue: list[dict[str, Any]]) -> None:
    """The calibration records of the run's instruments (provenance), and the overdue ones."""
    records = {role: {"calibration_due": cfg.calibration_due.isoformat(),
                      "calibration_certificate": cfg.calibration_certificate}
               for role in roles if (cfg := station.instruments[role]).calibration_due is not None}
    if records:
        store.record_event(run_id, "calibration", "instrument calibration: " + "; ".join(
            f"{role} due {r['calibration_due']}" + (f" ({r['calibration_certificate']})" if r["calibration_certificate"]
                                                   else "") for role, r in records.items()), {"instruments": records})
    if overdue:
        store.record_event(run_id, "calibration_overdue", "calibration overdue: " + "; ".join(
            f"{o['role']} due {o['calibration_due']} ({o['days_overdue']} day(s) before the run)" for o in overdue),
            {"instruments": overdue})


def _test_envelope(procedure: Procedure, params: Parameters, station: Station,
                   notify: Callable[[str], None] | None) -> Any:
    """The procedure's test envelope (benchctl.test_envelope), checked and told before anything opens."""
    from benchctl.test_envelope import resolve_envelope

    envelope = resolve_envelope(procedure, params, station)
    if envelope is not None:
        text = envelope.caution(procedure.name)
        logger.warning("%s", text)
        if notify is not None:
            notify(text)
    return envelope


def _interlock_for(station: Station, limits: Any = None) -> Interlock:
    """The run's interlock with the station's limits (or a test envelope's), watch and shutdown options."""
    return Interlock(station.limits if limits is None else limits, watch_period_s=station.watch_period_s,
                     watch_deadline_s=station.watch_deadline_s, watch_missed_periods=station.watch_missed_periods,
                     shutdown_deadline_s=station.shutdown_deadline_s)


class _WritesFinish:
    """The store as the procedure's recorders see it: a termination signal waits until a write is
    committed (no half-written point), then stops the run."""

    def __init__(self, store: Any, signals: StopSignals) -> None:
        self._store = store
        self._signals = signals

    def __getattr__(self, name: str) -> Any:
        attr = getattr(self._store, name)
        if not (callable(attr) and name.startswith(("record_", "begin_", "end_", "reopen_"))):
            return attr

        def write(*args: Any, **kwargs: Any) -> Any:
            with self._signals.deferred():
                return attr(*args, **kwargs)

        return write


def _interrupted(store: Any, run_id: int, exc: BaseException) -> tuple[str, str]:
    """Store why the run was stopped (the signal, or the operator's Ctrl-C); (status, message)."""
    if isinstance(exc, StopSignal):
        message, details = exc.message, {"signal": exc.signal_name}
    else:
        message, details = "stopped by the operator (Ctrl-C)", {}
    store.record_event(run_id, "interrupted", message, details)
    return RunStatus.INTERRUPTED, message


def _close_all(drivers: Mapping[str, Any]) -> None:
    for d in drivers.values():
        d.close()


def _open_instruments(station: Station, roles: tuple[str, ...]) -> dict[str, Any]:
    """Open and identify the instruments of ``roles``; on any failure close those opened."""
    drivers: dict[str, Any] = {}
    try:
        for role in roles:
            drivers[role] = station.instruments[role].create().open()
    except BaseException:
        _close_all(drivers)
        raise
    return drivers


def _run_start(procedure: Procedure, params: Parameters, station: Station, drivers: Mapping[str, Any],
               dut: DutInfo, operator: str | None, job_id: int | None) -> Any:
    """The run's provenance: procedure and its hash, parameters, station, instrument identities, DUT."""
    from benchctl.store import InstrumentInfo, RunStart

    return RunStart(
        procedure=procedure.name,
        procedure_sha256=procedure.source_sha256,
        station_name=station.name,
        parameters=params.as_dict(),
        station_description=station.description,
        station_text=station.text,
        instruments=tuple(
            InstrumentInfo(role, station.instruments[role].driver, d.resource, str(d.identity))
            for role, d in drivers.items()
        ),
        dut_part=dut.part, dut_revision=dut.revision, dut_serial=dut.serial,
        job_id=job_id,
        **({"operator": operator} if operator is not None else {}),
    )


def _begin_or_resume(store: Any, start: Any, resume_run_id: int | None,
                     accept_station_change: bool = False) -> tuple[int, int]:
    """(run id, committed points to skip): a new run, or the resumed one reopened with a gap event.

    A resume first compares the station it runs on with the run's record
    (:mod:`benchctl.resume_check`) - before any instrument is reset or switched - and refuses
    a difference unless ``accept_station_change``; an accepted change is stored with the run.
    """
    if resume_run_id is None:
        return store.begin_run(start), 0
    from benchctl.errors import StationChangedError
    from benchctl.resume_check import station_differences

    info = store.run(resume_run_id)
    changes = station_differences(info.station_text, info.instruments, start.station_text, start.instruments)
    if changes and not accept_station_change:
        raise StationChangedError(
            f"run {resume_run_id} cannot be resumed on station {start.station_name!r} as it is now: it differs from "
            f"the station the run began on ({len(changes)} difference(s)); nothing was reset or switched. Put the "
            "station back as it was, or resume with --accept-station-change (accept_station_change=True) to go on "
            "with the change stored as part of the run", [c.text() for c in changes])
    skip_points = _planned_points_done(store, resume_run_id)
    # The run keeps the operator it began with; who resumed it (another shift, say) is kept in the gap event.
    store.reopen_run(resume_run_id, f"resumed by {start.operator} after {skip_points} committed points; "
                     "instruments re-identified: "
                     + "; ".join(f"{i.role}={i.identity}" for i in start.instruments))
    if changes:
        store.record_station_change(resume_run_id, start, [c.as_dict() for c in changes])
    return resume_run_id, skip_points


def _planned_points_done(store: Any, run_id: int) -> int:
    """How many planned points of ``run_id`` are committed (the first planned point not yet measured)."""
    points = store.points(run_id)
    if "plan_index" in points.columns and points["plan_index"].notna().any():
        return int(points["plan_index"].max()) + 1  # planned points done (several records each, maybe)
    return len(points)


def _resume_is_complete(store: Any, procedure: Procedure, params: Parameters, run_id: int) -> bool:
    """True when every planned point of the run to resume is already committed."""
    return _planned_points_done(store, run_id) >= len(procedure.planned(params))


def _finish_complete_resume(store: Any, procedure: Procedure, params: Parameters, run_id: int,
                            started: float) -> RunOutcome:
    """Resume a run whose planned points are all committed: its analysis is finished and the run
    completed, without opening any instrument (nothing is reset, nothing switched on)."""
    planned = len(procedure.planned(params))
    message = (f"all {planned} planned points were already committed; the analysis was finished without "
               "opening any instrument")
    store.reopen_run(run_id, message)
    if procedure.analyse is not None:
        try:
            store_results(store, run_id, procedure, params)
        except Exception as exc:
            logger.exception("analysis of run %s failed", run_id)
            store.record_event(run_id, "error", f"analysis failed: {type(exc).__name__}: {exc}", {})
    store.end_run(run_id, RunStatus.COMPLETED, "")
    return RunOutcome(run_id, RunStatus.COMPLETED, message, store.run(run_id).n_points, time.monotonic() - started)


def _bench_for(store: Any, run_id: int, drivers: Mapping[str, Any], interlock: Interlock, settle_enabled: bool,
               progress: Callable[[int, int, Mapping[str, float]], None] | None, skip_points: int,
               dut_time_constant_s: float | None = None) -> Bench:
    """The Bench of this run: guarded drivers, and recorders that write into ``run_id``."""

    def record(values: dict, units: dict, *, tag: str | None, settled: bool | None, settle_time_s: float | None,
               settle_info: dict | None = None) -> int:
        return store.record_point(run_id, values, units=units, tag=tag or "",
                                  settled=True if settled is None else settled, settle_time_s=settle_time_s,
                                  settle_info=_jsonable(settle_info) if settle_info else None)

    def record_array(name: str, columns: dict, units: dict, *, point_seq: int | None, meta: dict) -> None:
        store.record_array(run_id, name, columns, units=units, point_seq=point_seq, meta=meta)

    def record_event(kind: str, message: str, details: Mapping[str, Any]) -> None:
        store.record_event(run_id, kind, message, dict(details))

    return Bench(
        instruments={role: guard(d, interlock) for role, d in drivers.items()},
        interlock=interlock, recorder=record, array_recorder=record_array, event_recorder=record_event,
        settle_enabled=settle_enabled, progress=progress, skip_points=skip_points,
        dut_time_constant_s=dut_time_constant_s,
    )


#: Watched quantities: name, the roles that can read it (each one a second source for the
#: other), and what they measure.
WATCHED = (
    ("input voltage", ("input_meter", "source"), "voltage"),
    ("input current", ("input_meter", "source"), "current"),
    ("output voltage", ("output_meter", "load"), "voltage"),
)
#: Roles whose instrument must answer the watch: they switch energy, so a silent one trips the run
#: (and so does any other role of a kind in :data:`benchctl.station.ENERGY_KINDS`).
MUST_ANSWER = ("source", "load")


def _arm_watch(interlock: Interlock, bench: Bench, drivers: Mapping[str, Any], station: Station | None = None) -> None:
    """What the background watch reads: every instrument's power-on status (first: it is quick;
    a reset stops the run; a source or load that answers nobody trips it), the DUT input
    (input meter and the source's read-back) and the DUT output (output meter and the load's
    read-back). Every further source and load role (``source2``, ``load2``) is watched on its own
    read-back: its input (source) or output (load) voltage, each a quantity of its own. With
    ``limits.hot_spot_temperature_max_c`` declared, every hot-spot channel of each temperature
    meter too."""
    energy = _energy_roles(drivers, station)
    for role, d in drivers.items():
        check = getattr(d, "check_power_on_now", None)
        if callable(check):
            interlock.watch(f"{role} power-on status",
                            [WatchSource(role, _bounded(check), answered_at=_last_answer(d))],
                            required=role in MUST_ANSWER or role in energy)
    for name, roles, quantity in WATCHED:
        sources = [bench.role(role).watch_source(quantity) for role in roles if bench.has_role(role)]
        if sources:
            interlock.watch(name, sources)
    if station is not None and station.limits.hot_spot_temperature_max_c is not None:
        for role in station.roles_of_kind(TEMPERATURE_METER_KIND):
            if role in drivers:  # a thermocouple left unread could let a part overheat: a silent meter trips
                interlock.watch(f"hot-spot temperature at {role}", [bench.role(role).hot_spot_watch_source()])
    for role, kind in energy.items():
        if role in MUST_ANSWER:
            continue  # watched above
        quantities = (("input voltage", "voltage"), ("input current", "current")) if kind == SOURCE_KIND else \
            (("output voltage", "voltage"),)
        for name, quantity in quantities:
            interlock.watch(f"{name} at {role}", [bench.role(role).watch_source(quantity)])


def _energy_roles(drivers: Mapping[str, Any], station: Station | None) -> dict[str, str]:
    """Role -> kind of every opened source and load (by the station's kinds, else the drivers')."""
    out = {}
    for role, d in drivers.items():
        kind = station.kind_of(role) if station is not None and role in station.instruments else getattr(d, "kind", "")
        if kind in (SOURCE_KIND, LOAD_KIND):
            out[role] = kind
    return out


def _last_answer(driver: Any) -> Callable[[], float]:
    """When ``driver``'s instrument last answered anyone (``time.monotonic()``; 0 if unknown)."""
    def last() -> float:
        return float(getattr(driver, "last_answer_s", 0.0))
    return last


def _bounded(check: Callable[..., Any]) -> Callable[[float], Any]:
    """``check(deadline_s=...)`` as a watch source's ``read(deadline_s)``."""
    def read(deadline_s: float) -> Any:
        return check(deadline_s=deadline_s)
    return read


def _run_body(procedure: Procedure, params: Parameters, bench: Bench, drivers: Mapping[str, Any],
              interlock: Interlock, station: Station, store: Any, run_id: int) -> tuple[str, str]:
    """Protect, watch, run the procedure; (status, message), with the cause stored as an event."""
    try:
        _program_protection(drivers, station, interlock.limits)
        interlock.start_watch()
        procedure.run(bench, params)
        interlock.raise_if_tripped()
        for d in drivers.values():  # a run is complete only if no instrument reset itself during it
            if callable(getattr(d, "check_power_on", None)):
                d.check_power_on()
    except InterlockTrip as exc:
        return RunStatus.TRIPPED, str(exc)
    except SetpointRefused as exc:
        store.record_event(run_id, "interlock_refusal", str(exc),
                           {"limit": exc.limit, "value": exc.value, "instrument": exc.instrument})
        return RunStatus.FAILED, str(exc)
    except KeyboardInterrupt as exc:  # Ctrl-C, or a termination signal (StopSignal)
        return _interrupted(store, run_id, exc)
    except InstrumentError as exc:
        store.record_event(run_id, "error", str(exc), {"instrument": exc.instrument, "command": exc.command,
                                                       "type": type(exc).__name__})
        return RunStatus.FAILED, str(exc)
    except BenchctlError as exc:
        store.record_event(run_id, "error", str(exc), {"type": type(exc).__name__})
        return RunStatus.FAILED, str(exc)
    except Exception as exc:
        message = f"procedure raised {type(exc).__name__}: {exc}"
        logger.exception("procedure %s raised", procedure.name)
        store.record_event(run_id, "error", message, {"type": type(exc).__name__})
        return RunStatus.FAILED, message
    return RunStatus.COMPLETED, ""


def _shut_down(interlock: Interlock, drivers: Mapping[str, Any], store: Any, run_id: int) -> list[str]:
    """Stop the watch, outputs off in the safe order, store the trip and any failure (the
    instruments are closed by the caller once the run is stored).

    The watch is not waited for (the off path does not need its driver locks); a shutdown
    a trip or a signal started is finished first, then every output is switched off again,
    so one switched on meanwhile is caught too.
    """
    interlock.stop_watch(wait_s=0.0)
    steps = interlock.shutdown()
    activities = _stop_activities(drivers)
    unstopped = [a for a in activities if "could not be stopped" in a]
    if unstopped:
        store.record_event(run_id, "error", "after the outputs: " + "; ".join(unstopped), {"stopped": activities})
    early = list(interlock.stop_shutdown_steps)
    if early:  # what the shutdown a termination signal started did, before the final one
        store.record_event(run_id, "info", "outputs switched off on the termination signal: " + "; ".join(early),
                           {"shutdown": early})
    trip = interlock.trip_record
    if trip is not None:
        store.record_event(run_id, "interlock_trip", trip.message, {
            "limit": trip.limit, "limit_value": trip.limit_value, "value": trip.value,
            "instrument": trip.instrument, "shutdown": list(trip.shutdown),
        })
    failed_off = [s for s in steps if "FAILED" in s]
    if failed_off:
        store.record_event(run_id, "error", "could not confirm every output off: " + "; ".join(failed_off),
                           {"shutdown": steps})
    return steps


def _stop_activities(drivers: Mapping[str, Any]) -> list[str]:
    """After the outputs are off: stop what other instruments drive (an analyzer's injection sweep,
    a scope's pending capture), each by one unretried message; a failure is a step, not an error."""
    steps = []
    for role, driver in drivers.items():
        stop = getattr(driver, "stop_activity", None)
        if stop is None or not getattr(driver, "is_open", True):
            continue
        try:
            stop()
            steps.append(f"{role}: activity stopped")
        except Exception as exc:  # the run is being stored: report, never raise
            steps.append(f"{role}: its activity could not be stopped ({type(exc).__name__}: {exc})")
    return steps


def store_results(store: Store, run_id: int, procedure: Procedure, params: Parameters) -> int:
    """Compute the procedure's derived results from the stored points and store them."""
    points = store.points(run_id)
    results = _call_analyse(procedure, points, params, store, run_id) if procedure.analyse else []
    rows = []
    for r in results:
        value = None if r.value is None or (isinstance(r.value, float) and math.isnan(r.value)) else float(r.value)
        rows.append({"name": r.name, "value": value, "unit": r.unit,
                     "details": _jsonable(dict(r.details)), "scope": _jsonable(dict(r.scope)),
                     "uncertainty": _finite_or_none(getattr(r, "uncertainty", None)),
                     "expanded_uncertainty": _finite_or_none(getattr(r, "expanded_uncertainty", None))})
    return store.record_results(run_id, rows)


def _finite_or_none(value: Any) -> float | None:
    return None if value is None or not math.isfinite(float(value)) else float(value)


def _call_analyse(procedure: Procedure, points: Any, params: Parameters, store: Any, run_id: int) -> list:
    """``analyse(points, p)``, or ``analyse(points, p, accuracy=...)`` when it takes the instruments'
    accuracy: read from the station text stored with the run (the provenance), so a re-analysis of
    an old run uses the accuracy of the station it ran on."""
    import inspect

    assert procedure.analyse is not None
    try:
        takes_accuracy = "accuracy" in inspect.signature(procedure.analyse).parameters
    except (TypeError, ValueError):
        takes_accuracy = False
    if not takes_accuracy:
        return procedure.analyse(points, params)
    from benchctl.errors import StationFileError
    from benchctl.station import station_accuracy_from_text

    try:
        accuracy = station_accuracy_from_text(store.run(run_id).station_text, where=f"run {run_id}'s station text")
    except StationFileError as exc:
        logger.warning("run %s: instrument accuracy not used: %s", run_id, exc)
        store.record_event(run_id, "warning", f"instrument accuracy not used, results carry no uncertainty: {exc}", {})
        accuracy = {}
    return procedure.analyse(points, params, accuracy=accuracy)


def _jsonable(obj: Any) -> Any:
    if isinstance(obj, dict):
        return {str(k): _jsonable(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_jsonable(v) for v in obj]
    if isinstance(obj, float) and not math.isfinite(obj):
        return None
    if hasattr(obj, "item"):
        return obj.item()
    return obj
