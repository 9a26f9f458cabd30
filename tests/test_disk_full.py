"""A full disk mid-run is named as such: in the console message, and as a ``disk_full`` event
where one still fits; every committed point is kept and the run can be resumed once there is
space again. The outputs end off (the simulated instruments' audit logs).

How the disk fills: SQLite's own size limit, ``PRAGMA max_page_count``, which fails a write
with SQLITE_FULL, "database or disk is full", exactly as a full disk does (SQLite docs,
"PRAGMA max_page_count", "Result and Error Codes"); and the DB-API patched to raise that
error (sqlite3.OperationalError) for every write after a given point, for the case where
nothing at all fits any more.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
import textwrap

from benchctl.cli import EXIT_INSTRUMENT, EXIT_OK, main
from benchctl.procedure import load_procedure
from benchctl.runner import execute
from benchctl.station import load_station
from benchctl.store import Store

VALUES = {"vin_v": [36.0, 48.0], "load_pct": [0.0, 25.0, 50.0, 75.0, 100.0]}


def _outputs_ended_off(bench) -> None:
    src = bench.instruments["source"].audit.states("output")
    load = bench.instruments["load"].audit.states("input")
    assert src and src[-1].value is False
    assert load and load[-1].value is False


def test_the_database_size_limit_is_named_and_the_committed_points_kept(simulated_bench, tmp_path, monkeypatch):
    import benchctl.store.store as store_module
    from sqlalchemy import event

    connections = []
    real_make_engine = store_module.make_engine

    def make_engine(url, busy_timeout_s, **kwargs):
        engine = real_make_engine(url, busy_timeout_s, **kwargs)
        event.listen(engine, "connect", lambda dbapi_conn, _record: connections.append(dbapi_conn))
        return engine

    monkeypatch.setattr(store_module, "make_engine", make_engine)

    def fill_the_disk(done, total, values):
        if done == 3:  # from now on the database may not grow by a single page
            for conn in connections:
                pages = conn.execute("PRAGMA page_count").fetchone()[0]
                conn.execute(f"PRAGMA max_page_count = {pages}")

    bench = simulated_bench("flyback-48v-5v", time_scale=50.0)
    station = load_station(bench.write_station(tmp_path / "bench.toml"))
    emap = load_procedure("efficiency_map")
    params = emap.resolve_parameters(values={**bench.procedure_parameters(), **VALUES})
    with Store.open(tmp_path / "runs.db") as store:
        outcome = execute(emap, params, station, store, progress=fill_the_disk)
    assert outcome.status == "failed"
    assert "the disk holding the database is full" in outcome.message and "writing point" in outcome.message
    assert "nothing of it was written; everything committed before is kept" in outcome.message
    _outputs_ended_off(bench)
    monkeypatch.undo()  # space again
    with Store.open(tmp_path / "runs.db") as store:
        points = store.points(outcome.run_id)
        events = store.events(outcome.run_id)
    assert 3 <= len(points) < 10 and list(points["seq"]) == list(range(1, len(points) + 1))
    assert list(points["plan_index"]) == list(range(len(points)))  # whole planned points, in order
    full = events[events["kind"] == "disk_full"]
    assert len(full) == 1 and "writing point" in full.iloc[0]["message"]  # a small event still fitted


FULL_AFTER = textwrap.dedent("""
    import sqlite3, sys
    state = {"points": 0}
    class Cursor(sqlite3.Cursor):
        def _check(self, sql):
            words = sql.split()
            if words[:3] == ["INSERT", "INTO", "points"]:
                state["points"] += 1
            if state["points"] > int(sys.argv[1]) and words and words[0].upper() in ("INSERT", "UPDATE", "DELETE"):
                raise sqlite3.OperationalError("database or disk is full")
        def execute(self, sql, *a):
            self._check(sql)
            return super().execute(sql, *a)
        def executemany(self, sql, *a):
            self._check(sql)
            return super().executemany(sql, *a)
    class Connection(sqlite3.Connection):
        def cursor(self, factory=None):
            return super().cursor(factory or Cursor)
    real = sqlite3.dbapi2.connect
    def connect(*args, **kwargs):
        kwargs.setdefault("factory", Connection)
        return real(*args, **kwargs)
    sqlite3.dbapi2.connect = connect
    from benchctl.cli import main
    sys.exit(main(sys.argv[2:]))
""")


def test_a_disk_too_full_for_anything_names_the_first_failure_and_the_run_resumes(simulated_bench, tmp_path,
                                                                                 capsys):
    bench = simulated_bench("flyback-48v-5v", time_scale=50.0)
    station = bench.write_station(tmp_path / "bench.toml")
    db = tmp_path / "runs.db"
    args = ["run", "efficiency_map", "--station", str(station), "--db", str(db), "--json",
            "--set", "vin_v=36,48", "--set", "load_pct=0,25,50,75,100"]
    proc = subprocess.run([sys.executable, "-c", FULL_AFTER, "4", *args], capture_output=True, text=True,
                          timeout=300, env={**os.environ, "COLUMNS": "400"})
    assert proc.returncode == EXIT_INSTRUMENT, proc.stderr
    errors = [line for line in proc.stderr.splitlines() if line.startswith("error:")]
    assert len(errors) == 1, proc.stderr
    # The one message names the full disk and the write that met it first (not a later one alone).
    assert "the disk holding the database is still full (writing point 5 of run 1 failed first)" in errors[0]
    assert "benchctl run --resume 1" in errors[0]
    assert "Traceback" not in proc.stderr
    _outputs_ended_off(bench)
    with Store.open(db) as store:  # space again; the dead run is found interrupted
        info = store.run(1)
        assert info.status == "interrupted" and info.n_points == 4
    assert main(["run", "--resume", "1", "--station", str(station), "--db", str(db), "--json"]) == EXIT_OK
    assert json.loads(capsys.readouterr().out.strip().splitlines()[-1])["status"] == "completed"
    with Store.open(db) as store:
        points = store.points(1)
    assert len(points) == 10 and sorted(points["plan_index"]) == list(range(10))
