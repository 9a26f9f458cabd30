"""Queries across runs and stations: a DUT part over time, efficiency at an operating point.

These read the shared database (or any store) as pandas DataFrames; like
:mod:`.queries`, every function takes an open connection and only reads. Times are
timezone-aware UTC.
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
from sqlalchemy import and_, select
from sqlalchemy.engine import Connection

from benchctl.errors import StoreError

from . import schema as s
from .queries import _utc_series, list_runs
from benchctl.run_status import RunStatus

RUN_HISTORY_COLUMNS = (
    "run_id", "run_uuid", "started_utc", "ended_utc", "station", "host", "operator", "dut_part",
    "dut_revision", "dut_serial", "procedure", "status", "n_points", "message",
)

OPERATING_POINT_COLUMNS = (
    "run_id", "run_uuid", "started_utc", "station", "dut_part", "dut_revision", "dut_serial",
    "procedure", "status", "seq", "vin_v", "iout_a", "pin_w", "pout_w", "efficiency",
)

REVISION_SUMMARY_COLUMNS = (
    "dut_revision", "n_runs", "n_points", "efficiency_mean", "efficiency_min", "efficiency_max",
    "first_utc", "last_utc", "n_points_without_efficiency",
)


def runs_of_part(
    conn: Connection,
    dut_part: str,
    *,
    revision: str | None = None,
    procedure: str | None = None,
    status: str | None = None,
) -> pd.DataFrame:
    """Every run of DUT part number ``dut_part`` on any station, oldest first.

    Columns: :data:`RUN_HISTORY_COLUMNS`. ``revision``, ``procedure``, ``status``
    narrow it further. An unknown part gives an empty frame with these columns.
    """
    if not isinstance(dut_part, str) or not dut_part:
        raise StoreError(f"a DUT part number is needed to look up its runs, got {dut_part!r}")
    frame = list_runs(conn, dut_part=dut_part, procedure=procedure, status=status)
    if revision is not None:
        frame = frame[frame["dut_revision"] == revision]
    frame = frame.sort_values(["started_utc", "run_id"], kind="stable").reset_index(drop=True)
    return frame.loc[:, list(RUN_HISTORY_COLUMNS)]


def efficiency_at(
    conn: Connection,
    dut_part: str,
    *,
    vin_v: float,
    iout_a: float,
    vin_tol_v: float = 1e-6,
    iout_tol_a: float = 1e-6,
    vin_name: str = "vin_set_v",
    iout_name: str = "iout_set_a",
    pin_name: str = "pin_w",
    pout_name: str = "pout_w",
    procedure: str | None = None,
    status: str | None = RunStatus.COMPLETED,
) -> pd.DataFrame:
    """Efficiency of every stored point of DUT part ``dut_part`` at one operating point.

    A point matches when its ``vin_name`` value is within ``vin_tol_v`` of ``vin_v`` (V)
    and its ``iout_name`` value within ``iout_tol_a`` of ``iout_a`` (A); by default the
    setpoints a procedure records. ``efficiency`` = ``pout_w / pin_w`` from the stored
    readings (η = Pout/Pin, the definition of converter efficiency), NaN where either is
    missing or ``pin_w <= 0``. Only runs with ``status`` (``None``: any) count.
    Columns: :data:`OPERATING_POINT_COLUMNS`, ordered by run start, then seq; an
    operating point nobody measured gives an empty frame with these columns.
    """
    if not isinstance(dut_part, str) or not dut_part:
        raise StoreError(f"a DUT part number is needed to compare efficiency, got {dut_part!r}")
    for what, value in (("vin_v", vin_v), ("iout_a", iout_a), ("vin_tol_v", vin_tol_v), ("iout_tol_a", iout_tol_a)):
        if not isinstance(value, (int, float)) or not math.isfinite(value):
            raise StoreError(f"efficiency_at: {what} = {value!r} is not a finite number")
    if vin_tol_v < 0 or iout_tol_a < 0:
        raise StoreError(f"efficiency_at: tolerances must not be negative (vin_tol_v={vin_tol_v}, iout_tol_a={iout_tol_a})")
    r, st, d, p = s.runs, s.stations, s.duts, s.points
    joined = p.join(r, r.c.id == p.c.run_id).join(st, st.c.id == r.c.station_id).join(d, d.c.id == r.c.dut_id)
    values = {}
    for key, name, outer in (("vin", vin_name, False), ("iout", iout_name, False),
                             ("pin", pin_name, True), ("pout", pout_name, True)):
        q = s.quantities.alias(f"q_{key}")
        v = s.point_values.alias(f"v_{key}")
        on_q = and_(q.c.run_id == p.c.run_id, q.c.name == name)
        on_v = and_(v.c.run_id == p.c.run_id, v.c.seq == p.c.seq, v.c.quantity_id == q.c.id)
        joined = joined.outerjoin(q, on_q).outerjoin(v, on_v) if outer else joined.join(q, on_q).join(v, on_v)
        values[key] = v.c.value
    query = (
        select(
            r.c.id.label("run_id"), r.c.run_uuid, r.c.started_utc_s, st.c.name.label("station"),
            d.c.part_number, d.c.revision, d.c.serial, r.c.procedure, r.c.status, p.c.seq,
            values["vin"].label("vin"), values["iout"].label("iout"),
            values["pin"].label("pin"), values["pout"].label("pout"),
        )
        .select_from(joined)
        .where(
            d.c.part_number == dut_part,
            values["vin"].between(vin_v - vin_tol_v, vin_v + vin_tol_v),
            values["iout"].between(iout_a - iout_tol_a, iout_a + iout_tol_a),
        )
        .order_by(r.c.started_utc_s, r.c.id, p.c.seq)
    )
    if procedure is not None:
        query = query.where(r.c.procedure == procedure)
    if status is not None:
        query = query.where(r.c.status == status)
    rows = conn.execute(query).all()
    pin = np.array([np.nan if row.pin is None else row.pin for row in rows], dtype="float64")
    pout = np.array([np.nan if row.pout is None else row.pout for row in rows], dtype="float64")
    with np.errstate(divide="ignore", invalid="ignore"):
        eff = np.where(pin > 0, pout / pin, np.nan)
    return pd.DataFrame(
        {
            "run_id": pd.Series([row.run_id for row in rows], dtype="int64"),
            "run_uuid": pd.Series([row.run_uuid for row in rows], dtype="object"),
            "started_utc": _utc_series([row.started_utc_s for row in rows]),
            "station": pd.Series([row.station for row in rows], dtype="object"),
            "dut_part": pd.Series([row.part_number for row in rows], dtype="object"),
            "dut_revision": pd.Series([row.revision for row in rows], dtype="object"),
            "dut_serial": pd.Series([row.serial for row in rows], dtype="object"),
            "procedure": pd.Series([row.procedure for row in rows], dtype="object"),
            "status": pd.Series([row.status for row in rows], dtype="object"),
            "seq": pd.Series([row.seq for row in rows], dtype="int64"),
            "vin_v": pd.Series([row.vin for row in rows], dtype="float64"),
            "iout_a": pd.Series([row.iout for row in rows], dtype="float64"),
            "pin_w": pd.Series(pin, dtype="float64"),
            "pout_w": pd.Series(pout, dtype="float64"),
            "efficiency": pd.Series(eff, dtype="float64"),
        }
    )


def summarize_by_revision(points: pd.DataFrame) -> pd.DataFrame:
    """One row per DUT revision of a frame from :func:`efficiency_at`, in order of first run.

    Columns: :data:`REVISION_SUMMARY_COLUMNS`. ``n_runs`` and ``n_points`` count only the
    runs and points that have an efficiency there (a finite Pout/Pin): a run of another
    procedure at the same setpoints (a loop-gain or ripple run records no input power)
    matches the operating point but tells nothing of the efficiency, so it is counted
    apart, in ``n_points_without_efficiency``. ``first_utc``/``last_utc`` are those of
    the runs with an efficiency (NaT when a revision has none). A revision whose matching
    points all lack an efficiency keeps its row, with zero counts and NaN statistics.
    """
    missing = {"dut_revision", "run_id", "efficiency", "started_utc"} - set(points.columns)
    if missing:
        raise StoreError(f"summarize_by_revision needs a frame from efficiency_at; it lacks {sorted(missing)}")
    if points.empty:
        return pd.DataFrame({c: pd.Series(dtype="float64") for c in REVISION_SUMMARY_COLUMNS}).astype(
            {"dut_revision": "object", "n_runs": "int64", "n_points": "int64", "n_points_without_efficiency": "int64"}
        )
    has = points["efficiency"].notna()
    order = points.groupby("dut_revision", sort=False)["started_utc"].min()  # first measurement of any kind
    with_eff = points[has].groupby("dut_revision", sort=False)
    out = pd.DataFrame(
        {
            "n_runs": with_eff["run_id"].nunique(),
            "n_points": with_eff["run_id"].size(),
            "efficiency_mean": with_eff["efficiency"].mean(),
            "efficiency_min": with_eff["efficiency"].min(),
            "efficiency_max": with_eff["efficiency"].max(),
            "first_utc": with_eff["started_utc"].min(),
            "last_utc": with_eff["started_utc"].max(),
        },
        index=order.index,
    )
    out["n_points_without_efficiency"] = (~has).groupby(points["dut_revision"], sort=False).sum().reindex(order.index)
    for c in ("n_runs", "n_points", "n_points_without_efficiency"):
        out[c] = out[c].fillna(0).astype("int64")
    out["_order"] = order
    out = out.rename_axis("dut_revision").reset_index()
    return out.sort_values(["_order", "dut_revision"], kind="stable").reset_index(drop=True).loc[
        :, list(REVISION_SUMMARY_COLUMNS)
    ]


JOB_RUN_COLUMNS = (
    "job_id", "job_name", "job_station", "job_started_utc", "run_id", "procedure", "dut_part", "dut_revision",
    "dut_serial", "status", "started_utc", "ended_utc", "check_exit_code", "check_summary",
)


def job_runs(conn: Connection, *, limit_jobs: int = 50) -> pd.DataFrame:
    """The runs of the newest ``limit_jobs`` jobs, each with its job's name, station and start
    and the outcome of its latest limit check (``check_exit_code``: the ``exit_code`` of the
    run's last ``limit_check`` event, NaN when it was never checked; ``check_summary`` its
    text). Newest job first, then run order. Columns: :data:`JOB_RUN_COLUMNS`."""
    from .codec import from_json

    if limit_jobs < 1:
        raise StoreError(f"limit_jobs must be a positive number of jobs, got {limit_jobs}")
    r, j, d, e = s.runs, s.jobs, s.duts, s.events
    newest = (select(r.c.job_id).where(r.c.job_id.is_not(None)).group_by(r.c.job_id)
              .order_by(r.c.job_id.desc()).limit(int(limit_jobs))).subquery()
    rows = conn.execute(
        select(r.c.job_id, j.c.name.label("job_name"), j.c.station_name, j.c.started_utc_s.label("job_started"),
               r.c.id.label("run_id"), r.c.procedure, d.c.part_number, d.c.revision, d.c.serial, r.c.status,
               r.c.started_utc_s, r.c.ended_utc_s)
        .select_from(r.join(newest, newest.c.job_id == r.c.job_id).outerjoin(j, j.c.id == r.c.job_id)
                     .outerjoin(d, d.c.id == r.c.dut_id))
        .order_by(r.c.job_id.desc(), r.c.id)
    ).all()
    run_ids = [row.run_id for row in rows]
    checks: dict[int, tuple[float, str]] = {}
    if run_ids:
        for ev in conn.execute(select(e.c.run_id, e.c.message, e.c.details_json)
                               .where(e.c.run_id.in_(run_ids), e.c.kind == "limit_check").order_by(e.c.id)):
            details = from_json(ev.details_json)
            code = details.get("exit_code") if isinstance(details, dict) else None
            checks[ev.run_id] = (float(code) if isinstance(code, (int, float)) else math.nan, ev.message)
    return pd.DataFrame({
        "job_id": pd.Series([row.job_id for row in rows], dtype="int64"),
        "job_name": pd.Series([row.job_name or "" for row in rows], dtype="object"),
        "job_station": pd.Series([row.station_name or "" for row in rows], dtype="object"),
        "job_started_utc": _utc_series([row.job_started for row in rows]),
        "run_id": pd.Series(run_ids, dtype="int64"),
        "procedure": pd.Series([row.procedure for row in rows], dtype="object"),
        "dut_part": pd.Series([row.part_number or "" for row in rows], dtype="object"),
        "dut_revision": pd.Series([row.revision or "" for row in rows], dtype="object"),
        "dut_serial": pd.Series([row.serial or "" for row in rows], dtype="object"),
        "status": pd.Series([row.status for row in rows], dtype="object"),
        "started_utc": _utc_series([row.started_utc_s for row in rows]),
        "ended_utc": _utc_series([row.ended_utc_s for row in rows]),
        "check_exit_code": pd.Series([checks.get(i, (math.nan, ""))[0] for i in run_ids], dtype="float64"),
        "check_summary": pd.Series([checks.get(i, (math.nan, ""))[1] for i in run_ids], dtype="object"),
    }).loc[:, list(JOB_RUN_COLUMNS)]
