"""One run at a time on a station: a lock the whole lab sees, taken before any instrument is opened.

A second run on a station that is running would reset every instrument and program its own
setpoints under the first run's feet. So a run (or a job, for all its steps) holds its
station, and a second one is refused - naming who holds it, since when, and what to do -
before it opens, resets or switches anything.

Two locks, taken in this order and released in the reverse one:

* **A lock file beside the station file** (``bench-3.toml`` -> ``bench-3.toml.lock``), held
  with ``flock(2)`` (``LOCK_EX | LOCK_NB``: never waits) for the run's life. It holds a JSON
  record: station, host, pid, run id, what holds it, since when. The kernel releases a
  ``flock`` when its process ends in any way (SIGKILL and crashes included), so a lock file
  left behind by a dead process is not held: it is recognised as stale (its record names a
  process that is gone) and taken over, and the takeover is logged. A station given as text
  without a file is locked beside its SQLite database instead
  (``runs.db.station-<name>.lock``); where neither can be written the lock file goes to the
  system's temporary folder, named from the station file's path. On network file systems
  ``flock`` works as far as the file system supports it (Linux NFS maps it to byte-range
  locks).
* **An advisory lock in a shared database** (PostgreSQL, :mod:`benchctl.store.station_locks`)
  when the run's store is one: stations on other hosts see it.

A database lock lives as long as its session, and a dropped connection frees it without a
word. While a run goes on, :meth:`StationHold.watch_database_lock` asks the database every
:data:`DATABASE_LOCK_CHECK_PERIOD_S` whether the lock is still held; a lost one is taken again
at once (and the run stores that it was), and when another session has it by then the run is
stopped through its interlock: the outputs go off and it ends ``failed``.

Within one process a thread that holds a station may take it again (a job holds it for all
its steps, and each step's run takes it once more); another thread is refused like another
process.
"""

from __future__ import annotations

import functools
import json
import logging
import os
import re
import socket
import tempfile
import threading
import time
from dataclasses import dataclass, field
from datetime import datetime, timezone
from pathlib import Path
from typing import Any, Callable

from benchctl.errors import StationBusyError, StationLockLost

logger = logging.getLogger(__name__)

LOCK_SUFFIX = ".lock"
#: How often a run checks that its station's database lock is still held (s), and how long
#: one check (or one attempt to take the lock again) may take before it counts as failed.
DATABASE_LOCK_CHECK_PERIOD_S = 5.0
DATABASE_LOCK_CHECK_TIMEOUT_S = 10.0


@dataclass(frozen=True)
class LockHolder:
    """Who holds a station: what the lock record (or the database) says of it.

    ``process_alive`` is known only for a holder on this host (``None`` elsewhere).
    """

    station: str
    where: str
    host: str = ""
    pid: int | None = None
    run_id: int | None = None
    what: str = ""
    since_utc_s: float | None = None
    process_alive: bool | None = None
    detail: str = ""

    def describe(self) -> str:
        who = []
        if self.run_id is not None:
            who.append(f"run {self.run_id}")
        if self.what:
            who.append(f"({self.what})")
        proc = []
        if self.pid is not None:
            proc.append(f"pid {self.pid}")
        if self.host:
            proc.append(f"on host {self.host}")
        text = " ".join(who) or "another benchctl process"
        if proc:
            text += " by " + " ".join(proc)
        if self.since_utc_s is not None:
            text += " since " + datetime.fromtimestamp(self.since_utc_s, tz=timezone.utc).strftime("%Y-%m-%d %H:%M:%S UTC")
        text += f" ({self.where}"
        if self.detail:
            text += f"; {self.detail}"
        return text + ")"


def _refusal(holder: LockHolder) -> StationBusyError:
    advice = "Wait for it to end, or stop it where it runs (Ctrl-C in its terminal"
    if holder.pid is not None:
        advice += f", or `kill -TERM {holder.pid}`" + (f" on {holder.host}" if holder.host else "")
    advice += ")"
    if holder.process_alive is False:
        advice = (f"Its record names pid {holder.pid}, which has ended, yet the lock is still held - by a process "
                  "that inherited it (one started by that run); end that process, then try again")
    return StationBusyError(
        f"station {holder.station!r} is in use: {holder.describe()}. A second run would reset its instruments and "
        f"change its setpoints, so nothing was opened or switched. {advice}.", holder=holder)


def _pid_alive(pid: int) -> bool:
    from benchctl.store.recovery import pid_alive

    return pid_alive(pid)


# ----------------------------------------------------------------------------- lock file
def lock_file_for(station: Any, store: Any = None) -> Path | None:
    """Where the lock file of ``station`` is: beside its file, else beside a SQLite store's file."""
    path = getattr(station, "path", None)
    if path is not None:
        path = Path(path).expanduser().absolute()
        return path.with_name(path.name + LOCK_SUFFIX)
    db = getattr(store, "sqlite_path", None) if store is not None else None
    if db:
        safe = re.sub(r"[^A-Za-z0-9._-]+", "_", str(station.name))[:80]
        db_path = Path(db)
        return db_path.with_name(f"{db_path.name}.station-{safe}{LOCK_SUFFIX}")
    return None


def _fallback_lock_file(path: Path) -> Path:
    import hashlib

    digest = hashlib.sha256(str(path).encode()).hexdigest()[:16]
    return Path(tempfile.gettempdir()) / f"benchctl-station-{digest}{LOCK_SUFFIX}"


def _read_record(fd: int) -> dict[str, Any] | None:
    try:
        os.lseek(fd, 0, os.SEEK_SET)
        data = b""
        while chunk := os.read(fd, 65536):
            data += chunk
    except OSError:
        return None
    if not data.strip():
        return None
    try:
        record = json.loads(data.decode("utf-8"))
    except (UnicodeDecodeError, ValueError):
        return {"unreadable": data[:200].decode("utf-8", errors="replace")}
    return record if isinstance(record, dict) else None


def _write_record(fd: int, record: dict[str, Any]) -> None:
    data = (json.dumps(record, indent=1) + "\n").encode("utf-8")
    os.lseek(fd, 0, os.SEEK_SET)
    os.ftruncate(fd, 0)
    os.write(fd, data)
    os.fsync(fd)


def _holder_of_record(station: str, where: str, record: dict[str, Any] | None) -> LockHolder:
    record = record or {}
    host = str(record.get("host") or "")
    pid = record.get("pid")
    pid = int(pid) if isinstance(pid, int) else None
    alive = _pid_alive(pid) if pid is not None and host == socket.gethostname() else None
    since = record.get("since_utc_s")
    run_id = record.get("run_id")
    return LockHolder(
        station=station, where=where, host=host, pid=pid,
        run_id=int(run_id) if isinstance(run_id, int) else None, what=str(record.get("what") or ""),
        since_utc_s=float(since) if isinstance(since, (int, float)) else None, process_alive=alive,
        detail="its record cannot be read" if "unreadable" in record else "",
    )


class _LockFile:
    """A held ``flock`` on a lock file; :meth:`release` removes the file and frees it."""

    def __init__(self, path: Path, fd: int, record: dict[str, Any]) -> None:
        self.path = path
        self._fd: int | None = fd
        self.record = record

    def update(self, **changes: Any) -> None:
        if self._fd is None:
            return
        self.record.update(changes)
        try:
            _write_record(self._fd, self.record)
        except OSError:
            logger.warning("could not update the station lock file %s", self.path, exc_info=True)

    def release(self) -> None:
        import fcntl

        fd, self._fd = self._fd, None
        if fd is None:
            return
        try:
            # Unlink while still holding it: a process that opened the old file and locks it
            # after we close sees that the path no longer names that file, and starts over.
            try:
                if os.stat(self.path).st_ino == os.fstat(fd).st_ino:
                    os.unlink(self.path)
            except OSError:
                pass
            fcntl.flock(fd, fcntl.LOCK_UN)
        finally:
            os.close(fd)


def _try_lock_file(path: Path, station: str, record: dict[str, Any]) -> _LockFile | LockHolder | None:
    """The held lock file, its holder when another process has it, or None when this file
    system cannot lock (then a warning is logged and the run goes on without this lock)."""
    try:
        import fcntl
    except ImportError:  # not POSIX
        logger.warning("no flock() on this system: station %r is not locked by a file", station)
        return None
    fallback = _fallback_lock_file(path)
    for _attempt in range(5):
        try:
            fd = os.open(path, os.O_RDWR | os.O_CREAT, 0o664)
        except OSError as exc:
            if path == fallback:
                from benchctl.errors import ConfigurationError

                raise ConfigurationError(
                    f"station {station!r}: cannot create its lock file here or in {fallback.parent} ({exc}); "
                    "make the station file's folder writable") from exc
            logger.info("cannot create the lock file %s; using %s", path, fallback)
            path = fallback
            continue
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BlockingIOError:
            holder = _holder_of_record(station, f"lock file {path}", _read_record(fd))
            os.close(fd)
            return holder
        except OSError as exc:
            os.close(fd)
            logger.warning("the file system of %s cannot lock files (%s): station %r is not locked by a file",
                           path, exc, station)
            return None
        try:
            same = os.stat(path).st_ino == os.fstat(fd).st_ino
        except FileNotFoundError:
            same = False
        if not same:  # released and removed between our open and our lock: start over
            os.close(fd)
            continue
        previous = _read_record(fd)
        if previous:
            stale = _holder_of_record(station, f"lock file {path}", previous)
            logger.warning("station %r: taking over a stale lock left by %s: its process ended without "
                           "releasing it", station, stale.describe())
        _write_record(fd, record)
        return _LockFile(path, fd, record)
    raise StationBusyError(f"station {station!r}: its lock file {path} kept changing while it was taken; "
                           "another run is starting on it - try again in a moment")


# ----------------------------------------------------------------------------- holding
@dataclass
class _Held:
    thread: int
    count: int
    hold: "StationHold"


_REGISTRY: dict[tuple[str, ...], _Held] = {}
_REGISTRY_LOCK = threading.Lock()


@dataclass
class StationHold:
    """The locks of one station held by this process. Use as a context manager, or call
    :meth:`release`; :meth:`note_run` writes the run id into the locks' records."""

    station: str
    what: str
    lock_file: _LockFile | None = None
    database_lock: Any = None
    stale: LockHolder | None = None
    keys: tuple[tuple[str, ...], ...] = ()
    #: What the database-lock check found and mended (a lock lost and taken again), for the run's events.
    lock_notes: list[str] = field(default_factory=list)
    #: Why the database lock is gone for good (None while held).
    lost: str | None = None
    _released: bool = field(default=False, repr=False)
    _on_lost: Callable[[str], None] | None = field(default=None, repr=False)
    _monitor_stop: threading.Event | None = field(default=None, repr=False)

    def watch_database_lock(self, on_lost: Callable[[str], None]) -> None:
        """While a run goes on: check the database lock now and then every
        :data:`DATABASE_LOCK_CHECK_PERIOD_S`; one lost is taken again (noted in :attr:`lock_notes`),
        and when that fails ``on_lost(message)`` is called once, from the checking thread.
        Raises :class:`~benchctl.errors.StationLockLost` at once if the lock is gone already."""
        if self.database_lock is None:
            return
        self._check_database_lock()
        if self.lost is not None:
            raise StationLockLost(self.lost)
        self._on_lost = on_lost
        stop = self._monitor_stop = threading.Event()
        threading.Thread(target=self._monitor, args=(stop,), name="benchctl-station-lock", daemon=True).start()

    def unwatch_database_lock(self) -> None:
        """The run has ended: stop checking (a job's next run checks again when it begins)."""
        self._on_lost = None
        if self._monitor_stop is not None:
            self._monitor_stop.set()
            self._monitor_stop = None

    def _monitor(self, stop: threading.Event) -> None:
        while not stop.wait(DATABASE_LOCK_CHECK_PERIOD_S):
            self._check_database_lock()
            if self.lost is not None:
                on_lost = self._on_lost
                if on_lost is not None and not stop.is_set():
                    on_lost(self.lost)
                return

    def _check_database_lock(self) -> None:
        lock = self.database_lock
        if lock is None or self.lost is not None:
            return
        if _within(lock.still_held, DATABASE_LOCK_CHECK_TIMEOUT_S):
            return
        where = getattr(lock, "where", "the database")
        when = datetime.now(timezone.utc).strftime("%Y-%m-%d %H:%M:%S UTC")
        if _within(lock.retake, DATABASE_LOCK_CHECK_TIMEOUT_S):
            note = (f"the lock of station {self.station!r} in {where} was lost (its database session ended) and "
                    f"taken again at {when}; between two checks ({DATABASE_LOCK_CHECK_PERIOD_S:g} s apart) another "
                    "host could have taken the station, so check the lab's log if the data look odd")
            logger.warning("%s", note)
            self.lock_notes.append(note)
            return
        self.lost = (f"the lock of station {self.station!r} in {where} was lost at {when} (its database session "
                     "ended) and could not be taken again: another run may hold the station now, or the database "
                     "cannot be reached. The outputs were switched off. Find out who uses the station "
                     f"(benchctl runs --station {self.station} --status running), then start the run again")
        logger.error("%s", self.lost)

    def note_run(self, run_id: int) -> None:
        if self.lock_file is not None:
            self.lock_file.update(run_id=int(run_id))
        if self.database_lock is not None:
            self.database_lock.label(f"benchctl {os.getpid()}@{socket.gethostname()} run {run_id}")

    def release(self) -> None:
        if self._released:
            return
        self._released = True
        self.unwatch_database_lock()
        with _REGISTRY_LOCK:
            for key in self.keys:
                _REGISTRY.pop(key, None)
        try:
            if self.database_lock is not None:
                self.database_lock.release()
        finally:
            if self.lock_file is not None:
                self.lock_file.release()

    def __enter__(self) -> "StationHold":
        return self

    def __exit__(self, *exc: Any) -> None:
        self.release()


def _within(check: Callable[[], bool], timeout_s: float) -> bool:
    """``check()`` in a thread of its own; False when it raises or has not answered by ``timeout_s``
    (a database behind a cut network can leave a query waiting for minutes)."""
    result: list[bool] = []

    def run() -> None:
        try:
            result.append(bool(check()))
        except Exception:
            logger.warning("station lock check failed", exc_info=True)
            result.append(False)

    thread = threading.Thread(target=run, name="benchctl-station-lock-check", daemon=True)
    thread.start()
    thread.join(timeout_s)
    return bool(result and result[0])


def held_by_this_thread(station: Any, store: Any = None) -> "StationHold | None":
    """The hold this thread has on ``station`` (in ``store``), or None."""
    keys = _registry_keys(station, store, lock_file_for(station, store))
    me = threading.get_ident()
    with _REGISTRY_LOCK:
        for key in keys:
            held = _REGISTRY.get(key)
            if held is not None and held.thread == me:
                return held.hold
    return None


class _Reentry:
    """A station this thread already holds, taken again: releasing it only counts down."""

    def __init__(self, held: _Held, keys: tuple[tuple[str, ...], ...]) -> None:
        self._held = held
        self._keys = keys
        self._released = False

    def note_run(self, run_id: int) -> None:
        self._held.hold.note_run(run_id)

    def release(self) -> None:
        if self._released:
            return
        self._released = True
        with _REGISTRY_LOCK:
            self._held.count -= 1

    def __enter__(self) -> "_Reentry":
        return self

    def __exit__(self, *exc: Any) -> None:
        self.release()


def _registry_keys(station: Any, store: Any, lock_path: Path | None) -> tuple[tuple[str, ...], ...]:
    keys: list[tuple[str, ...]] = []
    if lock_path is not None:
        keys.append(("file", os.path.realpath(lock_path)))
    if store is not None and getattr(store, "url", None):
        keys.append(("db", str(store.url), str(station.name)))
    return tuple(keys)


def hold_station(station: Any, store: Any = None, *, what: str = "",
                 clock: Callable[[], float] = time.time) -> StationHold | _Reentry:
    """Take ``station`` for one run or job, or raise :class:`~benchctl.errors.StationBusyError`.

    ``store`` is the run's store (its database lock, and where a station without a file is
    locked); ``what`` says what holds it (``"run of efficiency_map"``, ``"job nightly"``).
    """
    name = str(station.name)
    lock_path = lock_file_for(station, store)
    keys = _registry_keys(station, store, lock_path)
    me = threading.get_ident()
    with _REGISTRY_LOCK:
        for key in keys:
            held = _REGISTRY.get(key)
            if held is None:
                continue
            if held.thread == me:
                held.count += 1
                return _Reentry(held, keys)
            record = held.hold.lock_file.record if held.hold.lock_file is not None else {
                "host": socket.gethostname(), "pid": os.getpid(), "what": held.hold.what}
            raise _refusal(_holder_of_record(name, "held by another thread of this process", record))
    record = {"station": name, "host": socket.gethostname(), "pid": os.getpid(), "run_id": None,
              "what": what, "since_utc_s": clock(),
              "station_file": None if getattr(station, "path", None) is None else str(station.path)}
    hold = StationHold(station=name, what=what, keys=keys)
    try:
        if lock_path is not None:
            got = _try_lock_file(lock_path, name, record)
            if isinstance(got, LockHolder):
                raise _refusal(got)
            hold.lock_file = got
        if store is not None and callable(getattr(store, "lock_station", None)):
            got = store.lock_station(name, f"benchctl {os.getpid()}@{socket.gethostname()} {what}")
            if got is not None and not callable(getattr(got, "release", None)):
                raise _refusal(_database_holder(name, store, got))
            hold.database_lock = got
    except BaseException:
        hold.release()
        raise
    with _REGISTRY_LOCK:
        for key in keys:
            _REGISTRY[key] = _Held(me, 1, hold)
    logger.info("station %r held by pid %d for %s", name, os.getpid(), what or "a run")
    return hold


def _database_holder(name: str, store: Any, holder: Any) -> LockHolder:
    """A :class:`LockHolder` from what the database says (:class:`DatabaseLockHolder`)."""
    label = str(getattr(holder, "label", "") or "")
    m = re.match(r"benchctl (\d+)@(\S+)(?: run (\d+))?", label)
    host = m.group(2) if m else (holder.run_host or "")
    pid = int(m.group(1)) if m else holder.run_pid
    run_id = int(m.group(3)) if m and m.group(3) else holder.run_id
    since = holder.run_started_utc_s if holder.run_started_utc_s is not None else holder.session_start_utc_s
    detail = []
    if holder.session_pid is not None:
        detail.append(f"database session {holder.session_pid}" + (f" from {holder.client_addr}" if holder.client_addr else ""))
    alive = _pid_alive(pid) if pid is not None and host == socket.gethostname() else None
    return LockHolder(station=name, where=f"advisory lock in {store.url}", host=host, pid=pid, run_id=run_id,
                      what=label, since_utc_s=since, process_alive=alive, detail="; ".join(detail))


def one_run_per_station(execute: Callable[..., Any]) -> Callable[..., Any]:
    """Decorate ``execute(procedure, params, station, store, ...)``: the station is held from
    before its first instrument is opened until the run has ended (and its id is written into
    the lock's record as soon as the run begins)."""

    @functools.wraps(execute)
    def run_holding_station(procedure: Any, params: Any, station: Any, store: Any, *args: Any, **kwargs: Any) -> Any:
        with hold_station(station, store, what=f"run of {getattr(procedure, 'name', procedure)}") as hold:
            on_begin = kwargs.get("on_begin")

            def begun(run_id: int) -> None:
                hold.note_run(run_id)
                if on_begin is not None:
                    on_begin(run_id)

            kwargs["on_begin"] = begun
            return execute(procedure, params, station, store, *args, **kwargs)

    return run_holding_station
