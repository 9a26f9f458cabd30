"""Durable logging speed: the store's writer vs raw sqlite3 with the same durability.

Both commit every point before the next (WAL, synchronous=FULL), writing a point row and
ten quantity values. Prints points/s of each and their ratio, measured in one run.

    python benchmarks/store_writer.py [--points 500]
"""

from __future__ import annotations

import argparse
import sqlite3
import tempfile
import time
from pathlib import Path

from benchctl.store import RunStart, Store

NAMES = ["vin_set_v", "iout_set_a", "vin_v", "iin_a", "pin_w", "vout_v", "iout_a", "pout_w", "t_case_c", "duty"]


def raw_sqlite(path: Path, n: int) -> float:
    con = sqlite3.connect(path, isolation_level=None)
    con.execute("PRAGMA journal_mode=WAL")
    con.execute("PRAGMA synchronous=FULL")
    con.execute("CREATE TABLE points (id INTEGER PRIMARY KEY, run_id INTEGER, seq INTEGER, t REAL, tag TEXT)")
    con.execute("CREATE TABLE point_values (point_id INTEGER, quantity_id INTEGER, value REAL)")
    t0 = time.perf_counter()
    for k in range(n):
        con.execute("BEGIN IMMEDIATE")
        cur = con.execute("INSERT INTO points (run_id, seq, t, tag) VALUES (?, ?, ?, ?)", (1, k + 1, time.time(), "a"))
        pid = cur.lastrowid
        con.executemany("INSERT INTO point_values VALUES (?, ?, ?)", [(pid, q, 1.0 + k + q) for q in range(len(NAMES))])
        con.execute("COMMIT")
    elapsed = time.perf_counter() - t0
    con.close()
    return n / elapsed


def store_writer(path: Path, n: int) -> float:
    with Store.open(str(path)) as store:
        run_id = store.begin_run(RunStart(procedure="bench", procedure_sha256="0" * 64, station_name="bench"))
        store.record_point(run_id, {name: 0.0 for name in NAMES})  # quantities known from here on
        t0 = time.perf_counter()
        for k in range(n):
            store.record_point(run_id, {name: 1.0 + k + q for q, name in enumerate(NAMES)}, tag="a")
        elapsed = time.perf_counter() - t0
    return n / elapsed


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--points", type=int, default=500)
    args = ap.parse_args()
    with tempfile.TemporaryDirectory(dir=".") as tmp:
        raw = raw_sqlite(Path(tmp) / "raw.db", args.points)
        ours = store_writer(Path(tmp) / "store.db", args.points)
    print(f"raw sqlite3 : {raw:8.0f} points/s (WAL, synchronous=FULL, one commit per point)")
    print(f"store writer: {ours:8.0f} points/s (same durability)")
    print(f"ratio raw / writer = {raw / ours:.2f}  (time per point, writer relative to raw)")


if __name__ == "__main__":
    main()
