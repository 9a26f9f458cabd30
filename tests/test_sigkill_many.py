"""SIGKILL of a run at 20 seeded random moments: nothing committed is ever lost.

One simulated bench serves every run; each run is a separate ``python -m benchctl.cli
run`` process writing into the same SQLite file, killed after a random number of
committed points or a random delay. Afterwards the file passes
``PRAGMA integrity_check`` (SQLite documentation, "PRAGMA integrity_check"), every run
is marked interrupted (design rule 4: the next open of the store marks it), and every
point seen committed before the kill is still there, numbered 1..n.
"""

from __future__ import annotations

import os
import signal
import sqlite3
import subprocess
import sys
import time

import numpy as np

KILLS = 20
SEED = 20240607


def _committed(db, run_id: int) -> int:
    try:
        con = sqlite3.connect(f"file:{db}?mode=ro", uri=True, timeout=1)
        try:
            return con.execute("select count(*) from points where run_id = ?", (run_id,)).fetchone()[0]
        finally:
            con.close()
    except sqlite3.Error:
        return 0


def _runs(db) -> int:
    try:
        con = sqlite3.connect(f"file:{db}?mode=ro", uri=True, timeout=1)
        try:
            return con.execute("select count(*) from runs").fetchone()[0]
        finally:
            con.close()
    except sqlite3.Error:
        return 0


def test_twenty_kills_lose_nothing(simulated_bench, tmp_path):
    from benchctl.store import Store

    bench = simulated_bench("flyback-48v-5v", time_scale=5.0)
    station = bench.write_station(tmp_path / "st.toml")
    db = tmp_path / "kills.db"
    Store.open(str(db)).close()  # the schema exists before the first process starts
    rng = np.random.default_rng(SEED)
    env = {**os.environ, "PYTHONUNBUFFERED": "1"}
    seen: dict[int, int] = {}
    for k in range(KILLS):
        by_points = bool(rng.integers(0, 2))
        target_points = int(rng.integers(0, 8))
        delay_s = float(rng.uniform(0.0, 0.6))
        runs_before = _runs(db)
        proc = subprocess.Popen(
            [sys.executable, "-m", "benchctl.cli", "run", "efficiency_map", "--station", str(station), "--db", str(db),
             "--set", "vin_v=40,48,60", "--set", "load_pct=0,10,20,30,40,50,60,70,80,90,100", "--json"],
            stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, env=env,
        )
        try:
            deadline = time.monotonic() + 60
            while _runs(db) == runs_before and time.monotonic() < deadline and proc.poll() is None:
                time.sleep(0.01)  # the run has begun (its row is committed)
            run_id = runs_before + 1
            start = time.monotonic()
            count = 0
            while proc.poll() is None and time.monotonic() < deadline:
                count = _committed(db, run_id)
                if (by_points and count >= target_points) or (not by_points and time.monotonic() - start >= delay_s):
                    break
                time.sleep(0.005)
            count = _committed(db, run_id)  # committed before the kill
            proc.send_signal(signal.SIGKILL)
            proc.wait(timeout=10)
        finally:
            if proc.poll() is None:
                proc.kill()
        assert proc.returncode == -signal.SIGKILL, f"kill {k}: the run ended by itself before the kill"
        seen[run_id] = count

    con = sqlite3.connect(db)
    assert con.execute("pragma integrity_check").fetchone()[0] == "ok"
    con.close()
    with Store.open(str(db)) as store:  # this open marks the last killed run interrupted too
        for run_id, count in seen.items():
            info = store.run(run_id)
            assert info.status == "interrupted", (run_id, info.status)
            points = store.points(run_id)
            assert len(points) >= count, (run_id, len(points), count)
            if len(points):
                assert list(points["seq"]) == list(range(1, len(points) + 1))
                assert points[["vin_v", "iin_a", "pin_w", "vout_v", "iout_a", "pout_w"]].notna().all().all()
    assert len(seen) == KILLS and sum(seen.values()) > 0
