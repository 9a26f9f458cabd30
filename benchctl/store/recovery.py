"""Finding runs left ``running`` by a process that is gone, and marking them ``interrupted``.

Rule (applied each time a store is opened):

* A run recorded on **this host** is interrupted when its process no longer exists:
  ``os.kill(pid, 0)`` raises ``ProcessLookupError`` (POSIX.1-2017, kill(): signal 0
  checks existence without sending anything), or the process is a zombie (Linux
  ``/proc/<pid>/stat`` state ``Z``). A process that exists but belongs to another
  user (``PermissionError``) counts as alive. Off POSIX the check is not made.
* A run recorded on **another host** is left alone, unless ``stale_after_s`` is
  given and the run's last sign of life (its start, last point or last event) is
  older than that many seconds.

Known limit: if the operating system has reused the pid for an unrelated process, the
run stays ``running`` until that process ends (or ``stale_after_s`` applies).

Each recovered run gets status ``interrupted``, ``ended_utc_s`` = its last sign of
life, and an event of kind ``interrupted`` with the reason. Points already committed
are untouched.

A run of another host (or of this host under an earlier name, or of a container that is
gone) is marked by hand: :func:`run_liveness` says what is known of it and
:func:`mark_interrupted` marks it (``benchctl mark-interrupted RUN`` states the rule it
applies and asks for a confirmation).
"""

from __future__ import annotations

import logging
import os
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

from sqlalchemy import func, insert, select, update
from sqlalchemy.engine import Connection

from benchctl.errors import StoreError

from . import schema as s
from .codec import to_json
from .records import EVENT_INTERRUPTED, INTERRUPTED, RUNNING

log = logging.getLogger(__name__)


def pid_alive(pid: int) -> bool:
    """True if a process with ``pid`` exists on this host (and is not a zombie)."""
    if pid <= 0:
        return False
    if os.name != "posix":
        return True  # no safe check here (os.kill would terminate on Windows); assume alive
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    except OSError:
        return True
    stat = Path(f"/proc/{pid}/stat")
    try:
        text = stat.read_text()
    except OSError:
        return True  # no /proc (macOS, BSD): kill() said it exists
    # Format: "pid (comm) state ..."; comm may contain spaces and parentheses.
    state = text[text.rfind(")") + 2 : text.rfind(")") + 3]
    return state != "Z"


def last_activity_utc_s(conn: Connection, run_id: int, started_utc_s: float) -> float:
    """Latest of the run's start, its last point and its last event (UTC seconds)."""
    last_point = conn.execute(select(func.max(s.points.c.t_utc_s)).where(s.points.c.run_id == run_id)).scalar()
    last_event = conn.execute(select(func.max(s.events.c.t_utc_s)).where(s.events.c.run_id == run_id)).scalar()
    return max(v for v in (started_utc_s, last_point, last_event) if v is not None)


def recover_interrupted(
    conn: Connection,
    *,
    host: str,
    now_utc_s: float,
    stale_after_s: float | None = None,
    is_alive: Callable[[int], bool] = pid_alive,
) -> list[int]:
    """Mark runs whose process is gone as interrupted (in ``conn``'s transaction); return their ids."""
    recovered: list[int] = []
    running = conn.execute(
        select(s.runs.c.id, s.runs.c.host, s.runs.c.pid, s.runs.c.started_utc_s)
        .where(s.runs.c.status == RUNNING)
        .order_by(s.runs.c.id)
    ).all()
    for run in running:
        last = last_activity_utc_s(conn, run.id, run.started_utc_s)
        if run.host == host:
            if is_alive(run.pid):
                continue
            reason = f"process {run.pid} on host {run.host} is no longer running"
        elif stale_after_s is not None and now_utc_s - last > stale_after_s:
            reason = (
                f"run on host {run.host} (pid {run.pid}) showed no activity for {now_utc_s - last:.0f} s, "
                f"more than stale_after_s = {stale_after_s:g} s"
            )
        else:
            continue
        changed = conn.execute(
            update(s.runs)
            .where(s.runs.c.id == run.id, s.runs.c.status == RUNNING)
            .values(status=INTERRUPTED, ended_utc_s=last, message=f"interrupted: {reason}")
        ).rowcount
        if changed != 1:  # another opener got there first
            continue
        last_seq = conn.execute(select(func.max(s.points.c.seq)).where(s.points.c.run_id == run.id)).scalar()
        conn.execute(
            insert(s.events).values(
                run_id=run.id,
                t_utc_s=now_utc_s,
                kind=EVENT_INTERRUPTED,
                message=f"run marked interrupted when the store was opened: {reason}",
                details_json=to_json(
                    "recovery details",
                    {"pid": run.pid, "host": run.host, "last_point_seq": last_seq, "last_activity_utc_s": last},
                ),
                point_seq=last_seq,
            )
        )
        log.warning("run %d marked interrupted: %s", run.id, reason)
        recovered.append(int(run.id))
    return recovered


# ----------------------------------------------------------------------------- by hand
@dataclass(frozen=True)
class RunLiveness:
    """What the store can tell of whether a run marked ``running`` still runs.

    ``process_alive`` is known only for a run of this host (``None``: another host, or a host
    under another name, so it cannot be checked from here). ``silent_s`` is the time since
    the run's last sign of life (its start, last point or last event).
    """

    run_id: int
    status: str
    station_name: str
    host: str
    pid: int
    last_activity_utc_s: float
    silent_s: float
    this_host: bool
    process_alive: bool | None


def run_liveness(conn: Connection, run_id: int, *, host: str, now_utc_s: float,
                 is_alive: Callable[[int], bool] = pid_alive) -> RunLiveness:
    """Read a run's last sign of life and, on this host, whether its process exists."""
    row = conn.execute(
        select(s.runs.c.id, s.runs.c.status, s.runs.c.host, s.runs.c.pid, s.runs.c.started_utc_s,
               s.stations.c.name.label("station_name"))
        .select_from(s.runs.join(s.stations, s.runs.c.station_id == s.stations.c.id))
        .where(s.runs.c.id == run_id)
    ).first()
    if row is None:
        raise StoreError(f"the store has no run {run_id}; list the runs with `benchctl runs`")
    last = last_activity_utc_s(conn, run_id, row.started_utc_s)
    same = row.host == host
    return RunLiveness(
        run_id=int(row.id), status=str(row.status), station_name=str(row.station_name), host=str(row.host),
        pid=int(row.pid), last_activity_utc_s=float(last), silent_s=max(0.0, now_utc_s - last), this_host=same,
        process_alive=is_alive(int(row.pid)) if same else None,
    )


def mark_interrupted(conn: Connection, run_id: int, *, reason: str, details: dict, now_utc_s: float,
                     expected_last_activity_utc_s: float) -> None:
    """Mark a ``running`` run interrupted by hand (in ``conn``'s transaction), with an event.

    Refused (StoreError) when the run is no longer running or showed a sign of life after
    ``expected_last_activity_utc_s`` (what the person confirming was shown).
    """
    row = conn.execute(select(s.runs.c.status, s.runs.c.started_utc_s).where(s.runs.c.id == run_id)).first()
    if row is None:
        raise StoreError(f"the store has no run {run_id}; list the runs with `benchctl runs`")
    if row.status != RUNNING:
        raise StoreError(f"run {run_id} is {row.status}, not running; nothing to mark")
    last = last_activity_utc_s(conn, run_id, row.started_utc_s)
    if last > expected_last_activity_utc_s:
        raise StoreError(f"run {run_id} stored something new while it was being marked (its process may be alive); "
                         "nothing was changed - look again with `benchctl show` before marking it")
    changed = conn.execute(
        update(s.runs).where(s.runs.c.id == run_id, s.runs.c.status == RUNNING)
        .values(status=INTERRUPTED, ended_utc_s=last, message=f"interrupted: {reason}")
    ).rowcount
    if changed != 1:
        raise StoreError(f"run {run_id} changed while it was being marked; nothing was changed")
    last_seq = conn.execute(select(func.max(s.points.c.seq)).where(s.points.c.run_id == run_id)).scalar()
    conn.execute(insert(s.events).values(
        run_id=run_id, t_utc_s=now_utc_s, kind=EVENT_INTERRUPTED,
        message=f"run marked interrupted by hand: {reason}",
        details_json=to_json("marking details", {**details, "last_point_seq": last_seq, "last_activity_utc_s": last}),
        point_seq=last_seq,
    ))
    log.warning("run %d marked interrupted by hand: %s", run_id, reason)
