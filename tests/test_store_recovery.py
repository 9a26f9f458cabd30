"""Interrupted runs: a writer killed with SIGKILL keeps every committed point and is
marked ``interrupted`` when the store is next opened."""

from __future__ import annotations

import hashlib
import os
import signal
import socket
import sqlite3
import subprocess
import sys
import textwrap
from pathlib import Path

import pandas as pd
import pytest

from benchctl.store import RunStart, Store

REPO = Path(__file__).resolve().parents[1]

pytestmark = pytest.mark.skipif(os.name != "posix", reason="SIGKILL and kill(pid, 0) are POSIX")

# The child: a flyback efficiency sweep that never ends, printing each seq after record_point returns.
CHILD = textwrap.dedent(
    """
    import sys
    sys.path.insert(0, sys.argv[2])
    from benchctl.store import RunStart, Store, sha256_hex
    store = Store.open(sys.argv[1])
    run_id = store.begin_run(RunStart(procedure="efficiency_map", procedure_sha256=sha256_hex("sweep"),
                                      station_name="sim-flyback", dut_part="FB-48-5", dut_serial="0007"))
    print("run", run_id, flush=True)
    k = 0
    while True:
        k += 1
        vin_v = 36.0 + (k % 40)
        seq = store.record_point(run_id, {"vin_v": vin_v, "iout_a": 0.001 * k, "k": float(k)},
                                 tag="ascending")
        print(seq, flush=True)
    """
)


def _integrity(path: Path) -> str:
    # SQLite docs, "PRAGMA integrity_check": returns the single row 'ok' for an undamaged database
    with sqlite3.connect(path) as raw:
        return raw.execute("PRAGMA integrity_check").fetchone()[0]


def test_sigkill_mid_run_keeps_every_committed_point(tmp_path):
    path = tmp_path / "killed.db"
    proc = subprocess.Popen(
        [sys.executable, "-c", CHILD, str(path), str(REPO)],
        stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
    )
    printed: list[int] = []
    try:
        first = proc.stdout.readline()
        assert first.startswith("run "), f"child failed to start: {first!r} {proc.stderr.read() if proc.poll() is not None else ''}"
        run_id = int(first.split()[1])
        while len(printed) < 60:
            line = proc.stdout.readline()
            assert line, f"child ended early: {proc.stderr.read()}"
            printed.append(int(line))
        # SIGKILL cannot be caught (POSIX.1-2017, <signal.h>): no cleanup code of the child runs
        os.kill(proc.pid, signal.SIGKILL)
        proc.wait(timeout=10)  # reap it: a zombie still answers kill(pid, 0)
        printed += [int(x) for x in proc.stdout.read().split()]
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
        proc.stdout.close()
        proc.stderr.close()
    assert proc.returncode == -signal.SIGKILL

    assert _integrity(path) == "ok"  # before recovery touches the file
    with Store.open(path) as store:
        assert store.recovered_runs == (run_id,)
        info = store.run(run_id)
        assert info.status == "interrupted"
        assert str(proc.pid) in info.message
        wide = store.points(run_id)
        seqs = wide["seq"].tolist()
        # every seq the child saw committed is there, numbered 1..n without holes
        assert set(printed) <= set(seqs)
        assert seqs == list(range(1, len(seqs) + 1))
        # each point is whole (atomic transaction): all three values, matching what was sent
        assert not wide[["vin_v", "iout_a", "k"]].isna().any().any()
        assert wide["k"].tolist() == [float(s) for s in seqs]
        assert wide["vin_v"].tolist() == [36.0 + (s % 40) for s in seqs]
        events = store.events(run_id)
        assert events["kind"].tolist() == ["interrupted"]
        assert events["details"].iloc[0]["last_point_seq"] == seqs[-1]
        # the run's end is its last sign of life: the last committed point (no events were recorded)
        assert abs(pd.Timestamp(info.ended_utc) - wide["t_utc"].iloc[-1]) < pd.Timedelta(microseconds=2)
    assert _integrity(path) == "ok"
    # a second open finds nothing more to recover
    with Store.open(path) as store:
        assert store.recovered_runs == ()
        assert len(store.events(run_id)) == 1


def _dead_pid() -> int:
    child = subprocess.Popen([sys.executable, "-c", "pass"])
    child.wait()
    return child.pid


def _start(**kw: object) -> RunStart:
    return RunStart(procedure="load_regulation", procedure_sha256=hashlib.sha256(b"x").hexdigest(),
                    station_name="sim-pol-buck", **kw)  # type: ignore[arg-type]


def test_runs_are_recovered_only_when_their_process_is_gone(tmp_path):
    path = tmp_path / "mixed.db"
    now = [1_800_000_000.0]
    here = socket.gethostname()
    with Store.open(path, clock=lambda: now[0]) as store:
        dead = store.begin_run(_start(host=here, pid=_dead_pid()))
        store.record_point(dead, {"vin_v": 12.0, "vout_v": 1.2})
        alive = store.begin_run(_start(host=here, pid=os.getpid()))
        elsewhere = store.begin_run(_start(host="bench-pc-other", pid=1))
        done = store.begin_run(_start(host=here, pid=_dead_pid()))
        store.end_run(done, "completed")

    now[0] += 3600.0
    with Store.open(path, clock=lambda: now[0]) as store:
        assert store.recovered_runs == (dead,)
        assert store.run(dead).status == "interrupted"
        assert store.run(alive).status == "running"  # our own pid exists (kill(pid, 0) succeeds)
        assert store.run(elsewhere).status == "running"  # other host: no pid check possible
        assert store.run(done).status == "completed"
        assert store.points(dead)["vout_v"].tolist() == [1.2]

    # with a heartbeat limit, the other host's run, silent for an hour, is recovered too
    with Store.open(path, clock=lambda: now[0], stale_after_s=1800.0) as store:
        assert store.recovered_runs == (elsewhere,)
        assert "no activity for 3600 s" in store.run(elsewhere).message
        assert store.run(alive).status == "running"
    # ... but not when it was active recently
    with Store.open(path, clock=lambda: now[0], stale_after_s=1800.0) as store:
        assert store.recovered_runs == ()


def test_recovery_can_be_turned_off(tmp_path):
    path = tmp_path / "off.db"
    with Store.open(path) as store:
        run_id = store.begin_run(_start(host=socket.gethostname(), pid=_dead_pid()))
    with Store.open(path, recover=False) as store:
        assert store.run(run_id).status == "running"
    with Store.open(path) as store:
        assert store.run(run_id).status == "interrupted"
