"""Moving runs from a station's SQLite file into the shared database (SQLite or PostgreSQL
target, ``store_url``): everything is copied, provenance included, and importing twice
changes nothing."""

from __future__ import annotations

import dataclasses
import hashlib

import numpy as np
import pandas as pd
import pytest
from sqlalchemy import create_engine, func, select
from sqlalchemy.engine import make_url
from sqlalchemy.pool import NullPool

from benchctl.errors import StoreError
from benchctl.store import InstrumentInfo, RunStart, Store
from benchctl.store import schema as s
from benchctl.store.url import normalize_url

STATION_TEXT = '[station]\nname = "bench-3"\ndescription = "36-75 V flyback bench"\n'


def _start(serial: str, revision: str = "A") -> RunStart:
    return RunStart(
        procedure="efficiency_map", procedure_sha256=hashlib.sha256(b"emap").hexdigest(), station_name="bench-3",
        station_description="36-75 V flyback bench", station_text=STATION_TEXT,
        parameters={"vin_v": [36.0, 48.0, 75.0]},
        instruments=[InstrumentInfo("source", "dc_source", "TCPIP::127.0.0.1::5025::SOCKET", "SIM,DCS,1,1.0")],
        dut_part="FB-48S05", dut_revision=revision, dut_serial=serial, operator="night-shift", host="bench-pc-3",
        pid=4242, job_id=7,
    )


def _station_file(path) -> tuple[list[int], int]:
    """Two ended runs (points, events, results, arrays) and one still running."""
    with Store.open(path, recover=False) as st:
        ended = []
        for serial in ("T1", "T2"):
            run_id = st.begin_run(_start(serial))
            for k, vin in enumerate((36.0, 48.0, 75.0)):
                pin = 10.0 + 0.01 * vin
                st.record_point(run_id, {"vin_set_v": vin, "iout_set_a": 2.0, "pin_w": pin, "pout_w": 10.0 - 0.5,
                                         "vout_v": float("nan") if k == 1 else 5.0}, tag="ascending",
                                settled=k != 2, settle_time_s=0.1 * k)
            st.record_event(run_id, "warning", "slow settle", {"vin_v": 75.0}, point_seq=3)
            st.record_result(run_id, "peak_efficiency", 0.95, details={"vin_v": 36.0}, scope={"iout_set_a": 2.0})
            st.record_result(run_id, "phase_margin_deg", None, unit="deg", details={"reason": "no crossover"})
            st.record_array(run_id, "bode", {"freq_hz": np.logspace(1, 5, 7), "h": np.exp(1j * np.arange(7.0))},
                            point_seq=2, meta={"injection_v": 0.01})
            st.end_run(run_id, "completed")
            ended.append(run_id)
        running = st.begin_run(_start("T3"))
        st.record_point(running, {"vin_set_v": 48.0, "iout_set_a": 1.0, "pin_w": 5.5, "pout_w": 5.0})
    return ended, running


def _row_counts(url: str) -> dict[str, int]:
    engine = create_engine(normalize_url(url), poolclass=NullPool)
    try:
        with engine.connect() as conn:
            return {name: int(conn.execute(select(func.count()).select_from(t)).scalar())
                    for name, t in s.metadata.tables.items()}
    finally:
        engine.dispose()


def test_import_copies_everything_and_twice_changes_nothing(tmp_path, store_url):
    station_db = tmp_path / "bench-3.db"
    ended, running = _station_file(station_db)
    with Store.open(station_db, recover=False) as source, Store.open(store_url, recover=False) as shared:
        report = shared.copy_runs_from(source)
        assert [r.action for r in report.runs] == ["copied", "copied", "skipped"]
        assert report.runs[2].source_run_id == running and "still running" in report.runs[2].reason
        for copy in report.runs[:2]:
            a, b = source.run(copy.source_run_id), shared.run(copy.target_run_id)
            # the whole provenance arrives (only the database-local ids differ: run and job)
            assert dataclasses.replace(b, run_id=a.run_id, job_id=a.job_id) == a
            assert b.job_id is not None  # the job travels with its runs (by job_uuid)
            pd.testing.assert_frame_equal(shared.points(b.run_id), source.points(a.run_id))
            assert shared.quantity_units(b.run_id) == source.quantity_units(a.run_id)
            cols = ["t_utc", "kind", "message", "details", "point_seq"]
            ev_a, ev_b = source.events(a.run_id), shared.events(b.run_id)
            pd.testing.assert_frame_equal(ev_b[cols].iloc[:-1].reset_index(drop=True), ev_a[cols])
            copied = ev_b.iloc[-1]
            assert copied["kind"] == "copied"
            assert copied["details"]["source_run_id"] == a.run_id
            assert copied["details"]["source_url"] == source.url
            res = ["name", "value", "unit", "details", "scope", "t_utc"]
            pd.testing.assert_frame_equal(shared.results(b.run_id)[res], source.results(a.run_id)[res])
            arr_a, arr_b = source.array(a.run_id, "bode", 2), shared.array(b.run_id, "bode", 2)
            assert arr_b.meta == arr_a.meta and arr_b.units == arr_a.units
            for name in arr_a:  # bit-exact, complex included
                assert arr_b[name].dtype == arr_a[name].dtype and arr_b[name].tobytes() == arr_a[name].tobytes()
        before = _row_counts(store_url)

        again = shared.copy_runs_from(source)
        assert [r.action for r in again.runs] == ["already present", "already present", "skipped"]
        assert [r.target_run_id for r in again.runs[:2]] == [r.target_run_id for r in report.runs[:2]]
        assert _row_counts(store_url) == before  # importing twice changed nothing

    # the third run ends on its station; the next import brings just that one
    with Store.open(station_db, recover=False) as st:
        st.end_run(running, "interrupted", "operator stopped it")
    with Store.open(station_db, recover=False) as source, Store.open(store_url, recover=False) as shared:
        third = shared.copy_runs_from(source)
        assert [r.action for r in third.runs] == ["already present", "already present", "copied"]
        assert shared.run(third.runs[2].target_run_id).status == "interrupted"
        assert len(shared.runs()) == 3
        # the station and the DUT rows are shared, not duplicated
        counts = _row_counts(store_url)
        assert counts["stations"] == 1 and counts["duts"] == 3


def test_selected_runs_and_a_conflicting_copy(tmp_path, store_url):
    station_db = tmp_path / "bench-3.db"
    ended, _ = _station_file(station_db)
    with Store.open(station_db, recover=False) as source, Store.open(store_url, recover=False) as shared:
        report = shared.copy_runs_from(source, ["latest"], include_running=True)  # the running one, on request
        assert [r.action for r in report.runs] == ["copied"]
        assert shared.run(report.runs[0].target_run_id).status == "running"
    with Store.open(station_db, recover=False) as st:
        latest = st.resolve_run("latest")
        st.record_point(latest, {"vin_set_v": 75.0, "iout_set_a": 1.0, "pin_w": 5.9, "pout_w": 5.0})
        st.end_run(latest, "completed")
    with Store.open(station_db, recover=False) as source, Store.open(store_url, recover=False) as shared:
        conflict = shared.copy_runs_from(source, [latest])
        assert conflict.runs[0].action == "conflict" and "left unchanged" in conflict.runs[0].reason
        assert shared.run(conflict.runs[0].target_run_id).n_points == 1
        with pytest.raises(StoreError, match="no run 99"):
            shared.copy_runs_from(source, [99])
        with pytest.raises(StoreError, match="same store"):
            source.copy_runs_from(source)


def test_export_from_the_shared_database_masks_its_password(tmp_path, store_url):
    station_db = tmp_path / "bench-3.db"
    _station_file(station_db)
    with Store.open(station_db, recover=False) as source, Store.open(store_url, recover=False) as shared:
        shared.copy_runs_from(source)
    out = tmp_path / "export.db"
    with Store.open(store_url, recover=False) as shared, Store.open(out) as target:
        report = target.copy_runs_from(shared)
        assert report.n_copied == 2
        note = target.events(report.runs[0].target_run_id).iloc[-1]["details"]
    password = make_url(store_url).password if "://" in store_url else None
    assert note["source_url"] == report.source_url
    if password:
        assert str(password) not in note["source_url"] and "***" in note["source_url"]
        for part in (out, out.with_name(out.name + "-wal")):  # the file and its write-ahead log
            if part.exists():
                assert str(password).encode() not in part.read_bytes()
