"""The measurement store: open a database, check its schema version, recover runs.

SQLite (the default) is opened with:

* ``PRAGMA journal_mode=WAL`` - readers (a report, the CLI) never block the writer and
  the writer never blocks them (SQLite docs, "Write-Ahead Logging", section 2.2).
* ``PRAGMA synchronous=FULL`` - the WAL is synced to disk at every commit, so a
  committed point survives a power loss or OS crash, not only the death of the
  process. With ``NORMAL`` a WAL database stays consistent but may lose the last
  commits on power loss (SQLite docs, "PRAGMA synchronous"). A bench can lose mains
  (an interlock opening a breaker); one fsync per point is cheap next to the seconds
  a setpoint takes to settle.
* ``PRAGMA foreign_keys=ON`` - SQLite does not enforce foreign keys unless asked.
* a busy timeout (sqlite3 ``timeout``), so two writers wait for each other instead of failing at once.

Any other SQLAlchemy URL is used as given; all SQL outside the SQLite connect hook is
built from the Core tables with bound parameters, so it is portable.
"""

from __future__ import annotations

import logging
import os
import socket
import time
from collections.abc import Callable, Mapping
from datetime import datetime
from types import TracebackType
from typing import Any

import pandas as pd
from sqlalchemy import create_engine, event, inspect, select
from sqlalchemy.engine import URL, Connection, Engine
from sqlalchemy.exc import SQLAlchemyError
from sqlalchemy.pool import StaticPool

import benchctl
from benchctl.errors import SchemaVersionError, StoreError

from . import queries
from . import schema as s
from .recovery import recover_interrupted
from .records import ArrayData, RunInfo, RunStart
from .url import is_sqlite, is_sqlite_memory, mask_url, normalize_url, scrub
from .writer import WRITE_OPTION, WRITE_OPTIONS, Writer

log = logging.getLogger(__name__)


class Store:
    """A benchctl measurement database. Create with :meth:`Store.open`; use as a context manager."""

    def __init__(self, engine: Engine, url: URL, clock: Callable[[], float]) -> None:
        """Internal; use :meth:`Store.open`."""
        self._engine: Engine | None = engine
        self._url = url  # kept for scrubbing driver messages; never shown as such
        self._url_masked = mask_url(url)
        self._clock = clock
        self._writer = Writer(engine, clock, self._url_masked)
        self.recovered_runs: tuple[int, ...] = ()
        """Ids of runs this open marked ``interrupted``."""

    # ------------------------------------------------------------ open / close
    @classmethod
    def open(
        cls,
        url_or_path: str | os.PathLike[str],
        *,
        stale_after_s: float | None = None,
        busy_timeout_s: float = 10.0,
        clock: Callable[[], float] = time.time,
        recover: bool = True,
    ) -> Store:
        """Open (and, if empty, create) a store.

        ``url_or_path``: a file path (SQLite) or any SQLAlchemy URL. Checks the schema
        version (:class:`~benchctl.errors.SchemaVersionError` on mismatch), then marks
        runs whose process is gone as interrupted (see :mod:`benchctl.store.recovery`;
        ``stale_after_s`` extends that to runs of other hosts silent that long).
        ``clock`` returns UTC seconds since the epoch for every stored time.
        """
        url = normalize_url(url_or_path)
        where = mask_url(url)
        engine = _make_engine(url, busy_timeout_s)
        store = cls(engine, url, clock)
        try:
            store._prepare(recover=recover, stale_after_s=stale_after_s)
        except BaseException:
            store.close()
            raise
        log.info("store opened: %s", where)
        return store

    def _prepare(self, *, recover: bool, stale_after_s: float | None) -> None:
        engine = self._require_open()
        for attempt in (1, 2):  # two processes may create a new store at the same moment
            try:
                with engine.connect().execution_options(**WRITE_OPTIONS) as conn, conn.begin():
                    self._check_or_create_schema(conn)
                    if recover:
                        self.recovered_runs = tuple(
                            recover_interrupted(
                                conn,
                                host=socket.gethostname(),
                                now_utc_s=self._clock(),
                                stale_after_s=stale_after_s,
                            )
                        )
                return
            except SQLAlchemyError as exc:
                if attempt == 1 and "already exists" in str(exc):
                    continue
                raise StoreError(
                    f"cannot open store {self._url_masked}: {scrub(str(getattr(exc, 'orig', None) or exc), self._url)}; "
                    "check that the path or URL names a benchctl database you may read and write"
                ) from exc

    def _check_or_create_schema(self, conn: Connection) -> None:
        names = set(inspect(conn).get_table_names())
        if not names:
            s.create_schema(conn, created_utc_s=self._clock(), created_by=f"benchctl {benchctl.__version__}")
            log.info("store %s: created schema version %d", self._url_masked, s.SCHEMA_VERSION)
            return
        if s.meta.name not in names:
            raise StoreError(
                f"{self._url_masked} is a database but not a benchctl store (it has tables "
                f"{', '.join(sorted(names)[:5])}{' ...' if len(names) > 5 else ''} and no 'meta' table); "
                "give the path of a benchctl store or of a new file"
            )
        version = conn.execute(select(s.meta.c.schema_version).where(s.meta.c.id == 1)).scalar()
        if version is None:
            raise StoreError(
                f"store {self._url_masked} has an empty 'meta' table, so its schema version is unknown; "
                "it was not written completely by benchctl - restore it from a copy"
            )
        if int(version) != s.SCHEMA_VERSION:
            newer = int(version) > s.SCHEMA_VERSION
            raise SchemaVersionError(
                f"store {self._url_masked} has schema version {int(version)}, but benchctl "
                f"{benchctl.__version__} needs schema version {s.SCHEMA_VERSION}; "
                + (
                    "open it with the newer benchctl that wrote it, or upgrade benchctl"
                    if newer
                    else "migrate it to the current schema, or open it with the older benchctl that wrote it"
                )
            )
        missing = set(s.TABLE_NAMES) - names
        if missing:
            raise StoreError(
                f"store {self._url_masked} (schema version {version}) lacks tables {', '.join(sorted(missing))}; "
                "it is damaged - restore it from a copy"
            )

    def close(self) -> None:
        """Close the store; safe to call more than once."""
        if self._engine is None:
            return
        engine, self._engine = self._engine, None
        try:
            self._writer.close()
        finally:
            engine.dispose()
        log.info("store closed: %s", self._url_masked)

    def __enter__(self) -> Store:
        return self

    def __exit__(
        self, exc_type: type[BaseException] | None, exc: BaseException | None, tb: TracebackType | None
    ) -> None:
        self.close()

    @property
    def url(self) -> str:
        """The store's URL with any password masked (safe to print and log)."""
        return self._url_masked

    @property
    def closed(self) -> bool:
        return self._engine is None

    def _require_open(self) -> Engine:
        if self._engine is None:
            raise StoreError(f"store {self._url_masked} is closed; open it again with Store.open()")
        return self._engine

    def _read(self, fn: Callable[..., Any], *args: Any, **kwargs: Any) -> Any:
        engine = self._require_open()
        try:
            with engine.connect() as conn:
                return fn(conn, *args, **kwargs)
        except SQLAlchemyError as exc:
            raise StoreError(
                f"reading store {self._url_masked} failed: {scrub(str(getattr(exc, 'orig', None) or exc), self._url)}"
            ) from exc

    # ------------------------------------------------------------ writing
    def begin_run(self, start: RunStart) -> int:
        """Store a new run (status ``running``) with its provenance; returns the run id."""
        self._require_open()
        return self._writer.begin_run(start)

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
    ) -> int:
        """Store one measured point; it is committed when this returns. Returns its seq (1, 2, ...).

        ``values`` maps quantity names to numbers (NaN/None stored as missing).
        ``units`` gives each quantity's unit the first time it appears; a name's
        suffix supplies it when omitted (``vin_v`` -> ``V``, see
        :func:`benchctl.store.writer.unit_from_name`). ``t_utc_s`` defaults to now.
        """
        self._require_open()
        return self._writer.record_point(
            run_id, values, units=units, tag=tag, settled=settled, settle_time_s=settle_time_s, t_utc_s=t_utc_s
        )

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
        """Store an event (``interlock_trip``, ``error``, ``warning``, ``gap``, ``info`` ...); returns its id."""
        self._require_open()
        return self._writer.record_event(run_id, kind, message, details, point_seq=point_seq, t_utc_s=t_utc_s)

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
        """Store a derived result; ``None`` when it could not be found (say why in ``details``)."""
        self._require_open()
        return self._writer.record_result(run_id, name, value, unit=unit, details=details, scope=scope)

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
        """Store named numeric columns (Bode sweep, waveform) bit-exact; returns the array id."""
        self._require_open()
        return self._writer.record_array(run_id, name, columns, units=units, point_seq=point_seq, meta=meta)

    def end_run(self, run_id: int, status: str, message: str = "") -> None:
        """End a running run with ``completed``, ``failed``, ``tripped`` or ``interrupted``."""
        self._require_open()
        self._writer.end_run(run_id, status, message)

    # ------------------------------------------------------------ reading
    def resolve_run(self, ref: int | str) -> int:
        """Run id from an id (int or text) or ``"latest"``."""
        return int(self._read(queries.resolve_run, ref))

    def last_point(self, run_id: int) -> int | None:
        """Seq of the run's last committed point, ``None`` if it has none."""
        return self._read(queries.last_point, run_id)

    def run(self, run_id: int) -> RunInfo:
        """All provenance of a run."""
        return self._read(queries.run_info, run_id)

    def runs(
        self,
        status: str | None = None,
        station: str | None = None,
        procedure: str | None = None,
        dut_part: str | None = None,
        since: datetime | float | None = None,
        limit: int | None = None,
    ) -> pd.DataFrame:
        """Runs matching the filters, newest first (see :func:`benchctl.store.queries.list_runs`)."""
        return self._read(
            queries.list_runs,
            status=status, station=station, procedure=procedure, dut_part=dut_part, since=since, limit=limit,
        )

    def points(self, run_id: int, wide: bool = True) -> pd.DataFrame:
        """Points of a run: one row per point with one column per quantity (``wide=False``:
        same as :meth:`points_long`)."""
        if not wide:
            return self.points_long(run_id)
        return self._read(queries.points_wide, run_id)

    def points_long(self, run_id: int) -> pd.DataFrame:
        """Points of a run in long form: one row per (point, quantity)."""
        return self._read(queries.points_long, run_id)

    def quantity_units(self, run_id: int) -> dict[str, str]:
        """Unit of each quantity of a run."""
        return self._read(queries.quantity_units, run_id)

    def events(self, run_id: int) -> pd.DataFrame:
        """Events of a run in time order."""
        return self._read(queries.events_frame, run_id)

    def results(self, run_id: int) -> pd.DataFrame:
        """Derived results of a run."""
        return self._read(queries.results_frame, run_id)

    def arrays(self, run_id: int) -> pd.DataFrame:
        """Listing of a run's arrays (names, units, dtypes, shapes, meta; no data)."""
        return self._read(queries.arrays_frame, run_id)

    def array(self, run_id: int, name: str, point_seq: int | None = None) -> ArrayData:
        """One array: a mapping column -> numpy array, with ``.units`` and ``.meta``."""
        return self._read(queries.array_data, run_id, name, point_seq)


def _make_engine(url: URL, busy_timeout_s: float) -> Engine:
    where = mask_url(url)
    try:
        if not is_sqlite(url):
            return create_engine(url, pool_pre_ping=True)
        # sqlite3's ``timeout`` is SQLite's busy timeout: a writer waits that long for a lock.
        kwargs: dict[str, Any] = {
            "connect_args": {"check_same_thread": False, "timeout": float(busy_timeout_s)}
        }
        memory = is_sqlite_memory(url)
        if memory:
            kwargs["poolclass"] = StaticPool  # one shared connection, else each sees its own empty DB
        engine = create_engine(url, **kwargs)
    except (SQLAlchemyError, ImportError) as exc:
        raise StoreError(
            f"cannot use store URL {where}: {exc}; check the dialect name and that its driver is installed"
        ) from exc

    @event.listens_for(engine, "connect")
    def _sqlite_connect(dbapi_conn: Any, _record: Any) -> None:  # SQLite branch only
        # sqlite3 would open transactions itself, and only before DML, so two SELECTs of one
        # query would see different snapshots; let SQLAlchemy's "begin" below do it instead
        # (SQLAlchemy docs, "SQLite - Serializable isolation / Savepoints / Transactional DDL").
        dbapi_conn.isolation_level = None
        cur = dbapi_conn.cursor()
        try:
            cur.execute("PRAGMA foreign_keys=ON")
            if not memory:
                mode = cur.execute("PRAGMA journal_mode=WAL").fetchone()[0]
                if str(mode).lower() != "wal":
                    log.warning("store %s: SQLite refused WAL mode (journal_mode=%s)", where, mode)
            cur.execute("PRAGMA synchronous=FULL")
        finally:
            cur.close()

    @event.listens_for(engine, "begin")
    def _sqlite_begin(conn: Connection) -> None:  # SQLite branch only
        # Writers take the write lock up front (BEGIN IMMEDIATE): a deferred transaction that
        # reads, then writes after another connection committed, fails at once with
        # SQLITE_BUSY instead of waiting (SQLite docs, "BEGIN TRANSACTION", "Write-Ahead Logging" §2.2).
        # Readers use a deferred BEGIN: one consistent snapshot for all statements of a query.
        immediate = conn.get_execution_options().get(WRITE_OPTION, False)
        conn.exec_driver_sql("BEGIN IMMEDIATE" if immediate else "BEGIN")

    return engine
