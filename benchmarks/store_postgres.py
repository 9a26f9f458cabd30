"""Points per second into the store, against the bare database driver, measured in one run.

PostgreSQL: 1, 2 and 4 writer processes at once, each its own run, every point committed
before the next (``Store.record_point``), against raw psycopg doing the same INSERTs and
one COMMIT per point. SQLite: the store's fast path against raw sqlite3 with the same
pragmas (WAL, synchronous=FULL) and one transaction per point.

    python benchmarks/store_postgres.py [--pg-url URL] [--points N]

The PostgreSQL URL defaults to $BENCHCTL_TEST_PG_URL (``.ci/run`` starts such a server);
without one only the SQLite part runs. Tables are made in a schema of their own, dropped
at the end. Prints ratios (store / raw); nothing here asserts a time.
"""

from __future__ import annotations

import argparse
import multiprocessing as mp
import os
import sqlite3
import sys
import tempfile
import time
import uuid
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from benchctl.store import RunStart, Store, mask_url  # noqa: E402

VALUES = ("vin_v", "iin_a", "pin_w", "vout_v", "iout_a", "pout_w")


def _start(name: str) -> RunStart:
    return RunStart(procedure="benchmark", procedure_sha256="b" * 64, station_name=name, dut_part="FB-48S05")


def _values(k: int) -> dict[str, float]:
    return {"vin_v": 36.0 + k % 40, "iin_a": 0.3, "pin_w": 11.0, "vout_v": 5.0, "iout_a": 2.0, "pout_w": 10.0}


def _store_writer(url: str, n: int, barrier, out) -> None:  # type: ignore[no-untyped-def]
    with Store.open(url, recover=False) as store:
        run_id = store.begin_run(_start(f"writer-{os.getpid()}"))
        store.record_point(run_id, _values(0))  # creates the quantities; not timed
        barrier.wait()
        t0 = time.perf_counter()
        for k in range(n):
            store.record_point(run_id, _values(k))
        out.put(time.perf_counter() - t0)


def _raw_pg_writer(url: str, n: int, barrier, out) -> None:  # type: ignore[no-untyped-def]
    import psycopg
    from sqlalchemy.engine import make_url

    with Store.open(url, recover=False) as store:  # the run and its quantities, as the store makes them
        run_id = store.begin_run(_start(f"raw-{os.getpid()}"))
        store.record_point(run_id, _values(0))
    sa_url = make_url(url)
    conninfo = sa_url.set(drivername="postgresql").render_as_string(hide_password=False)
    with psycopg.connect(conninfo) as conn:
        ids = dict(conn.execute("SELECT name, id FROM quantities WHERE run_id = %s", (run_id,)).fetchall())
        conn.commit()
        barrier.wait()
        t0 = time.perf_counter()
        for k in range(n):
            seq = k + 2
            with conn.cursor() as cur:
                cur.execute("INSERT INTO points (run_id, seq, t_utc_s, tag, settled, settle_time_s) "
                            "VALUES (%s, %s, %s, %s, %s, %s)", (run_id, seq, time.time(), "", True, None))
                cur.executemany("INSERT INTO point_values (run_id, seq, quantity_id, value) VALUES (%s, %s, %s, %s)",
                                [(run_id, seq, ids[name], v) for name, v in _values(k).items()])
            conn.commit()
        out.put(time.perf_counter() - t0)


def _parallel(target, url: str, writers: int, n: int) -> float:  # type: ignore[no-untyped-def]
    """Points per second of ``writers`` processes together (wall time of the slowest)."""
    ctx = mp.get_context("spawn")
    barrier, out = ctx.Barrier(writers), ctx.Queue()
    procs = [ctx.Process(target=target, args=(url, n, barrier, out)) for _ in range(writers)]
    for p in procs:
        p.start()
    times = [out.get(timeout=600) for _ in procs]
    for p in procs:
        p.join()
        if p.exitcode != 0:
            raise SystemExit(f"a writer process failed (exit {p.exitcode})")
    return writers * n / max(times)


def _pg_schema(server_url: str):  # type: ignore[no-untyped-def]
    from sqlalchemy import create_engine, text
    from sqlalchemy.engine import make_url
    from sqlalchemy.pool import NullPool

    schema = f"bench_{uuid.uuid4().hex[:12]}"
    engine = create_engine(server_url, poolclass=NullPool)
    with engine.begin() as conn:
        conn.execute(text(f'CREATE SCHEMA "{schema}"'))
    url = make_url(server_url).update_query_dict({"options": f"-csearch_path={schema}"})

    def drop() -> None:
        with engine.begin() as conn:
            conn.execute(text(f'DROP SCHEMA "{schema}" CASCADE'))
        engine.dispose()

    return url.render_as_string(hide_password=False), drop


def bench_postgres(server_url: str, n: int) -> None:
    url, drop = _pg_schema(server_url)
    try:
        Store.open(url).close()
        print(f"PostgreSQL at {mask_url(server_url)}, {n} points per writer, {len(VALUES)} values per point, "
              "COMMIT per point")
        print(f"{'writers':>8} {'store pts/s':>12} {'raw pts/s':>11} {'store/raw':>10}")
        for writers in (1, 2, 4):
            store_rate = _parallel(_store_writer, url, writers, n)
            raw_rate = _parallel(_raw_pg_writer, url, writers, n)
            print(f"{writers:>8} {store_rate:>12.0f} {raw_rate:>11.0f} {store_rate / raw_rate:>10.2f}")
    finally:
        drop()


def bench_sqlite(n: int) -> None:
    with tempfile.TemporaryDirectory(dir=".") as folder:  # in the working directory, as every benchmark
        path = Path(folder) / "bench.db"
        with Store.open(path, recover=False) as store:
            run_id = store.begin_run(_start("sqlite-store"))
            store.record_point(run_id, _values(0))
            t0 = time.perf_counter()
            for k in range(n):
                store.record_point(run_id, _values(k))
            store_rate = n / (time.perf_counter() - t0)
            raw_run = store.begin_run(_start("sqlite-raw"))
            store.record_point(raw_run, _values(0))
        raw = sqlite3.connect(path, isolation_level=None)
        raw.execute("PRAGMA journal_mode=WAL")
        raw.execute("PRAGMA synchronous=FULL")
        raw.execute("PRAGMA foreign_keys=ON")
        ids = dict(raw.execute("SELECT name, id FROM quantities WHERE run_id = ?", (raw_run,)).fetchall())
        t0 = time.perf_counter()
        for k in range(n):
            seq = k + 2
            raw.execute("BEGIN IMMEDIATE")
            raw.execute("INSERT INTO points (run_id, seq, t_utc_s, tag, settled, settle_time_s) VALUES (?, ?, ?, ?, ?, ?)",
                        (raw_run, seq, time.time(), "", 1, None))
            raw.executemany("INSERT INTO point_values (run_id, seq, quantity_id, value) VALUES (?, ?, ?, ?)",
                            [(raw_run, seq, ids[name], v) for name, v in _values(k).items()])
            raw.execute("COMMIT")
        raw_rate = n / (time.perf_counter() - t0)
        raw.close()
    print(f"SQLite (WAL, synchronous=FULL), 1 writer, {n} points: store {store_rate:.0f} pts/s, "
          f"raw sqlite3 {raw_rate:.0f} pts/s, store/raw {store_rate / raw_rate:.2f}")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--pg-url", default=os.environ.get("BENCHCTL_TEST_PG_URL"), help="PostgreSQL server URL")
    parser.add_argument("--points", type=int, default=500, help="points per writer (default 500)")
    args = parser.parse_args()
    bench_sqlite(args.points)
    if args.pg_url:
        bench_postgres(args.pg_url, args.points)
    else:
        print("no PostgreSQL URL (--pg-url or $BENCHCTL_TEST_PG_URL): PostgreSQL part skipped")


if __name__ == "__main__":
    main()
