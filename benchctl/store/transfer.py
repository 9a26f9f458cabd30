"""Copying whole runs between stores (a station's SQLite file -> the shared database).

A run is copied with everything it has: provenance (procedure and its sha256,
parameters, station text and hash, instruments with their ``*IDN?`` answers, DUT,
operator, host, pid, benchctl version, job, status, times), points and their values,
events, results and arrays. It keeps its ``run_uuid``; it gets a new ``run_id`` in the
target, and an event of kind ``copied`` recording where it came from (the source's URL
with any password masked, and its run id there).

The run's job travels with it by ``job_uuid``: the target's job of that UUID is used, or
the job row is created there with an id the target assigns, so job ids of two stations
never collide in the shared database. (A run whose job has no row in the source - a job id
assigned by hand - gets a UUID derived from the source store's creation time and that id,
RFC 4122 version 5, so its runs stay together however often they are copied.)

Copies never carry a password: the station text and event texts are masked again on the
way (:func:`benchctl.store.url.mask_secrets`), which also cleans runs stored by older
versions whose masking missed passwords holding ``/`` or ``#``.

Idempotent: a run whose ``run_uuid`` the target already holds is not copied again
(reported as ``already present``; as ``conflict`` if the stored copy differs in status
or number of points). Each run is copied in one transaction of the target, so an
interrupted copy leaves either the whole run or nothing. Runs still ``running`` are
skipped unless asked for: they may still gain points.
"""

from __future__ import annotations

import logging
import socket
import uuid
from collections.abc import Callable
from contextlib import AbstractContextManager
from dataclasses import dataclass
from typing import Any

from sqlalchemy import func, insert, select
from sqlalchemy.engine import Connection
from sqlalchemy.exc import IntegrityError

from benchctl.errors import StoreError

from . import schema as s
from .codec import from_json, to_json
from .inserted import inserted_id
from .records import RUNNING
from .url import mask_secrets

log = logging.getLogger(__name__)

EVENT_COPIED = "copied"

# RunCopy.action values
COPIED = "copied"
ALREADY_PRESENT = "already present"
CONFLICT = "conflict"
SKIPPED = "skipped"


@dataclass(frozen=True)
class RunCopy:
    """What happened to one run. ``target_run_id`` is ``None`` when it was skipped;
    ``reason`` explains anything other than ``copied``."""

    source_run_id: int
    run_uuid: str
    action: str
    target_run_id: int | None
    n_points: int
    reason: str


@dataclass(frozen=True)
class CopyReport:
    """All runs considered, in source run-id order. URLs are masked."""

    source_url: str
    target_url: str
    runs: tuple[RunCopy, ...]

    @property
    def n_copied(self) -> int:
        return sum(1 for r in self.runs if r.action == COPIED)

    @property
    def n_already_present(self) -> int:
        return sum(1 for r in self.runs if r.action == ALREADY_PRESENT)

    @property
    def problems(self) -> tuple[RunCopy, ...]:
        """Runs skipped or in conflict."""
        return tuple(r for r in self.runs if r.action in (CONFLICT, SKIPPED))


@dataclass(frozen=True)
class _RunRows:
    """Every row of one run, as read from the source (plain dicts)."""

    run: dict[str, Any]
    station: dict[str, Any]
    dut: dict[str, Any] | None
    job: dict[str, Any] | None
    instruments: list[dict[str, Any]]
    quantities: list[dict[str, Any]]
    points: list[dict[str, Any]]
    values: list[dict[str, Any]]
    events: list[dict[str, Any]]
    results: list[dict[str, Any]]
    arrays: list[dict[str, Any]]
    array_columns: list[dict[str, Any]]


def _dicts(conn: Connection, query: Any) -> list[dict[str, Any]]:
    return [dict(row._mapping) for row in conn.execute(query)]


def read_run_rows(conn: Connection, run_id: int) -> _RunRows:
    """All rows of run ``run_id`` (in one read transaction of the source)."""
    runs = _dicts(conn, select(s.runs).where(s.runs.c.id == run_id))
    if not runs:
        raise StoreError(f"the source store has no run {run_id}; list its runs with `benchctl runs --db SOURCE`")
    run = runs[0]
    station = _dicts(conn, select(s.stations).where(s.stations.c.id == run["station_id"]))[0]
    dut = None
    if run["dut_id"] is not None:
        dut = _dicts(conn, select(s.duts).where(s.duts.c.id == run["dut_id"]))[0]
    a = s.arrays
    return _RunRows(
        run=run,
        station=station,
        dut=dut,
        job=_job_row(conn, run["job_id"]),
        instruments=_dicts(conn, select(s.instruments).where(s.instruments.c.run_id == run_id).order_by(s.instruments.c.id)),
        quantities=_dicts(conn, select(s.quantities).where(s.quantities.c.run_id == run_id).order_by(s.quantities.c.id)),
        points=_dicts(conn, select(s.points).where(s.points.c.run_id == run_id).order_by(s.points.c.seq)),
        values=_dicts(
            conn,
            select(s.point_values)
            .where(s.point_values.c.run_id == run_id)
            .order_by(s.point_values.c.seq, s.point_values.c.quantity_id),
        ),
        events=_dicts(conn, select(s.events).where(s.events.c.run_id == run_id).order_by(s.events.c.id)),
        results=_dicts(conn, select(s.results).where(s.results.c.run_id == run_id).order_by(s.results.c.id)),
        arrays=_dicts(conn, select(a).where(a.c.run_id == run_id).order_by(a.c.id)),
        array_columns=_dicts(
            conn,
            select(s.array_columns)
            .select_from(s.array_columns.join(a, a.c.id == s.array_columns.c.array_id))
            .where(a.c.run_id == run_id)
            .order_by(s.array_columns.c.array_id, s.array_columns.c.position),
        ),
    )


#: Namespace of the UUIDs given to jobs that have no row of their own (uuid5, RFC 4122 §4.3).
_JOB_NAMESPACE = uuid.UUID("5d0f4f0e-8a51-4c1e-9c43-6a1f3b2f8e71")


def _job_row(conn: Connection, job_id: int | None) -> dict[str, Any] | None:
    """The jobs row of ``job_id`` in the source (one made up, with a stable UUID, if it has none)."""
    if job_id is None:
        return None
    rows = _dicts(conn, select(s.jobs).where(s.jobs.c.id == int(job_id)))
    if rows:
        return rows[0]
    created = conn.execute(select(s.meta.c.created_utc_s).where(s.meta.c.id == 1)).scalar()
    started = conn.execute(select(func.min(s.runs.c.started_utc_s)).where(s.runs.c.job_id == int(job_id))).scalar()
    return {"id": int(job_id), "job_uuid": str(uuid.uuid5(_JOB_NAMESPACE, f"{created!r}/{int(job_id)}")),
            "name": "", "station_name": "", "host": "", "started_utc_s": float(started or 0.0)}


def _target_job_id(conn: Connection, job: dict[str, Any]) -> int:
    """The target's id of the job with ``job["job_uuid"]``, the row created there if it is new."""
    t = s.jobs
    found = conn.execute(select(t.c.id).where(t.c.job_uuid == job["job_uuid"])).scalar()
    if found is not None:
        return int(found)
    values = {k: job[k] for k in ("job_uuid", "name", "station_name", "host", "started_utc_s")}
    return inserted_id(conn.execute(insert(t).values(**values)), "jobs")


def _masked_json(text: str | None) -> str | None:
    """A JSON text with every string in it masked (parsed and written again, so it stays JSON)."""
    if not text:
        return text

    def walk(value: Any) -> Any:
        if isinstance(value, str):
            return mask_secrets(value)
        if isinstance(value, list):
            return [walk(v) for v in value]
        if isinstance(value, dict):
            return {mask_secrets(str(k)): walk(v) for k, v in value.items()}
        return value

    try:
        value = from_json(text)
    except ValueError:  # not JSON after all: mask it as text
        return mask_secrets(text)
    masked = walk(value)
    return text if masked == value else to_json("event details", masked)


def source_run_ids(conn: Connection) -> list[int]:
    """Every run id of a store, ascending."""
    return [int(i) for i in conn.execute(select(s.runs.c.id).order_by(s.runs.c.id)).scalars()]


def _present(conn: Connection, run_uuid: str) -> tuple[int, str, int] | None:
    row = conn.execute(select(s.runs.c.id, s.runs.c.status).where(s.runs.c.run_uuid == run_uuid)).first()
    if row is None:
        return None
    n = conn.execute(select(func.count()).select_from(s.points).where(s.points.c.run_id == row.id)).scalar()
    return int(row.id), str(row.status), int(n or 0)


def _station_id(conn: Connection, station: dict[str, Any]) -> int:
    t = s.stations
    row = conn.execute(
        select(t.c.id).where(
            t.c.name == station["name"],
            t.c.station_sha256 == station["station_sha256"],
            t.c.description == station["description"],
        ).order_by(t.c.id)
    ).first()
    if row is not None:
        return int(row.id)
    values = {k: station[k] for k in ("name", "description", "station_text", "station_sha256")}
    if values["station_text"] is not None:
        values["station_text"] = mask_secrets(values["station_text"])
    return inserted_id(conn.execute(insert(t).values(**values)), "stations")


def _dut_id(conn: Connection, dut: dict[str, Any]) -> int:
    t = s.duts
    row = conn.execute(
        select(t.c.id).where(
            t.c.part_number == dut["part_number"], t.c.revision == dut["revision"], t.c.serial == dut["serial"]
        )
    ).first()
    if row is not None:
        return int(row.id)
    values = {k: dut[k] for k in ("part_number", "revision", "serial")}
    return inserted_id(conn.execute(insert(t).values(**values)), "duts")


def write_run_rows(conn: Connection, rows: _RunRows, *, note: dict[str, Any], now_utc_s: float) -> int:
    """Insert one run read by :func:`read_run_rows` (inside ``conn``'s transaction); returns its new id."""
    station_id = _station_id(conn, rows.station)
    dut_id = _dut_id(conn, rows.dut) if rows.dut is not None else None
    run_values = {k: v for k, v in rows.run.items() if k != "id"}
    run_values.update(station_id=station_id, dut_id=dut_id,
                      job_id=_target_job_id(conn, rows.job) if rows.job is not None else None)
    run_id = inserted_id(conn.execute(insert(s.runs).values(**run_values)), "runs")
    if rows.instruments:
        conn.execute(
            insert(s.instruments),
            [{**{k: v for k, v in i.items() if k != "id"}, "run_id": run_id, "station_id": station_id}
             for i in rows.instruments],
        )
    quantity_ids: dict[int, int] = {}
    for q in rows.quantities:
        new = inserted_id(conn.execute(
            insert(s.quantities).values(run_id=run_id, name=q["name"], unit=q["unit"])
        ), "quantities")
        quantity_ids[int(q["id"])] = new
    if rows.points:
        conn.execute(insert(s.points), [{**p, "run_id": run_id} for p in rows.points])
    if rows.values:
        conn.execute(
            insert(s.point_values),
            [{**v, "run_id": run_id, "quantity_id": quantity_ids[int(v["quantity_id"])]} for v in rows.values],
        )
    events = [{**{k: v for k, v in e.items() if k != "id"}, "run_id": run_id,
               "message": mask_secrets(e["message"] or ""), "details_json": _masked_json(e["details_json"])}
              for e in rows.events]
    events.append(
        {
            "run_id": run_id,
            "t_utc_s": now_utc_s,
            "kind": EVENT_COPIED,
            "message": f"copied from run {note['source_run_id']} of {note['source_url']}",
            "details_json": to_json("copy details", note),
            "point_seq": None,
        }
    )
    conn.execute(insert(s.events), events)
    if rows.results:
        conn.execute(insert(s.results), [{**{k: v for k, v in r.items() if k != "id"}, "run_id": run_id}
                                         for r in rows.results])
    array_ids: dict[int, int] = {}
    for arr in rows.arrays:
        values = {k: v for k, v in arr.items() if k != "id"}
        values["run_id"] = run_id
        new = inserted_id(conn.execute(insert(s.arrays).values(**values)), "arrays")
        array_ids[int(arr["id"])] = new
    if rows.array_columns:
        conn.execute(
            insert(s.array_columns),
            [{**c, "array_id": array_ids[int(c["array_id"])]} for c in rows.array_columns],
        )
    return run_id


def running_refusal(run_id: int, host: str, pid: int, wait_advice: str, db: str | None = None) -> str:
    """Why a run still marked ``running`` is refused, and the command that ends that state."""
    where = f" --db {db}" if db else ""
    return (f"run {run_id} is still running according to the store (host {host or '?'}, pid {pid}): it may still gain points; "
            f"{wait_advice}. If its process is gone (another host, a renamed machine, a removed container), "
            f"mark it interrupted with `benchctl mark-interrupted {run_id}{where}`")


def copy_runs(
    read: Callable[[Callable[..., Any]], Any],
    write: Callable[[str], AbstractContextManager[Connection]],
    run_ids: list[int] | None,
    *,
    source_url: str,
    target_url: str,
    include_running: bool = False,
    clock: Callable[[], float],
) -> CopyReport:
    """Copy runs; ``read(fn)`` calls ``fn(conn)`` on a source read connection, ``write(doing)``
    is a transaction of the target. ``run_ids=None`` means every run of the source.
    Used through :meth:`benchctl.store.Store.copy_runs_from`."""
    ids = read(source_run_ids) if run_ids is None else sorted(set(int(i) for i in run_ids))
    report: list[RunCopy] = []
    for source_id in ids:
        rows: _RunRows = read(lambda conn, rid=source_id: read_run_rows(conn, rid))
        run_uuid = str(rows.run["run_uuid"])
        n_points = len(rows.points)
        if not run_uuid:
            raise StoreError(f"run {source_id} of {source_url} has no run_uuid; upgrade that store first")
        if rows.run["status"] == RUNNING and not include_running:
            report.append(RunCopy(source_id, run_uuid, SKIPPED, None, n_points, running_refusal(
                source_id, rows.run["host"], rows.run["pid"], "copy it when it has ended", source_url)))
            continue
        report.append(_copy_one(write, rows, source_id, run_uuid, n_points, source_url, clock))
    result = CopyReport(source_url=source_url, target_url=target_url, runs=tuple(report))
    log.info("copied %d run(s) from %s to %s (%d already present, %d not copied)",
             result.n_copied, source_url, target_url, result.n_already_present, len(result.problems))
    return result


def _copy_one(
    write: Callable[[str], AbstractContextManager[Connection]],
    rows: _RunRows,
    source_id: int,
    run_uuid: str,
    n_points: int,
    source_url: str,
    clock: Callable[[], float],
) -> RunCopy:
    for attempt in (1, 2):  # another copier may insert the same run at the same moment
        try:
            with write(f"copying run {source_id} ({run_uuid})") as conn:
                present = _present(conn, run_uuid)
                if present is None:
                    now = clock()
                    note = {
                        "source_url": source_url,
                        "source_run_id": source_id,
                        "copied_utc_s": now,
                        "copied_on_host": socket.gethostname(),
                    }
                    new_id = write_run_rows(conn, rows, note=note, now_utc_s=now)
                    return RunCopy(source_id, run_uuid, COPIED, new_id, n_points, "")
        except StoreError as exc:
            if attempt == 1 and isinstance(exc.__cause__, IntegrityError):
                continue
            raise
        target_id, status, stored_points = present
        if status == rows.run["status"] and stored_points == n_points:
            return RunCopy(source_id, run_uuid, ALREADY_PRESENT, target_id, n_points, "the target already holds this run")
        return RunCopy(
            source_id, run_uuid, CONFLICT, target_id, n_points,
            f"the target's copy (run {target_id}) is {status} with {stored_points} points, the source's is "
            f"{rows.run['status']} with {n_points}; left unchanged",
        )
    raise StoreError(f"copying run {source_id} ({run_uuid}) kept colliding with another copier; try again")
