"""Four stations write to one PostgreSQL database at the same time.

Each station is a separate process with its own simulated bench (its own SCPI servers on
127.0.0.1) running a short efficiency map through ``benchctl.runner.execute``; the test
process reads the database while they write. Afterwards every planned point of every run
must be stored exactly once, with all its values, and nothing may have deadlocked.
"""

from __future__ import annotations

import json
import subprocess
import sys
import textwrap
from pathlib import Path

import numpy as np
from sqlalchemy import create_engine, text
from sqlalchemy.pool import NullPool

from benchctl.store import Store

REPO = Path(__file__).resolve().parents[1]
N_STATIONS = 4
REVISIONS = ("A", "B", "A", "B")

STATION = textwrap.dedent(
    """
    import json, sys
    from pathlib import Path
    url, name, revision, seed, folder, repo = sys.argv[1:7]
    sys.path.insert(0, repo)
    from benchctl.simulated_instruments.bench import SimulatedBench
    from benchctl.procedure import load_procedure
    from benchctl.runner import DutInfo, execute
    from benchctl.station import load_station
    from benchctl.store import Store

    bench = SimulatedBench("flyback-48v-5v", time_scale=50.0, seed=int(seed)).start()
    try:
        station = load_station(bench.write_station(Path(folder) / f"{name}.toml", name=name))
        emap = load_procedure("efficiency_map")
        params = emap.resolve_parameters(values={**bench.procedure_parameters(), "load_pct": [50, 100]})
        with Store.open(url) as store:
            outcome = execute(emap, params, station, store, dut=DutInfo("FB-48S05", revision, "SN" + seed))
        print(json.dumps({"run_id": outcome.run_id, "status": outcome.status, "points": outcome.points,
                          "message": outcome.message, "station": name}), flush=True)
    finally:
        bench.stop()
    """
)


def test_four_stations_write_at_once_and_every_point_is_stored_once(pg_url, tmp_path):
    Store.open(pg_url).close()  # the schema exists before the stations start (they would create it too)
    procs = [
        subprocess.Popen(
            [sys.executable, "-c", STATION, pg_url, f"station-{k}", REVISIONS[k], str(k + 1), str(tmp_path), str(REPO)],
            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
        )
        for k in range(N_STATIONS)
    ]
    snapshots = 0
    try:
        with Store.open(pg_url, recover=False) as reader:
            # reads go on while the stations write: every point a reader sees is whole and in order
            while any(p.poll() is None for p in procs):
                for run_id in reader.runs()["run_id"]:
                    frame = reader.points(int(run_id))
                    assert frame["seq"].tolist() == list(range(1, len(frame) + 1))
                    if len(frame):
                        assert not frame[["vin_v", "iin_a", "pin_w", "vout_v", "iout_a", "pout_w"]].isna().any().any()
                    snapshots += 1
        outputs = [p.communicate(timeout=120) for p in procs]
    finally:
        for p in procs:
            if p.poll() is None:
                p.kill()
                p.wait()
    outcomes = []
    for proc, (out, err) in zip(procs, outputs):
        assert proc.returncode == 0, err[-3000:]
        outcomes.append(json.loads(out.strip().splitlines()[-1]))
    assert snapshots > 0
    assert all(o["status"] == "completed" for o in outcomes), outcomes
    run_ids = [o["run_id"] for o in outcomes]
    assert len(set(run_ids)) == N_STATIONS  # no two stations got the same run

    with Store.open(pg_url, recover=False) as store:
        runs = store.runs()
        assert sorted(runs["run_id"]) == sorted(run_ids)
        for o in outcomes:
            info = store.run(o["run_id"])
            assert info.station_name == o["station"]  # each run's points stay in their run
            points = store.points(o["run_id"])
            assert len(points) == o["points"] > 0
            assert points["seq"].tolist() == list(range(1, o["points"] + 1))
            # every point was measured at its own station's setpoints: Pin = Vin * Iin within meter noise
            assert np.allclose(points["pin_w"], points["vin_v"] * points["iin_a"], rtol=2e-3, atol=2e-3)
    # nothing lost or doubled, counted with plain SQL independent of the store's queries
    engine = create_engine(pg_url, poolclass=NullPool)
    with engine.connect() as conn:
        per_run = dict(conn.execute(text("SELECT run_id, count(*) FROM points GROUP BY run_id")).all())
        doubled = conn.execute(text("SELECT count(*) FROM (SELECT run_id, seq FROM points GROUP BY run_id, seq "
                                    "HAVING count(*) > 1) AS d")).scalar()
        orphan_values = conn.execute(text(
            "SELECT count(*) FROM point_values v LEFT JOIN points p ON p.run_id = v.run_id AND p.seq = v.seq "
            "WHERE p.seq IS NULL")).scalar()
        values_per_point = conn.execute(text(
            "SELECT DISTINCT c FROM (SELECT count(*) AS c FROM point_values GROUP BY run_id, seq) AS x")).scalars().all()
    engine.dispose()
    assert per_run == {o["run_id"]: o["points"] for o in outcomes}
    assert doubled == 0 and orphan_values == 0
    assert len(values_per_point) == 1  # every point has all its values
