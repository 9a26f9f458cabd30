"""Reading the store: runs, points, events, results and arrays as pandas DataFrames.

Every function takes an open SQLAlchemy connection and only reads. Times come back
as timezone-aware UTC (``datetime64[ns, UTC]`` columns, :class:`datetime.datetime`
fields). Values stored as NULL (NaN or ``None`` when written) come back as NaN.
"""

from __future__ import annotations

from collections.abc import Sequence
from datetime import datetime, timezone
from typing import Any, Unpack

import numpy as np
import pandas as pd
from sqlalchemy import func, select
from sqlalchemy.engine import Connection, Row

from benchctl.errors import StoreError

from . import schema as s
from .codec import decode_column, from_json
from .records import RUN_STATUSES, ArrayData, InstrumentInfo, RunInfo

POINT_COLUMNS = ("seq", "t_utc", "tag", "settled", "settle_time_s", "settle_info", "settle_reason")

_Rows = Sequence[Row[Unpack[tuple[Any, ...]]]]  # result rows of any width


def utc_time(t_utc_s: float) -> datetime:
    """UTC seconds since the epoch -> aware datetime."""
    return datetime.fromtimestamp(t_utc_s, tz=timezone.utc)


def utc_datetime(t_utc_s: float | None) -> datetime | None:
    """UTC seconds since the epoch -> aware datetime (``None`` stays ``None``)."""
    return None if t_utc_s is None else utc_time(t_utc_s)


def _utc_series(values: list[float | None]) -> pd.Series:
    return pd.to_datetime(pd.Series(values, dtype="float64"), unit="s", utc=True)


def resolve_run(conn: Connection, ref: int | str) -> int:
    """Run id for ``ref``: an integer id (or its text), or ``"latest"`` (the highest id)."""
    if isinstance(ref, str) and ref.strip().lower() == "latest":
        latest = conn.execute(select(func.max(s.runs.c.id))).scalar()
        if latest is None:
            raise StoreError("the store holds no runs yet, so there is no 'latest' run")
        return int(latest)
    try:
        run_id = int(ref)
    except (TypeError, ValueError) as exc:
        raise StoreError(f"run reference {ref!r} is neither a run id nor 'latest'") from exc
    if conn.execute(select(s.runs.c.id).where(s.runs.c.id == run_id)).first() is None:
        raise StoreError(f"the store has no run {run_id}; list the runs with `benchctl runs` (Store.runs() from Python)")
    return run_id


def _require_run(conn: Connection, run_id: int) -> None:
    if conn.execute(select(s.runs.c.id).where(s.runs.c.id == run_id)).first() is None:
        raise StoreError(f"the store has no run {run_id}; list the runs with `benchctl runs` (Store.runs() from Python)")


def last_point(conn: Connection, run_id: int) -> int | None:
    """Sequence number of the run's last committed point, ``None`` if it has none."""
    _require_run(conn, run_id)
    last = conn.execute(select(func.max(s.points.c.seq)).where(s.points.c.run_id == run_id)).scalar()
    return None if last is None else int(last)


def run_info(conn: Connection, run_id: int) -> RunInfo:
    """All provenance of one run."""
    r, st, d = s.runs, s.stations, s.duts
    row = conn.execute(
        select(
            r,
            st.c.name.label("station_name"),
            st.c.description.label("station_description"),
            st.c.station_sha256,
            st.c.station_text,
            d.c.part_number,
            d.c.revision,
            d.c.serial,
        )
        .select_from(r.join(st, r.c.station_id == st.c.id).outerjoin(d, r.c.dut_id == d.c.id))
        .where(r.c.id == run_id)
    ).first()
    if row is None:
        raise StoreError(f"the store has no run {run_id}; list the runs with `benchctl runs` (Store.runs() from Python)")
    inst = s.instruments
    instruments = tuple(
        InstrumentInfo(role=i.role, driver=i.driver, resource=i.resource, identity=i.identity)
        for i in conn.execute(
            select(inst.c.role, inst.c.driver, inst.c.resource, inst.c.identity)
            .where(inst.c.run_id == run_id)
            .order_by(inst.c.id)
        )
    )
    n_points = conn.execute(select(func.count()).select_from(s.points).where(s.points.c.run_id == run_id)).scalar()
    return RunInfo(
        run_id=int(row.id),
        run_uuid=row.run_uuid,
        procedure=row.procedure,
        procedure_sha256=row.procedure_sha256,
        parameters=from_json(row.parameters_json),
        station_name=row.station_name,
        station_description=row.station_description,
        station_sha256=row.station_sha256,
        station_text=row.station_text,
        instruments=instruments,
        dut_part=row.part_number or "",
        dut_revision=row.revision or "",
        dut_serial=row.serial or "",
        operator=row.operator,
        host=row.host,
        pid=int(row.pid),
        benchctl_version=row.benchctl_version,
        job_id=None if row.job_id is None else int(row.job_id),
        status=row.status,
        message=row.message,
        started_utc=utc_time(row.started_utc_s),  # NOT NULL in the schema
        ended_utc=utc_datetime(row.ended_utc_s),
        n_points=int(n_points or 0),
    )


def list_runs(
    conn: Connection,
    *,
    status: str | None = None,
    station: str | None = None,
    procedure: str | None = None,
    dut_part: str | None = None,
    since: datetime | float | None = None,
    limit: int | None = None,
) -> pd.DataFrame:
    """Runs matching every given filter, newest first.

    ``since`` is an aware datetime or UTC epoch seconds; runs started at or after it match.
    Columns: run_id, run_uuid, procedure, status, station, dut_part, dut_revision, dut_serial,
    operator, host, pid, job_id, started_utc, ended_utc, n_points, message,
    benchctl_version, procedure_sha256.
    """
    if status is not None and status not in RUN_STATUSES:
        raise StoreError(f"unknown run status {status!r}; use one of {', '.join(sorted(RUN_STATUSES))}")
    if limit is not None and limit < 1:
        raise StoreError(f"limit must be a positive number of runs, got {limit}")
    r, st, d, p = s.runs, s.stations, s.duts, s.points
    counts = select(p.c.run_id, func.count().label("n_points")).group_by(p.c.run_id).subquery()
    query = (
        select(
            r.c.id.label("run_id"),
            r.c.run_uuid,
            r.c.procedure,
            r.c.status,
            st.c.name.label("station"),
            d.c.part_number.label("dut_part"),
            d.c.revision.label("dut_revision"),
            d.c.serial.label("dut_serial"),
            r.c.operator,
            r.c.host,
            r.c.pid,
            r.c.job_id,
            r.c.started_utc_s,
            r.c.ended_utc_s,
            func.coalesce(counts.c.n_points, 0).label("n_points"),
            r.c.message,
            r.c.benchctl_version,
            r.c.procedure_sha256,
        )
        .select_from(
            r.join(st, r.c.station_id == st.c.id)
            .outerjoin(d, r.c.dut_id == d.c.id)
            .outerjoin(counts, counts.c.run_id == r.c.id)
        )
        .order_by(r.c.id.desc())
    )
    if status is not None:
        query = query.where(r.c.status == status)
    if station is not None:
        query = query.where(st.c.name == station)
    if procedure is not None:
        query = query.where(r.c.procedure == procedure)
    if dut_part is not None:
        query = query.where(d.c.part_number == dut_part)
    if since is not None:
        query = query.where(r.c.started_utc_s >= _epoch_s(since))
    if limit is not None:
        query = query.limit(int(limit))
    rows = conn.execute(query).all()
    frame = pd.DataFrame(
        {
            "run_id": pd.Series([row.run_id for row in rows], dtype="int64"),
            "run_uuid": [row.run_uuid for row in rows],
            "procedure": [row.procedure for row in rows],
            "status": [row.status for row in rows],
            "station": [row.station for row in rows],
            "dut_part": [row.dut_part or "" for row in rows],
            "dut_revision": [row.dut_revision or "" for row in rows],
            "dut_serial": [row.dut_serial or "" for row in rows],
            "operator": [row.operator for row in rows],
            "host": [row.host for row in rows],
            "pid": pd.Series([row.pid for row in rows], dtype="int64"),
            "job_id": pd.Series([row.job_id for row in rows], dtype="Int64"),
            "started_utc": _utc_series([row.started_utc_s for row in rows]),
            "ended_utc": _utc_series([row.ended_utc_s for row in rows]),
            "n_points": pd.Series([row.n_points for row in rows], dtype="int64"),
            "message": [row.message for row in rows],
            "benchctl_version": [row.benchctl_version for row in rows],
            "procedure_sha256": [row.procedure_sha256 for row in rows],
        }
    )
    return frame


def _epoch_s(since: datetime | float) -> float:
    if isinstance(since, datetime):
        if since.tzinfo is None:
            raise StoreError(
                f"since={since!r} has no time zone; give an aware datetime, e.g. with tzinfo=timezone.utc"
            )
        return since.timestamp()
    return float(since)


def quantity_units(conn: Connection, run_id: int) -> dict[str, str]:
    """Unit of every quantity of the run, in the order the quantities first appeared."""
    _require_run(conn, run_id)
    q = s.quantities
    return {
        row.name: row.unit
        for row in conn.execute(select(q.c.name, q.c.unit).where(q.c.run_id == run_id).order_by(q.c.id))
    }


def _point_rows(conn: Connection, run_id: int) -> _Rows:
    p = s.points
    return conn.execute(
        select(p.c.seq, p.c.t_utc_s, p.c.tag, p.c.settled, p.c.settle_time_s, p.c.settle_json)
        .where(p.c.run_id == run_id)
        .order_by(p.c.seq)
    ).all()


def _point_frame(rows: _Rows) -> dict[str, pd.Series]:
    infos = [_settle_info(r.settle_json) for r in rows]
    return {
        "seq": pd.Series([r.seq for r in rows], dtype="int64"),
        "t_utc": _utc_series([r.t_utc_s for r in rows]),
        "tag": pd.Series([r.tag for r in rows], dtype="str"),
        "settled": pd.Series([bool(r.settled) for r in rows], dtype="bool"),
        "settle_time_s": pd.Series([r.settle_time_s for r in rows], dtype="float64"),
        "settle_info": pd.Series(infos, dtype="object"),
        "settle_reason": pd.Series([str(i.get("reason", "") or "") for i in infos], dtype="str"),
    }


def _settle_info(text: str | None) -> dict[str, Any]:
    value = from_json(text) if text else {}
    return value if isinstance(value, dict) else {}


def points_wide(conn: Connection, run_id: int) -> pd.DataFrame:
    """One row per point: seq, t_utc, tag, settled, settle_time_s, settle_info (dict: how the point
    was settled and verified), settle_reason ("" when settled and verified), then one float column per
    quantity (first-appearance order); NaN where a point has no value for a quantity."""
    _require_run(conn, run_id)
    rows = _point_rows(conn, run_id)
    q, v = s.quantities, s.point_values
    names = [
        (row.id, row.name)
        for row in conn.execute(select(q.c.id, q.c.name).where(q.c.run_id == run_id).order_by(q.c.id))
    ]
    column_of = {qid: j for j, (qid, _) in enumerate(names)}
    row_of = {r.seq: i for i, r in enumerate(rows)}
    matrix = np.full((len(rows), len(names)), np.nan)
    for seq, qid, value in conn.execute(
        select(v.c.seq, v.c.quantity_id, v.c.value).where(v.c.run_id == run_id)
    ):
        if value is not None:
            matrix[row_of[seq], column_of[qid]] = value
    data = _point_frame(rows)
    for j, (_, name) in enumerate(names):
        data[name] = pd.Series(matrix[:, j], dtype="float64")
    return pd.DataFrame(data)


def points_long(conn: Connection, run_id: int) -> pd.DataFrame:
    """One row per stored value: seq, t_utc, tag, settled, settle_time_s, quantity, value, unit;
    ordered by seq, then quantity first-appearance order."""
    _require_run(conn, run_id)
    p, q, v = s.points, s.quantities, s.point_values
    rows = conn.execute(
        select(p.c.seq, p.c.t_utc_s, p.c.tag, p.c.settled, p.c.settle_time_s, p.c.settle_json, q.c.name, v.c.value,
               q.c.unit)
        .select_from(
            v.join(p, (p.c.run_id == v.c.run_id) & (p.c.seq == v.c.seq)).join(q, q.c.id == v.c.quantity_id)
        )
        .where(v.c.run_id == run_id)
        .order_by(v.c.seq, q.c.id)
    ).all()
    data = _point_frame(rows)
    data["quantity"] = pd.Series([r.name for r in rows], dtype="str")
    data["value"] = pd.Series([np.nan if r.value is None else r.value for r in rows], dtype="float64")
    data["unit"] = pd.Series([r.unit for r in rows], dtype="str")
    return pd.DataFrame(data)


def events_frame(conn: Connection, run_id: int) -> pd.DataFrame:
    """Events of a run in time order: event_id, t_utc, kind, message, details (dict), point_seq."""
    _require_run(conn, run_id)
    e = s.events
    rows = conn.execute(select(e).where(e.c.run_id == run_id).order_by(e.c.t_utc_s, e.c.id)).all()
    return pd.DataFrame(
        {
            "event_id": pd.Series([r.id for r in rows], dtype="int64"),
            "t_utc": _utc_series([r.t_utc_s for r in rows]),
            "kind": pd.Series([r.kind for r in rows], dtype="str"),
            "message": pd.Series([r.message for r in rows], dtype="str"),
            "details": pd.Series([from_json(r.details_json) for r in rows], dtype="object"),
            "point_seq": pd.Series([r.point_seq for r in rows], dtype="Int64"),
        }
    )


def results_frame(conn: Connection, run_id: int) -> pd.DataFrame:
    """Derived results in recording order: result_id, name, value (NaN if none), unit,
    details, scope (dict), uncertainty and expanded_uncertainty (k = 2; NaN if none), t_utc."""
    _require_run(conn, run_id)
    t = s.results
    rows = conn.execute(select(t).where(t.c.run_id == run_id).order_by(t.c.id)).all()
    return pd.DataFrame(
        {
            "result_id": pd.Series([r.id for r in rows], dtype="int64"),
            "name": pd.Series([r.name for r in rows], dtype="str"),
            "value": pd.Series([np.nan if r.value is None else r.value for r in rows], dtype="float64"),
            "unit": pd.Series([r.unit for r in rows], dtype="str"),
            "details": pd.Series([from_json(r.details_json) for r in rows], dtype="object"),
            "scope": pd.Series([from_json(r.scope_json) for r in rows], dtype="object"),
            "uncertainty": pd.Series([np.nan if r.uncertainty is None else r.uncertainty for r in rows],
                                     dtype="float64"),
            "expanded_uncertainty": pd.Series(
                [np.nan if r.expanded_uncertainty is None else r.expanded_uncertainty for r in rows], dtype="float64"),
            "t_utc": _utc_series([r.t_utc_s for r in rows]),
        }
    )


def arrays_frame(conn: Connection, run_id: int) -> pd.DataFrame:
    """Arrays of a run without their data: array_id, name, point_seq, columns (names),
    units (dict), dtypes (dict), shapes (dict), meta, t_utc."""
    _require_run(conn, run_id)
    a, c = s.arrays, s.array_columns
    heads = conn.execute(select(a).where(a.c.run_id == run_id).order_by(a.c.id)).all()
    cols: dict[int, list[Any]] = {h.id: [] for h in heads}
    for col in conn.execute(
        select(c.c.array_id, c.c.name, c.c.unit, c.c.dtype, c.c.shape_json)
        .select_from(c.join(a, a.c.id == c.c.array_id))
        .where(a.c.run_id == run_id)
        .order_by(c.c.array_id, c.c.position)
    ):
        cols[col.array_id].append(col)
    return pd.DataFrame(
        {
            "array_id": pd.Series([h.id for h in heads], dtype="int64"),
            "name": pd.Series([h.name for h in heads], dtype="str"),
            "point_seq": pd.Series([h.point_seq for h in heads], dtype="Int64"),
            "columns": pd.Series([tuple(col.name for col in cols[h.id]) for h in heads], dtype="object"),
            "units": pd.Series([{col.name: col.unit for col in cols[h.id]} for h in heads], dtype="object"),
            "dtypes": pd.Series([{col.name: col.dtype for col in cols[h.id]} for h in heads], dtype="object"),
            "shapes": pd.Series(
                [{col.name: tuple(from_json(col.shape_json)) for col in cols[h.id]} for h in heads], dtype="object"
            ),
            "meta": pd.Series([from_json(h.meta_json) for h in heads], dtype="object"),
            "t_utc": _utc_series([h.t_utc_s for h in heads]),
        }
    )


def array_data(conn: Connection, run_id: int, name: str, point_seq: int | None = None) -> ArrayData:
    """One stored array with its data. ``point_seq=None`` means the run-level array."""
    _require_run(conn, run_id)
    a, c = s.arrays, s.array_columns
    seq_match = a.c.point_seq.is_(None) if point_seq is None else a.c.point_seq == point_seq
    head = conn.execute(select(a).where(a.c.run_id == run_id, a.c.name == name, seq_match)).first()
    if head is None:
        available = conn.execute(
            select(a.c.name, a.c.point_seq).where(a.c.run_id == run_id).order_by(a.c.id)
        ).all()
        listing = ", ".join(
            f"{n!r}" + ("" if seq is None else f" (point {seq})") for n, seq in available
        ) or "none"
        where = "at run level" if point_seq is None else f"for point {point_seq}"
        raise StoreError(f"run {run_id} has no array {name!r} {where}; its arrays: {listing}")
    columns: dict[str, np.ndarray] = {}
    units: dict[str, str] = {}
    for col in conn.execute(select(c).where(c.c.array_id == head.id).order_by(c.c.position)):
        columns[col.name] = decode_column(col.dtype, tuple(from_json(col.shape_json)), col.data)
        units[col.name] = col.unit
    return ArrayData(
        name=head.name, point_seq=head.point_seq, columns=columns, units=units, meta=from_json(head.meta_json)
    )
