"""A station's lock in a shared database: a PostgreSQL session advisory lock.

One run at a time may hold a station. On a database many stations share, the lock is a
session-level advisory lock (PostgreSQL docs, "Advisory Locks" and "Advisory Lock
Functions": ``pg_try_advisory_lock(bigint)`` never waits; the lock is held until
``pg_advisory_unlock`` or the end of the session, so a process that dies - killed, its host
powered off once the server notices the connection is gone - releases it without anyone's
help). It is taken on a connection of its own, kept in autocommit (no transaction stays
open for hours), for the whole run.

The key is 64 bits of SHA-256 (FIPS 180-4) of the database name, the schema the store
lives in and the station name: one station of one store, whichever host runs it. Who holds
it is read from ``pg_locks`` and ``pg_stat_activity`` (the holder's session sets its
``application_name`` to its host, pid and run) and from the station's run still marked
``running``.

Other engines have no lock here (SQLite stations are held by a lock file beside the station
file, :mod:`benchctl.station_lock`).
"""

from __future__ import annotations

import hashlib
import logging
from dataclasses import dataclass
from typing import Any

from sqlalchemy import select, text
from sqlalchemy.engine import Connection, Engine
from sqlalchemy.exc import SQLAlchemyError

from benchctl.errors import StoreError

from . import schema as s
from .engine import is_postgresql
from .records import RUNNING

log = logging.getLogger(__name__)

#: PostgreSQL keeps at most NAMEDATALEN - 1 = 63 bytes of an application_name.
_APPLICATION_NAME_BYTES = 63


@dataclass(frozen=True)
class DatabaseLockHolder:
    """Who holds a station's advisory lock, as far as the database can tell.

    ``session_pid`` is the PostgreSQL backend's pid (not the station's process);
    ``label`` the holder's ``application_name`` (``benchctl <pid>@<host> run <id>``);
    ``run_*`` describe the station's newest run still marked running (None if none).
    """

    station_name: str
    session_pid: int | None
    label: str
    client_addr: str | None
    session_start_utc_s: float | None
    run_id: int | None
    run_host: str | None
    run_pid: int | None
    run_started_utc_s: float | None


def station_lock_key(conn: Connection, station_name: str) -> int:
    """The advisory-lock key of ``station_name`` in the database and schema of ``conn`` (signed 64 bits)."""
    database, schema = conn.execute(text("SELECT current_database(), current_schema()")).one()
    digest = hashlib.sha256(f"benchctl station lock\0{database}\0{schema}\0{station_name}".encode()).digest()
    return int.from_bytes(digest[:8], "big", signed=True)


def _label(text_: str) -> str:
    data = text_.encode("utf-8")[:_APPLICATION_NAME_BYTES]
    return data.decode("utf-8", errors="ignore")


class AdvisoryStationLock:
    """A held advisory lock of one station; :meth:`release` frees it (safe twice).

    The lock lives as long as its session: a dropped connection (a server restart, a network
    cut, an administrator's ``pg_terminate_backend``) frees it silently, and another process
    may then take the station. :meth:`still_held` asks ``pg_locks`` whether this session still
    has it; :meth:`retake` tries to take it again on a new connection.
    """

    def __init__(self, conn: Connection, key: int, station_name: str, where: str,
                 engine: Engine | None = None) -> None:
        self._conn: Connection | None = conn
        self._engine = engine
        self._label = ""
        self.key = key
        self.station_name = station_name
        self.where = where

    def still_held(self) -> bool:
        """Whether this session still holds the lock (False also when the session is gone)."""
        conn = self._conn
        if conn is None:
            return False
        try:
            return bool(conn.execute(text(
                "SELECT count(*) FROM pg_locks WHERE locktype = 'advisory' AND granted AND objsubid = 1 "
                "AND classid = :hi AND objid = :lo AND pid = pg_backend_pid()"), _key_parts(self.key)).scalar())
        except SQLAlchemyError:
            log.warning("the station lock's session of %s in %s is gone", self.station_name, self.where, exc_info=True)
            return False

    def retake(self) -> bool:
        """Take the lock again on a new connection (the old one is discarded): True when taken,
        False when another session holds it now or the database cannot be reached."""
        old, self._conn = self._conn, None
        if old is not None:
            try:
                old.invalidate()
                old.close()
            except SQLAlchemyError:
                pass
        if self._engine is None:
            return False
        try:
            conn = self._engine.connect().execution_options(isolation_level="AUTOCOMMIT")
        except SQLAlchemyError:
            log.warning("cannot reach %s to take the lock of station %s again", self.where, self.station_name,
                        exc_info=True)
            return False
        try:
            conn.execute(text("SELECT set_config('application_name', :v, false)"), {"v": _label(self._label)})
            if conn.execute(text("SELECT pg_try_advisory_lock(:key)"), {"key": self.key}).scalar():
                self._conn = conn
                return True
        except SQLAlchemyError:
            log.warning("taking the lock of station %s in %s again failed", self.station_name, self.where,
                        exc_info=True)
        conn.close()
        return False

    def label(self, label: str) -> None:
        """Say who holds it (host, pid, run) where other sessions can read it."""
        self._label = label
        if self._conn is None:
            return
        try:
            self._conn.execute(text("SELECT set_config('application_name', :v, false)"), {"v": _label(label)})
        except SQLAlchemyError:
            log.warning("could not label the station lock of %s in %s", self.station_name, self.where, exc_info=True)

    def release(self) -> None:
        conn, self._conn = self._conn, None
        if conn is None:
            return
        try:
            conn.execute(text("SELECT pg_advisory_unlock(:key)"), {"key": self.key})
        except SQLAlchemyError:  # a broken session holds nothing any more; never reuse it
            log.warning("unlocking station %s in %s failed; discarding the session", self.station_name, self.where,
                        exc_info=True)
            conn.invalidate()
        finally:
            conn.close()


def try_lock_station(engine: Engine, station_name: str, label: str, where: str) -> AdvisoryStationLock | DatabaseLockHolder | None:
    """Take ``station_name``'s advisory lock: the held lock, the holder when another session has
    it, or ``None`` when the engine is not PostgreSQL (nothing to take)."""
    if not is_postgresql(engine):
        return None
    try:
        conn = engine.connect().execution_options(isolation_level="AUTOCOMMIT")
    except SQLAlchemyError as exc:
        raise StoreError(f"cannot take the lock of station {station_name!r} in {where}: {exc}") from exc
    try:
        key = station_lock_key(conn, station_name)
        conn.execute(text("SELECT set_config('application_name', :v, false)"), {"v": _label(label)})
        if conn.execute(text("SELECT pg_try_advisory_lock(:key)"), {"key": key}).scalar():
            held = AdvisoryStationLock(conn, key, station_name, where, engine)
            held._label = label
            return held
        holder = lock_holder(conn, key, station_name)
    except SQLAlchemyError as exc:
        conn.close()
        raise StoreError(f"cannot take the lock of station {station_name!r} in {where}: {exc}") from exc
    conn.close()
    return holder


def station_lock_holder(engine: Engine, station_name: str) -> DatabaseLockHolder | None:
    """Who holds ``station_name``'s advisory lock now (``None``: nobody, or not PostgreSQL)."""
    if not is_postgresql(engine):
        return None
    with engine.connect().execution_options(isolation_level="AUTOCOMMIT") as conn:
        key = station_lock_key(conn, station_name)
        held = conn.execute(text(
            "SELECT count(*) FROM pg_locks WHERE locktype = 'advisory' AND granted AND objsubid = 1 "
            "AND classid = :hi AND objid = :lo AND database = (SELECT oid FROM pg_database "
            "WHERE datname = current_database())"), _key_parts(key)).scalar()
        return lock_holder(conn, key, station_name) if held else None


def _key_parts(key: int) -> dict[str, int]:
    # A bigint key shows in pg_locks as classid = high 32 bits, objid = low 32 bits, objsubid = 1
    # (PostgreSQL docs, "pg_locks": advisory locks).
    unsigned = key & 0xFFFF_FFFF_FFFF_FFFF
    return {"hi": unsigned >> 32, "lo": unsigned & 0xFFFF_FFFF}


def lock_holder(conn: Connection, key: int, station_name: str) -> DatabaseLockHolder:
    """What the database says of the holder of ``key`` (and of the station's running run)."""
    row = conn.execute(text(
        "SELECT l.pid, a.application_name, host(a.client_addr) AS client, "
        "extract(epoch FROM a.backend_start) AS since "
        "FROM pg_locks l LEFT JOIN pg_stat_activity a ON a.pid = l.pid "
        "WHERE l.locktype = 'advisory' AND l.granted AND l.objsubid = 1 AND l.classid = :hi AND l.objid = :lo "
        "AND l.database = (SELECT oid FROM pg_database WHERE datname = current_database()) LIMIT 1"),
        _key_parts(key)).first()
    run = _running_run(conn, station_name)
    return DatabaseLockHolder(
        station_name=station_name,
        session_pid=None if row is None else int(row.pid),
        label="" if row is None else str(row.application_name or ""),
        client_addr=None if row is None else row.client,
        session_start_utc_s=None if row is None or row.since is None else float(row.since),
        run_id=None if run is None else int(run.id),
        run_host=None if run is None else run.host,
        run_pid=None if run is None else int(run.pid),
        run_started_utc_s=None if run is None else float(run.started_utc_s),
    )


def _running_run(conn: Connection, station_name: str) -> Any:
    r, st = s.runs, s.stations
    try:
        return conn.execute(
            select(r.c.id, r.c.host, r.c.pid, r.c.started_utc_s)
            .select_from(r.join(st, r.c.station_id == st.c.id))
            .where(st.c.name == station_name, r.c.status == RUNNING)
            .order_by(r.c.id.desc()).limit(1)
        ).first()
    except SQLAlchemyError:  # no schema yet: no run either
        return None
