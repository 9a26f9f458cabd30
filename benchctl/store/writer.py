"""Durable writes: every public method commits before it returns.

One connection is kept for writing, guarded by a lock so a store may be shared by
threads. A point is one transaction: an INSERT of the point row, an ``executemany``
INSERT of its values, COMMIT. The next sequence number and the quantity ids of each
open run are cached, so no SELECT is needed per point. On SQLite the point INSERTs are
compiled once from the Core tables and run on the DB-API cursor (``_FastPointWriter``);
a point that brings a new quantity, and every other engine, take the plain Core path.

Sequence numbers are kept by the one writer of a run; two processes writing the same
run is not supported (the second one's points are refused by the primary key). Many
stations writing one shared database at once is: each writes only its own runs, whose
ids the database assigns, so their sequence numbers cannot collide, and a point's
transaction touches no row another station writes (tests/test_pg_concurrency.py).
Every run gets a random ``run_uuid`` (RFC 4122 version 4) when it begins.
"""

from __future__ import annotations

import logging
import re
import threading
import uuid
from collections.abc import Callable, Iterable, Iterator, Mapping
from contextlib import AbstractContextManager, contextmanager
from dataclasses import dataclass, field
from typing import Any

from sqlalchemy import func, insert, select, update
from sqlalchemy.engine import Connection, Engine
from sqlalchemy.exc import IntegrityError, SQLAlchemyError

from benchctl.errors import StoreError, StoreFullError

from . import schema as s
from .engine import WRITE_OPTIONS
from .codec import encode_column, to_float_or_none, to_json
from .inserted import inserted_id
from .url import mask_secrets
from benchctl.units import unit_from_name  # noqa: F401  (re-exported: documented here before)

from .records import FINAL_STATUSES, RUNNING, RunStart, sha256_hex
from benchctl.run_status import RunStatus

log = logging.getLogger(__name__)

# Column order of the tuples handed to the point writers (that of the tables).
POINT_KEYS = ("run_id", "seq", "t_utc_s", "tag", "settled", "settle_time_s", "settle_json")
VALUE_KEYS = ("run_id", "seq", "quantity_id", "value")

# Columns of the wide points table; a quantity may not take one of these names.
RESERVED_NAMES = frozenset({"run_id", "seq", "t_utc", "tag", "settled", "settle_time_s", "settle_info",
                            "settle_reason"})

_SHA256_RE = re.compile(r"^[0-9a-f]{64}$")

# Unit implied by a quantity name's suffix (the project's naming convention: vin_v,
# iout_a, pout_w, freq_hz, gain_db, phase_deg, t_s). Used only when no unit is given.
@dataclass
class _OpenRun:
    next_seq: int
    quantities: dict[str, tuple[int, str]] = field(default_factory=dict)  # name -> (id, unit)


class Writer:
    """Writes runs, points, events, results and arrays; used through :class:`~benchctl.store.Store`."""

    def __init__(self, engine: Engine, clock: Callable[[], float], where: str, disk: str = "its disk") -> None:
        self._engine = engine
        self._clock = clock
        self._where = where  # masked URL, for messages
        self._disk = disk  # where the data lives, for a disk-full message
        self._first_full: str | None = None  # the first write that met a full disk
        self._lock = threading.RLock()
        self._conn: Connection | None = None
        self._open_runs: dict[int, _OpenRun] = {}
        self._known_runs: set[int] = set()
        self._insert_point = insert(s.points)
        self._insert_value = insert(s.point_values)
        self._insert_quantity = insert(s.quantities)
        self._fast = _FastPointWriter(engine, where) if engine.dialect.name == "sqlite" else None

    def _connection(self) -> Connection:
        if self._conn is None:
            try:
                self._conn = self._engine.connect().execution_options(**WRITE_OPTIONS)
            except SQLAlchemyError as exc:
                raise StoreError(f"cannot connect to store {self._where}: {exc}") from exc
        return self._conn

    # ---------------------------------------------------------------- plumbing
    def close(self) -> None:
        with self._lock:
            if self._conn is not None:
                try:
                    self._conn.close()
                finally:
                    self._conn = None
            self._open_runs.clear()
            self._known_runs.clear()

    def transaction(self, doing: str) -> AbstractContextManager[Connection]:
        """One transaction on the write connection (commit on success, else roll back);
        errors become :class:`StoreError` saying ``doing`` failed and nothing was written."""
        return self._transaction(doing)

    def full_disk(self, doing: str, cause: BaseException, run_id: int | None) -> StoreFullError:
        """The error of a write that met a full disk, naming it (and the first such write).

        The first time, a ``disk_full`` event is stored with the run where it still fits
        (a small row may, where a point did not), so the run's record says why it stopped.
        """
        first = self._first_full
        resume = (f"; then `benchctl run --resume {run_id} --station FILE` continues the run from its last "
                  "committed point") if run_id is not None else ""
        if first is None:
            self._first_full = f"{doing} failed"
            message = (f"store {self._where}: the disk holding the database is full ({_orig(cause)}): {doing} failed "
                       f"and nothing of it was written; everything committed before is kept. Free space on "
                       f"{self._disk}{resume}")
        else:
            message = (f"store {self._where}: the disk holding the database is still full ({first} first): "
                       f"{doing} failed as well and nothing of it was written. Free space on {self._disk}{resume}")
        log.info("%s", message)  # the error carries it to the person; this is for the log file
        if first is None and run_id is not None:
            self._note_full(run_id, message)
        return StoreFullError(message)

    def _note_full(self, run_id: int, message: str) -> None:
        """Store a ``disk_full`` event if it still fits; never raises."""
        try:
            with self._lock:
                conn = self._connection()
                try:
                    conn.execute(insert(s.events).values(
                        run_id=run_id, t_utc_s=self._clock(), kind="disk_full", message=message,
                        details_json=to_json("disk full", {"disk": self._disk}), point_seq=None))
                    conn.commit()
                except SQLAlchemyError:
                    _rollback(conn)
                    raise
        except Exception:  # the disk is full: nothing more may fit
            log.warning("run %d: the disk-full event could not be stored either", run_id)

    @contextmanager
    def _transaction(self, doing: str, run_id: int | None = None) -> Iterator[Connection]:
        """Run the block in one transaction on the write connection; commit or roll back."""
        with self._lock:
            conn = self._connection()
            try:
                yield conn
                conn.commit()
            except StoreError:
                _rollback(conn)
                raise
            except SQLAlchemyError as exc:
                _rollback(conn)
                if conn.invalidated:  # broken connection: open a fresh one next time
                    self._conn = None
                    conn.close()
                if is_disk_full(exc):
                    raise self.full_disk(doing, exc, run_id) from exc
                raise StoreError(
                    f"store {self._where}: {doing} failed and nothing of it was written: "
                    f"{getattr(exc, 'orig', None) or exc}"
                ) from exc
            except BaseException:
                _rollback(conn)
                raise

    def _require_run(self, conn: Connection, run_id: int) -> None:
        if run_id in self._known_runs:
            return
        found = conn.execute(select(s.runs.c.id).where(s.runs.c.id == run_id)).first()
        if found is None:
            raise StoreError(f"store {self._where} has no run {run_id}; list the runs with `benchctl runs` (Store.runs() from Python)")
        self._known_runs.add(run_id)

    def _open_run(self, conn: Connection, run_id: int) -> _OpenRun:
        cached = self._open_runs.get(run_id)
        if cached is not None:
            return cached
        row = conn.execute(select(s.runs.c.status).where(s.runs.c.id == run_id)).first()
        if row is None:
            raise StoreError(f"store {self._where} has no run {run_id}; begin a run before recording points")
        if row.status != RUNNING:
            raise StoreError(
                f"run {run_id} is {row.status}; points can only be added to a running run, begin a new run"
            )
        last = conn.execute(select(func.max(s.points.c.seq)).where(s.points.c.run_id == run_id)).scalar()
        opened = _OpenRun(next_seq=(last or 0) + 1)
        for q in conn.execute(
            select(s.quantities.c.id, s.quantities.c.name, s.quantities.c.unit).where(
                s.quantities.c.run_id == run_id
            )
        ):
            opened.quantities[q.name] = (q.id, q.unit)
        self._open_runs[run_id] = opened
        self._known_runs.add(run_id)
        return opened

    # ---------------------------------------------------------------- runs
    def begin_run(self, start: RunStart) -> int:
        """Store a new run with status ``running``; returns its integer id."""
        _check_start(start)
        parameters_json = to_json(f"parameters of procedure {start.procedure!r}", dict(start.parameters))
        station_sha = _station_sha(start)
        now = self._clock()
        for attempt in (1, 2):  # a concurrent writer may create the same station or DUT
            try:
                with self._transaction(f"beginning a run of {start.procedure!r}") as conn:
                    station_id = _station_id(conn, start, station_sha)
                    dut_id = _dut_id(conn, start) if start.dut_part else None
                    run_id = inserted_id(conn.execute(
                        insert(s.runs).values(
                            run_uuid=str(uuid.uuid4()),
                            procedure=start.procedure,
                            procedure_sha256=start.procedure_sha256,
                            parameters_json=parameters_json,
                            station_id=station_id,
                            dut_id=dut_id,
                            operator=start.operator,
                            host=start.host,
                            pid=int(start.pid),
                            benchctl_version=start.benchctl_version,
                            job_id=start.job_id,
                            status=RUNNING,
                            message="",
                            started_utc_s=now,
                        )
                    ), "runs")
                    if start.instruments:
                        conn.execute(
                            insert(s.instruments),
                            [
                                {
                                    "run_id": run_id,
                                    "station_id": station_id,
                                    "role": i.role,
                                    "driver": i.driver,
                                    "resource": i.resource,
                                    "identity": i.identity,
                                }
                                for i in start.instruments
                            ],
                        )
            except StoreError as exc:
                if attempt == 1 and isinstance(exc.__cause__, IntegrityError):
                    continue
                raise
            break
        run_id = int(run_id)
        self._open_runs[run_id] = _OpenRun(next_seq=1)
        self._known_runs.add(run_id)
        log.info("run %d begun: %s on station %s", run_id, start.procedure, start.station_name)
        return run_id

    def begin_job(self, name: str, station_name: str, host: str) -> int:
        """Store a new job and return its id, assigned by the database (unique across stations)."""
        with self._transaction(f"beginning job {name!r}") as conn:
            job_id = inserted_id(conn.execute(
                insert(s.jobs).values(job_uuid=str(uuid.uuid4()), name=name, station_name=station_name, host=host,
                                      started_utc_s=self._clock())
            ), "jobs")
        return job_id

    def end_run(self, run_id: int, status: str, message: str = "") -> None:
        """Give a running run its final status and end time."""
        if status not in FINAL_STATUSES:
            raise StoreError(
                f"cannot end run {run_id} with status {status!r}; use one of {', '.join(sorted(FINAL_STATUSES))}"
            )
        with self._transaction(f"ending run {run_id}", run_id) as conn:
            done = conn.execute(
                update(s.runs)
                .where(s.runs.c.id == run_id, s.runs.c.status == RUNNING)
                .values(status=status, message=message, ended_utc_s=self._clock())
            ).rowcount
            if done != 1:
                row = conn.execute(select(s.runs.c.status).where(s.runs.c.id == run_id)).first()
                if row is None:
                    raise StoreError(f"store {self._where} has no run {run_id}; nothing to end")
                raise StoreError(f"run {run_id} has already ended ({row.status}); it cannot be ended again")
        self._open_runs.pop(run_id, None)
        log.info("run %d ended: %s %s", run_id, status, message)

    def reopen_run(self, run_id: int, message: str = "") -> None:
        """Set an interrupted or tripped run running again (resume), owned by this process.

        The gap since its last activity is recorded as a ``gap`` event; points continue
        from the next sequence number.
        """
        import os
        import socket as _socket

        with self._transaction(f"reopening run {run_id}", run_id) as conn:
            row = conn.execute(select(s.runs.c.status, s.runs.c.ended_utc_s).where(s.runs.c.id == run_id)).first()
            if row is None:
                raise StoreError(f"store {self._where} has no run {run_id}; nothing to resume")
            if row.status == RUNNING:
                raise StoreError(f"run {run_id} is still running according to the store; if its process is gone "
                                 f"(another host, a renamed machine), mark it with `benchctl mark-interrupted {run_id}`"
                                 " first")
            if row.status not in (RunStatus.INTERRUPTED, RunStatus.TRIPPED):
                raise StoreError(f"run {run_id} is {row.status}; only interrupted or tripped runs can be resumed")
            now = self._clock()
            conn.execute(update(s.runs).where(s.runs.c.id == run_id).values(
                status=RUNNING, ended_utc_s=None, pid=os.getpid(), host=_socket.gethostname()))
            gap_s = None if row.ended_utc_s is None else now - row.ended_utc_s
            conn.execute(insert(s.events).values(
                run_id=run_id, t_utc_s=now, kind="gap",
                message=(f"resumed after a gap of {gap_s:.1f} s" if gap_s is not None else "resumed")
                + (f"; {message}" if message else ""),
                details_json=to_json("gap details", {"gap_s": gap_s, "previous_status": row.status}),
            ))
        self._open_runs.pop(run_id, None)
        log.info("run %d resumed (was %s)", run_id, row.status)

    def record_station_change(self, run_id: int, start: RunStart, differences: Any) -> None:
        """The run's station becomes ``start``'s (text, description, instruments); the previous
        one and the differences are kept in a ``station_changed`` event. One transaction."""
        station_sha = _station_sha(start)
        with self._transaction(f"storing the changed station of run {run_id}", run_id) as conn:
            row = conn.execute(
                select(s.runs.c.station_id, s.stations.c.station_text, s.stations.c.station_sha256,
                       s.stations.c.description)
                .select_from(s.runs.join(s.stations, s.runs.c.station_id == s.stations.c.id))
                .where(s.runs.c.id == run_id)
            ).first()
            if row is None:
                raise StoreError(f"store {self._where} has no run {run_id}; nothing to change")
            before = [dict(r._mapping) for r in conn.execute(
                select(s.instruments.c.role, s.instruments.c.driver, s.instruments.c.resource,
                       s.instruments.c.identity).where(s.instruments.c.run_id == run_id).order_by(s.instruments.c.id))]
            station_id = _station_id(conn, start, station_sha)
            conn.execute(update(s.runs).where(s.runs.c.id == run_id).values(station_id=station_id))
            conn.execute(s.instruments.delete().where(s.instruments.c.run_id == run_id))
            if start.instruments:
                conn.execute(insert(s.instruments), [
                    {"run_id": run_id, "station_id": station_id, "role": i.role, "driver": i.driver,
                     "resource": i.resource, "identity": i.identity} for i in start.instruments])
            details = {
                "differences": list(differences),
                "previous_station_sha256": row.station_sha256,
                "previous_station_description": row.description,
                "previous_station_text": row.station_text,
                "previous_instruments": before,
                "station_sha256": station_sha,
            }
            conn.execute(insert(s.events).values(
                run_id=run_id, t_utc_s=self._clock(), kind="station_changed",
                message=f"resumed on a changed station ({len(differences)} difference(s)), accepted: "
                        + "; ".join(str(d.get("key")) for d in differences),
                details_json=to_json("station change", details),
            ))
        log.info("run %d: station change stored (%d differences)", run_id, len(differences))

    # ---------------------------------------------------------------- points
    def record_point(
        self,
        run_id: int,
        values: Mapping[str, Any],
        *,
        units: Mapping[str, str] | None = None,
        tag: str = "",
        settled: bool = True,
        settle_time_s: float | None = None,
        t_utc_s: float | None = None,
        settle_info: Mapping[str, Any] | None = None,
    ) -> int:
        """Store one point and its values in one transaction; committed on return. Returns its seq.

        ``settle_info`` says how the point was settled and verified (a JSON-able mapping).
        """
        if not values:
            raise StoreError(f"run {run_id}: a point needs at least one value; got none")
        units = units or {}
        t = self._clock() if t_utc_s is None else float(t_utc_s)
        settle = None if settle_time_s is None else float(settle_time_s)
        settle_json = to_json(f"run {run_id}: settle information", dict(settle_info or {}))
        with self._lock:
            opened = self._open_runs.get(run_id)
            if opened is None:
                with self._transaction(f"reading run {run_id} before its first point", run_id) as conn:
                    opened = self._open_run(conn, run_id)
            seq = opened.next_seq
            quantities = opened.quantities
            numbers: list[tuple[str, float | None]] = []
            value_rows: list[tuple[Any, ...]] = []  # (run_id, seq, quantity_id, value) while all are known
            all_known = True
            for name, value in values.items():
                if type(value) is float:  # the common case, checked cheaply
                    number: float | None = value if value == value else None
                else:
                    number = to_float_or_none(f"run {run_id}: value of {name!r}", value)
                known = quantities.get(name)
                if known is None:
                    if not isinstance(name, str) or not name or name in RESERVED_NAMES:
                        raise StoreError(
                            f"run {run_id}: {name!r} cannot name a quantity; use a non-empty name other than "
                            f"{', '.join(sorted(RESERVED_NAMES))}"
                        )
                    all_known = False
                elif units and (given := units.get(name)) is not None and given != known[1]:
                    raise StoreError(
                        f"run {run_id}: quantity {name!r} was recorded in {known[1]!r}, now given in {given!r}; "
                        "keep one unit per quantity (convert, or use another name)"
                    )
                elif all_known:
                    value_rows.append((run_id, seq, known[0], number))
                numbers.append((name, number))
            point = (run_id, seq, t, tag, bool(settled), settle, settle_json)
            if self._fast is not None and all_known:
                try:
                    self._fast.write_point(self._connection(), point, value_rows, f"run {run_id}, point {seq}")
                except _FullDisk as full:
                    raise self.full_disk(f"writing point {seq} of run {run_id}", full.cause, run_id) from full.cause
            else:
                self._write_point_core(opened, point, numbers, units)
            opened.next_seq = seq + 1
        return seq

    def _write_point_core(
        self,
        opened: _OpenRun,
        point: tuple[Any, ...],
        numbers: list[tuple[str, float | None]],
        units: Mapping[str, str],
    ) -> None:
        """The portable path: Core statements; also creates quantities seen for the first time."""
        point_row = dict(zip(POINT_KEYS, point))
        run_id, seq = point_row["run_id"], point_row["seq"]
        new_quantities: dict[str, tuple[int, str]] = {}
        with self._transaction(f"recording point {seq} of run {run_id}", run_id) as conn:
            rows = []
            for name, number in numbers:
                known = opened.quantities.get(name) or new_quantities.get(name)
                given = units.get(name)
                if known is None:
                    unit = given if given is not None else unit_from_name(name)
                    qid = inserted_id(conn.execute(
                        self._insert_quantity, {"run_id": run_id, "name": name, "unit": unit}
                    ), "quantities")
                    known = (qid, unit)
                    new_quantities[name] = known
                elif given is not None and given != known[1]:
                    raise StoreError(
                        f"run {run_id}: quantity {name!r} was recorded in {known[1]!r}, now given in {given!r}; "
                        "keep one unit per quantity (convert, or use another name)"
                    )
                rows.append({"run_id": run_id, "seq": seq, "quantity_id": known[0], "value": number})
            conn.execute(self._insert_point, point_row)
            conn.execute(self._insert_value, rows)
        opened.quantities.update(new_quantities)

    # ---------------------------------------------------------------- the rest
    def record_event(
        self,
        run_id: int,
        kind: str,
        message: str,
        details: Mapping[str, Any] | None = None,
        *,
        point_seq: int | None = None,
        t_utc_s: float | None = None,
    ) -> int:
        """Store an event of a run (any status); returns the event id."""
        if not isinstance(kind, str) or not kind or len(kind) > 64:
            raise StoreError(f"run {run_id}: event kind {kind!r} must be short non-empty text, e.g. 'warning'")
        details_json = to_json(f"details of event {kind!r}", dict(details or {}))
        t = self._clock() if t_utc_s is None else float(t_utc_s)
        with self._transaction(f"recording event {kind!r} of run {run_id}", run_id) as conn:
            self._require_run(conn, run_id)
            event_id = inserted_id(conn.execute(
                insert(s.events).values(
                    run_id=run_id, t_utc_s=t, kind=kind, message=message,
                    details_json=details_json, point_seq=point_seq,
                )
            ), "events")
        return event_id

    def record_result(
        self,
        run_id: int,
        name: str,
        value: float | None,
        *,
        unit: str = "",
        details: Any = None,
        scope: Mapping[str, Any] | None = None,
    ) -> int:
        """Store a derived result (value may be ``None``, e.g. a margin not found); returns its id."""
        if not isinstance(name, str) or not name:
            raise StoreError(f"run {run_id}: a result needs a non-empty name, got {name!r}")
        number = to_float_or_none(f"run {run_id}: result {name!r}", value)
        details_json = to_json(f"details of result {name!r}", details)
        scope_json = to_json(f"scope of result {name!r}", dict(scope or {}))
        with self._transaction(f"recording result {name!r} of run {run_id}", run_id) as conn:
            self._require_run(conn, run_id)
            result_id = inserted_id(conn.execute(
                insert(s.results).values(
                    run_id=run_id, t_utc_s=self._clock(), name=name, value=number, unit=unit,
                    details_json=details_json, scope_json=scope_json,
                )
            ), "results")
        return result_id

    def record_results(self, run_id: int, results: Iterable[Mapping[str, Any]]) -> int:
        """Store many derived results in one transaction (one commit); returns how many.

        Each item has ``name`` and ``value`` and optionally ``unit``, ``details``, ``scope``,
        ``uncertainty`` (standard) and ``expanded_uncertainty`` (k = 2), in the result's unit.
        """
        rows = []
        now = self._clock()
        for item in results:
            name = item.get("name")
            if not isinstance(name, str) or not name:
                raise StoreError(f"run {run_id}: a result needs a non-empty name, got {name!r}")
            rows.append(dict(
                run_id=run_id, t_utc_s=now, name=name,
                value=to_float_or_none(f"run {run_id}: result {name!r}", item.get("value")),
                unit=item.get("unit", "") or "",
                details_json=to_json(f"details of result {name!r}", item.get("details")),
                scope_json=to_json(f"scope of result {name!r}", dict(item.get("scope") or {})),
                uncertainty=to_float_or_none(f"run {run_id}: uncertainty of {name!r}", item.get("uncertainty")),
                expanded_uncertainty=to_float_or_none(f"run {run_id}: expanded uncertainty of {name!r}",
                                                      item.get("expanded_uncertainty")),
            ))
        if not rows:
            return 0
        with self._transaction(f"recording {len(rows)} results of run {run_id}", run_id) as conn:
            self._require_run(conn, run_id)
            conn.execute(insert(s.results), rows)
        return len(rows)

    def record_array(
        self,
        run_id: int,
        name: str,
        columns: Mapping[str, Any],
        *,
        units: Mapping[str, str] | None = None,
        point_seq: int | None = None,
        meta: Mapping[str, Any] | None = None,
    ) -> int:
        """Store named array columns (a sweep, a waveform) of a run or of one of its points."""
        if not isinstance(name, str) or not name:
            raise StoreError(f"run {run_id}: an array needs a non-empty name, got {name!r}")
        if not columns:
            raise StoreError(f"run {run_id}: array {name!r} has no columns; give e.g. {{'freq_hz': ...}}")
        units = units or {}
        encoded = []
        for position, (col, values) in enumerate(columns.items()):
            if not isinstance(col, str) or not col:
                raise StoreError(f"run {run_id}: array {name!r} column {position} needs a non-empty name")
            dtype, shape, data = encode_column(f"{name}.{col}", values)
            unit = units.get(col)
            encoded.append(
                {
                    "position": position,
                    "name": col,
                    "unit": unit if unit is not None else unit_from_name(col),
                    "dtype": dtype,
                    "shape_json": to_json("array shape", list(shape)),
                    "data": data,
                }
            )
        unknown_units = set(units) - set(columns)
        if unknown_units:
            raise StoreError(
                f"run {run_id}: array {name!r} has units for {sorted(unknown_units)} which are not among its "
                f"columns {list(columns)}"
            )
        meta_json = to_json(f"meta of array {name!r}", dict(meta or {}))
        with self._transaction(f"recording array {name!r} of run {run_id}", run_id) as conn:
            self._require_run(conn, run_id)
            if point_seq is not None:
                exists = conn.execute(
                    select(s.points.c.seq).where(s.points.c.run_id == run_id, s.points.c.seq == point_seq)
                ).first()
                if exists is None:
                    raise StoreError(
                        f"run {run_id} has no point {point_seq} to attach array {name!r} to; "
                        "record the point first or leave point_seq None"
                    )
            seq_match = s.arrays.c.point_seq.is_(None) if point_seq is None else s.arrays.c.point_seq == point_seq
            dup = conn.execute(
                select(s.arrays.c.id).where(s.arrays.c.run_id == run_id, s.arrays.c.name == name, seq_match)
            ).first()
            if dup is not None:
                where = "the run" if point_seq is None else f"point {point_seq}"
                raise StoreError(
                    f"run {run_id} already holds an array {name!r} for {where}; choose another name"
                )
            array_id = inserted_id(conn.execute(
                insert(s.arrays).values(
                    run_id=run_id, point_seq=point_seq, name=name, t_utc_s=self._clock(), meta_json=meta_json
                )
            ), "arrays")
            conn.execute(insert(s.array_columns), [dict(row, array_id=array_id) for row in encoded])
        return int(array_id)


class _FullDisk(Exception):
    """Internal: the fast point writer met a full disk (the Writer names it)."""

    def __init__(self, cause: BaseException) -> None:
        super().__init__(str(cause))
        self.cause = cause


class _FastPointWriter:
    """Per-point INSERTs executed on the DB-API cursor (SQLite branch only).

    The SQL is compiled once from the Core tables for the engine's dialect (bound
    parameters only, in the tables' column order), which skips SQLAlchemy's
    per-execution work. Used only when all of a point's quantities already exist, and
    only between transactions of the SQLAlchemy connection.
    """

    def __init__(self, engine: Engine, where: str) -> None:
        dialect = engine.dialect
        point_sql = insert(s.points).compile(dialect=dialect)
        value_sql = insert(s.point_values).compile(dialect=dialect)
        if (
            not point_sql.positional
            or not value_sql.positional
            or tuple(point_sql.positiontup or ()) != POINT_KEYS
            or tuple(value_sql.positiontup or ()) != VALUE_KEYS
        ):
            raise StoreError(
                f"store {where}: the compiled point INSERTs do not have the expected positional "
                f"parameters {POINT_KEYS} / {VALUE_KEYS}; the schema and the writer disagree"
            )
        self._point_sql = point_sql.string
        self._value_sql = value_sql.string
        self._error = dialect.loaded_dbapi.Error
        self._where = where

    def write_point(
        self, conn: Connection, point: tuple[Any, ...], value_rows: list[tuple[Any, ...]], what: str
    ) -> None:
        if conn.in_transaction():  # never interleave with an open Core transaction
            raise StoreError(f"store {self._where}: internal error, write connection busy while writing {what}")
        dbapi = conn.connection.dbapi_connection
        assert dbapi is not None
        cur = dbapi.cursor()
        try:
            cur.execute("BEGIN IMMEDIATE")  # the connection is in autocommit mode; see store._make_engine
            cur.execute(self._point_sql, point)
            cur.executemany(self._value_sql, value_rows)
            dbapi.commit()
        except self._error as exc:
            try:
                if dbapi.in_transaction:
                    dbapi.rollback()
            except self._error:
                log.warning("rollback failed on the store's write connection", exc_info=True)
            if is_disk_full(exc):
                raise _FullDisk(exc) from exc
            raise StoreError(
                f"store {self._where}: writing {what} failed and nothing of it was written: {exc}"
            ) from exc
        finally:
            cur.close()


def _rollback(conn: Connection) -> None:
    try:
        conn.rollback()
    except SQLAlchemyError:  # the connection is broken; it is replaced on next use
        log.warning("rollback failed on the store's write connection", exc_info=True)


def _check_start(start: RunStart) -> None:
    problems = []
    if not start.procedure:
        problems.append("procedure name is empty")
    if not isinstance(start.procedure_sha256, str) or not _SHA256_RE.match(start.procedure_sha256):
        problems.append(
            f"procedure_sha256 {start.procedure_sha256!r} is not 64 lowercase hex digits; "
            "use hashlib.sha256(source_bytes).hexdigest()"
        )
    if not start.station_name:
        problems.append("station_name is empty")
    if start.station_sha256 is not None and not _SHA256_RE.match(start.station_sha256):
        problems.append(f"station_sha256 {start.station_sha256!r} is not 64 lowercase hex digits")
    roles = [i.role for i in start.instruments]
    if len(set(roles)) != len(roles):
        problems.append(f"instrument roles repeat: {roles}")
    if (start.dut_revision or start.dut_serial) and not start.dut_part:
        problems.append("DUT revision or serial given without dut_part")
    if problems:
        raise StoreError("cannot begin run: " + "; ".join(problems))


def _station_sha(start: RunStart) -> str:
    if start.station_text is None:
        return start.station_sha256 or ""
    computed = sha256_hex(start.station_text)
    if start.station_sha256 is not None and start.station_sha256 != computed:
        raise StoreError(
            f"cannot begin run: station_sha256 {start.station_sha256} does not match the sha256 of "
            f"station_text ({computed}); give the text alone and the store computes it"
        )
    return computed


def _station_id(conn: Connection, start: RunStart, sha: str) -> int:
    t = s.stations
    row = conn.execute(
        select(t.c.id).where(
            t.c.name == start.station_name,
            t.c.station_sha256 == sha,
            t.c.description == start.station_description,
        )
    ).first()
    if row is not None:
        return int(row.id)
    return int(
        inserted_id(conn.execute(
            insert(t).values(
                name=start.station_name,
                description=start.station_description,
                # provenance keeps the file but never a database password written in it
                station_text=None if start.station_text is None else mask_secrets(start.station_text),
                station_sha256=sha,
            )
        ), "stations")
    )


def _dut_id(conn: Connection, start: RunStart) -> int:
    t = s.duts
    row = conn.execute(
        select(t.c.id).where(
            t.c.part_number == start.dut_part, t.c.revision == start.dut_revision, t.c.serial == start.dut_serial
        )
    ).first()
    if row is not None:
        return int(row.id)
    return int(
        inserted_id(conn.execute(
            insert(t).values(part_number=start.dut_part, revision=start.dut_revision, serial=start.dut_serial)
        ), "duts")
    )


def _orig(exc: BaseException) -> str:
    return str(getattr(exc, "orig", None) or exc)


def is_disk_full(exc: BaseException) -> bool:
    """True when a database error means the disk (or the database's size limit) is full.

    SQLite: result code SQLITE_FULL, 13, "database or disk is full" (SQLite docs, "Result and
    Error Codes"; also met at ``max_page_count``); PostgreSQL: SQLSTATE 53100 ``disk_full``
    (PostgreSQL docs, Appendix A, "Error Codes"); an operating-system ENOSPC.
    """
    import errno

    orig = getattr(exc, "orig", None) or exc
    if getattr(orig, "sqlite_errorcode", None) == 13 or getattr(orig, "sqlstate", None) == "53100":
        return True
    if isinstance(orig, OSError) and orig.errno == errno.ENOSPC:
        return True
    text = str(orig).lower()
    return any(t in text for t in ("database or disk is full", "no space left on device", "could not extend file"))
