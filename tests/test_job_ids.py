"""Job ids come from the database: stations starting jobs at once never share one, and a job's
runs keep one job id (a new one, by job_uuid) when they are copied to another database."""

from __future__ import annotations

import os
import subprocess
import sys
import threading
from pathlib import Path

from sqlalchemy import create_engine, select
from sqlalchemy.pool import NullPool

from benchctl.store import RunStart, Store
from benchctl.store import schema as s
from benchctl.store.url import normalize_url

REPO = Path(__file__).resolve().parents[1]


def _jobs(url: str) -> list[dict]:
    engine = create_engine(normalize_url(url), poolclass=NullPool)
    try:
        with engine.connect() as conn:
            return [dict(r._mapping) for r in conn.execute(select(s.jobs).order_by(s.jobs.c.id))]
    finally:
        engine.dispose()


def test_jobs_begun_before_either_records_a_run_get_different_ids(store_url):
    # With "largest job id of the stored runs + 1" both would get 1: neither has a run yet.
    with Store.open(store_url) as a, Store.open(store_url) as b:
        ids = [a.begin_job("nightly", "bench-1"), b.begin_job("nightly", "bench-2")]
    assert len(set(ids)) == 2


def test_many_stations_beginning_jobs_at_the_same_moment_on_postgresql(pg_url):
    Store.open(pg_url).close()
    n = 8
    barrier = threading.Barrier(n)
    ids: list[int] = []
    errors: list[BaseException] = []

    def station(k: int) -> None:
        try:
            with Store.open(pg_url) as store:  # a connection of its own, like a station
                barrier.wait(timeout=60)
                ids.append(store.begin_job("nightly", f"bench-{k}"))
        except BaseException as exc:  # reported below
            errors.append(exc)

    threads = [threading.Thread(target=station, args=(k,)) for k in range(n)]
    for t in threads:
        t.start()
    for t in threads:
        t.join(timeout=120)
    assert not errors, errors
    assert len(ids) == n and len(set(ids)) == n
    assert sorted(ids) == sorted(j["id"] for j in _jobs(pg_url))


def test_two_benchctl_jobs_at_once_on_postgresql_get_different_ids(pg_url, simulated_bench, tmp_path):
    Store.open(pg_url).close()
    job_file = tmp_path / "short.toml"
    job_file.write_text('[job]\nname = "short"\n\n[[step]]\nprocedure = "efficiency_map"\n'
                        '[step.parameters]\nvin_v = [48.0]\nload_pct = [50.0]\n', encoding="utf-8")
    procs = []
    for k in range(2):
        bench = simulated_bench("flyback-48v-5v", time_scale=50.0, seed=k + 1)
        station = bench.write_station(tmp_path / f"bench-{k}.toml", name=f"bench-{k}")
        procs.append(subprocess.Popen(
            [sys.executable, "-m", "benchctl.cli", "job", str(job_file), "--station", str(station), "--db", pg_url],
            cwd=tmp_path, stdout=subprocess.PIPE, stderr=subprocess.STDOUT, text=True,
            env={**os.environ, "PYTHONPATH": str(REPO)}))
    outputs = [p.communicate(timeout=300)[0] for p in procs]
    assert [p.returncode for p in procs] == [0, 0], outputs
    with Store.open(pg_url) as store:
        runs = store.runs()
    assert len(runs) == 2
    assert runs["job_id"].notna().all() and runs["job_id"].nunique() == 2
    jobs = {j["id"]: j for j in _jobs(pg_url)}
    assert {jobs[int(j)]["station_name"] for j in runs["job_id"]} == {"bench-0", "bench-1"}


def _station_with_a_job(path: Path, station: str) -> tuple[int, str]:
    with Store.open(path) as store:
        job_id = store.begin_job("nightly", station)
        for serial in ("A1", "A2"):
            run_id = store.begin_run(RunStart(procedure="efficiency_map", procedure_sha256="0" * 64,
                                              station_name=station, dut_part="FB-48S05", dut_serial=serial,
                                              job_id=job_id))
            store.record_point(run_id, {"vin_set_v": 48.0})
            store.end_run(run_id, "completed")
    return job_id, _jobs(str(path))[0]["job_uuid"]


def test_copied_runs_keep_their_job_apart_from_other_stations_jobs(tmp_path, store_url):
    one = _station_with_a_job(tmp_path / "bench-1.db", "bench-1")
    two = _station_with_a_job(tmp_path / "bench-2.db", "bench-2")
    assert one[0] == two[0] == 1  # each station's own file numbers its first job 1
    with Store.open(store_url) as shared:
        for name in ("bench-1.db", "bench-2.db"):
            with Store.open(tmp_path / name) as source:
                shared.copy_runs_from(source)
                shared.copy_runs_from(source)  # twice: nothing new
        runs = shared.runs()
    jobs = {j["job_uuid"]: j for j in _jobs(store_url)}
    assert set(jobs) == {one[1], two[1]}  # each job once, under its own UUID
    by_station = runs.groupby("station")["job_id"].agg(lambda ids: set(int(i) for i in ids))
    assert by_station["bench-1"] == {jobs[one[1]]["id"]} and by_station["bench-2"] == {jobs[two[1]]["id"]}
    assert jobs[one[1]]["id"] != jobs[two[1]]["id"]
    # Exporting for review carries the job row too (same UUID, the file's own id).
    out = tmp_path / "review.db"
    with Store.open(store_url) as shared, Store.open(out) as target:
        target.copy_runs_from(shared)
    assert {j["job_uuid"] for j in _jobs(str(out))} == {one[1], two[1]}
