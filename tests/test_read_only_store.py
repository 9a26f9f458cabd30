"""A database on a read-only medium is readable by ``runs``, ``show``, ``export``, ``report`` and
``check``: opened read-only, nothing written (not even a recovery), and a note saying so.

The medium is really read-only: the folder is bind-mounted read-only in a mount namespace of
its own (Linux ``unshare --user --mount``, so nothing leaks to the machine's mount table), or,
where that is not allowed and the tests do not run as root, its permissions forbid writing.
SQLite: "Write-Ahead Logging" §5 (read-only databases), URI parameters ``mode=ro`` and
``immutable`` (SQLite docs).
"""

from __future__ import annotations

import hashlib
import json
import os
import shutil
import socket
import sqlite3
import subprocess
import sys
import textwrap
from pathlib import Path

import pytest

from benchctl.procedure import load_procedure, procedures_dir
from benchctl.runner import DutInfo, execute
from benchctl.station import load_station
from benchctl.store import RunStart, Store

RUNNER = textwrap.dedent("""
    import contextlib, io, json, sys
    from benchctl.cli import main
    results = []
    for argv in json.loads(sys.argv[1]):
        out, err = io.StringIO(), io.StringIO()
        with contextlib.redirect_stdout(out), contextlib.redirect_stderr(err):
            try:
                code = main(argv)
            except SystemExit as exc:
                code = exc.code
            except BaseException as exc:
                code, err = -1, io.StringIO(err.getvalue() + repr(exc))
        results.append({"argv": argv, "code": int(code), "out": out.getvalue(), "err": err.getvalue()})
    print(json.dumps(results))
""")


def _dead_pid() -> int:
    proc = subprocess.Popen([sys.executable, "-c", "pass"])
    proc.wait()
    return proc.pid


def _how_to_make_read_only() -> str:
    if shutil.which("unshare"):
        probe = subprocess.run(["unshare", "-rm", "sh", "-c", "mount -t tmpfs none /mnt 2>/dev/null || "
                                "mount --bind / /mnt"], capture_output=True)
        if probe.returncode == 0:
            return "mount"
    if os.geteuid() != 0:
        return "chmod"
    pytest.skip("no way to make a read-only medium here: unshare --user --mount is not allowed and, as root, "
                "file permissions do not stop writes")


def _run_on_read_only(folder: Path, mount_point: Path, commands: list[list[str]], how: str) -> list[dict]:
    env = {**os.environ, "COLUMNS": "200"}
    args = [sys.executable, "-c", RUNNER, json.dumps(commands)]
    if how == "mount":
        mount_point.mkdir()
        script = 'mount --bind "$1" "$2" && mount -o remount,ro,bind "$2" && shift 2 && exec "$@"'
        proc = subprocess.run(["unshare", "-rm", "sh", "-c", script, "sh", str(folder), str(mount_point), *args],
                              capture_output=True, text=True, env=env, timeout=300)
    else:
        for p in [folder, *folder.iterdir()]:
            p.chmod(0o555 if p.is_dir() else 0o444)
        try:
            proc = subprocess.run(args, capture_output=True, text=True, env=env, timeout=300)
        finally:
            for p in [folder, *folder.iterdir()]:
                p.chmod(0o755 if p.is_dir() else 0o644)
    assert proc.returncode == 0, proc.stderr
    return json.loads(proc.stdout.strip().splitlines()[-1])


def _digest(folder: Path) -> dict[str, str]:
    return {p.name: hashlib.sha256(p.read_bytes()).hexdigest() for p in sorted(folder.iterdir())}


@pytest.fixture(scope="module")
def stored_runs(tmp_path_factory):
    """A SQLite store with a completed efficiency map and a run left running by a dead process."""
    from benchctl.simulated_instruments.bench import SimulatedBench

    folder = tmp_path_factory.mktemp("medium")
    db = folder / "runs.db"
    with SimulatedBench("flyback-48v-5v", time_scale=50.0, seed=1) as bench:
        station = load_station(bench.write_station(tmp_path_factory.mktemp("station") / "bench.toml"))
        emap = load_procedure("efficiency_map")
        params = emap.resolve_parameters(values={**bench.procedure_parameters(), "vin_v": [36.0, 48.0, 75.0],
                                                 "load_pct": [25.0, 50.0, 75.0, 100.0]})
        with Store.open(db) as store:
            outcome = execute(emap, params, station, store, dut=DutInfo("FB-48S05", "B", "7"))
            assert outcome.status == "completed", outcome.message
            left = store.begin_run(RunStart(procedure="efficiency_map", procedure_sha256="0" * 64,
                                            station_name="bench-3", host=socket.gethostname(), pid=_dead_pid()))
            store.record_point(left, {"vin_set_v": 48.0})
    assert not Path(f"{db}-wal").exists()  # closed cleanly: everything is in the main file
    return folder, outcome.run_id, left


def test_every_reading_command_works_on_a_read_only_medium(stored_runs, tmp_path):
    how = _how_to_make_read_only()
    source, completed, left = stored_runs
    folder = tmp_path / "medium"
    shutil.copytree(source, folder)
    ro = tmp_path / "ro" if how == "mount" else folder
    db = str(ro / "runs.db")
    out = tmp_path / "out"
    out.mkdir()
    before = _digest(folder)
    limits = str(procedures_dir() / "limits" / "flyback-48v-5v.toml")
    results = _run_on_read_only(folder, tmp_path / "ro", [
        ["runs", "--db", db, "--json"],
        ["show", str(completed), "--db", db],
        ["export", str(completed), "--db", db, "--format", "csv", "--out", str(out / "points.csv")],
        ["report", str(completed), "--db", db, "--out", str(out / "report")],
        ["check", str(completed), "--db", db, "--limits", limits, "--json"],
        ["query", "part", "FB-48S05", "--db", db, "--json"],
    ], how)
    by_command = {r["argv"][0]: r for r in results}
    for name, r in by_command.items():
        assert "Traceback" not in r["err"], (name, r["err"])
        assert r["code"] in ((0, 1, 4) if name == "check" else (0,)), (name, r["err"])
        assert "opened read-only" in r["err"] and "nothing was recovered" in r["err"], (name, r["err"])
    runs = {row["run_id"]: row for row in json.loads(by_command["runs"]["out"])}
    assert runs[completed]["status"] == "completed"
    assert runs[left]["status"] == "running"  # not recovered: nothing was written
    assert f"run {completed}" in by_command["show"]["out"]
    rows = [line for line in (out / "points.csv").read_text().splitlines() if not line.startswith("#")]
    assert len(rows) == 1 + 12  # the header and the 12 points
    assert (out / "report" / "report.html").is_file()
    check = json.loads(by_command["check"]["out"])
    assert check["run_id"] == completed and check["outcomes"]
    assert "not stored with the run" in by_command["check"]["err"]
    assert _digest(folder) == before  # not a byte changed, no -wal or -shm file made


def test_a_write_ahead_log_on_a_read_only_medium(stored_runs, tmp_path):
    how = _how_to_make_read_only()
    source, completed, left = stored_runs
    folder = tmp_path / "medium"
    shutil.copytree(source, folder)
    # A database copied while its writer had a commit in the write-ahead log (not checkpointed).
    con = sqlite3.connect(folder / "runs.db")
    con.execute("PRAGMA wal_autocheckpoint = 0")
    con.execute("UPDATE runs SET message = 'committed in the WAL' WHERE id = ?", (completed,))
    con.commit()
    with_shm, without_shm = tmp_path / "with-shm", tmp_path / "without-shm"
    for target, parts in ((with_shm, ("", "-wal", "-shm")), (without_shm, ("", "-wal"))):
        target.mkdir()
        for part in parts:
            shutil.copy(f"{folder / 'runs.db'}{part}", target / f"runs.db{part}")
    con.close()
    ro = tmp_path / "ro"
    for target, in_wal_seen in ((with_shm, True), (without_shm, False)):
        db = str((ro if how == "mount" else target) / "runs.db")
        if ro.exists():
            ro.rmdir()
        [r] = _run_on_read_only(target, ro, [["runs", "--db", db, "--json"]], how)
        assert r["code"] == 0, r["err"]
        rows = {row["run_id"]: row for row in json.loads(r["out"])}
        assert (rows[completed]["message"] == "committed in the WAL") is in_wal_seen
        if not in_wal_seen:  # read from the main file alone, and the person is told
            assert "write-ahead log" in r["err"] and "are not shown" in " ".join(r["err"].split())


def test_a_read_only_store_refuses_writes_and_says_why(stored_runs, tmp_path):
    from benchctl.errors import StoreReadOnlyError

    source, completed, left = stored_runs
    with Store.open(source / "runs.db", read_only=True) as store:
        assert store.read_only and store.run(left).status == "running"
        with pytest.raises(StoreReadOnlyError, match="open read-only .* nothing was changed"):
            store.record_event(completed, "info", "x")
        with pytest.raises(StoreReadOnlyError):
            store.end_run(left, "interrupted")
