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
"""

from __future__ import annotations

import logging
import os
from collections.abc import Callable
from pathlib import Path

from sqlalchemy import func, insert, select, update
from sqlalchemy.engine import Connection

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
