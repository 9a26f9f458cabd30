"""A reader (report, CLI) and the writer of a run share one SQLite file in WAL mode."""

from __future__ import annotations

import hashlib
import sqlite3
import threading

from benchctl.store import RunStart, Store


def _start() -> RunStart:
    return RunStart(procedure="efficiency_map", procedure_sha256=hashlib.sha256(b"e").hexdigest(),
                    station_name="sim-flyback", dut_part="FB-48-5")


def test_open_read_transaction_does_not_block_the_writer(tmp_path):
    # SQLite docs, "Write-Ahead Logging" §2.2 (Concurrency): readers do not block writers and a
    # writer does not block readers; a read transaction keeps seeing the snapshot it began with.
    # In rollback-journal mode the writer's COMMIT would wait for this reader and fail after the
    # 0.5 s busy timeout.
    path = tmp_path / "wal.db"
    with Store.open(path, busy_timeout_s=0.5) as store:
        run_id = store.begin_run(_start())
        store.record_point(run_id, {"vin_v": 36.0})

        reader = sqlite3.connect(path, isolation_level=None)
        try:
            reader.execute("BEGIN")
            assert reader.execute("SELECT count(*) FROM points").fetchone()[0] == 1
            for vin_v in (48.0, 60.0, 75.0):
                store.record_point(run_id, {"vin_v": vin_v})  # must not raise "database is locked"
            # still inside its transaction: the reader's snapshot is unchanged
            assert reader.execute("SELECT count(*) FROM points").fetchone()[0] == 1
            reader.execute("COMMIT")
            assert reader.execute("SELECT count(*) FROM points").fetchone()[0] == 4
        finally:
            reader.close()
        assert store.last_point(run_id) == 4


def test_reader_store_follows_a_writer_thread(tmp_path):
    path = tmp_path / "follow.db"
    n_points = 150
    with Store.open(path) as writer_store:
        run_id = writer_store.begin_run(_start())
        errors: list[BaseException] = []
        done = threading.Event()

        def write() -> None:
            try:
                for k in range(n_points):
                    writer_store.record_point(run_id, {"vin_v": 36.0 + k % 40, "iout_a": 0.01 * k, "k": float(k)})
            except BaseException as exc:  # reported by the main thread
                errors.append(exc)
            finally:
                done.set()

        seen: list[int] = []
        with Store.open(path) as reader_store:  # a separate engine: its own SQLite connections
            thread = threading.Thread(target=write)
            thread.start()
            while not done.is_set() or len(seen) < 2:
                frame = reader_store.points(run_id)
                if len(frame):  # every point a reader sees is complete (one transaction per point)
                    assert not frame[["vin_v", "iout_a", "k"]].isna().any().any()
                assert frame["seq"].tolist() == list(range(1, len(frame) + 1))
                seen.append(len(frame))
                if done.is_set():
                    break
            thread.join(timeout=30)
            assert not errors, errors
            final = reader_store.points(run_id)
        assert seen == sorted(seen)  # committed points never disappear
        assert len(seen) >= 2
        assert len(final) == n_points
        assert final["k"].tolist() == [float(k) for k in range(n_points)]
