"""Runs left ``running`` by a process that is gone (another host, a renamed machine, a removed
container): ``benchctl mark-interrupted`` marks them by a stated rule, with a confirmation, and
every refusal that meets such a run names that command."""

from __future__ import annotations

import os
import socket
import time

from benchctl.cli import EXIT_BAD_INPUT, EXIT_OK, main
from benchctl.store import RunStart, Store


def _run_left_running(db, *, host: str, pid: int, age_s: float, station: str = "bench-3") -> int:
    """A run begun ``age_s`` ago with one point, never ended (its process went away)."""
    with Store.open(db, clock=lambda: time.time() - age_s, recover=False) as store:
        run_id = store.begin_run(RunStart(procedure="efficiency_map", procedure_sha256="0" * 64,
                                          station_name=station, host=host, pid=pid))
        store.record_point(run_id, {"vin_set_v": 48.0, "pin_w": 10.0})
    return run_id


def _text(capsys) -> str:
    captured = capsys.readouterr()
    return " ".join((captured.out + captured.err).split())


def test_a_silent_run_of_another_host_is_marked_then_exported(tmp_path, capsys):
    db = tmp_path / "shared.db"
    run_id = _run_left_running(db, host="old-container-7f3a", pid=4242, age_s=3600)
    out = tmp_path / "review.db"
    assert main(["export-runs", "--db", str(db), "--out", str(out)]) == EXIT_OK
    text = _text(capsys)
    assert "skipped" in text and f"benchctl mark-interrupted {run_id}" in text  # the refusal says what to do

    assert main(["mark-interrupted", str(run_id), "--db", str(db), "--yes"]) == EXIT_OK
    text = _text(capsys)
    assert "host old-container-7f3a, pid 4242" in text and "not checked" in text
    with Store.open(db) as store:
        info = store.run(run_id)
        assert info.status == "interrupted" and "marked by" in info.message
        event = store.events(run_id).iloc[-1]
        assert event["kind"] == "interrupted" and event["details"]["marked_by"] == "benchctl mark-interrupted"
        assert event["details"]["run_host"] == "old-container-7f3a" and event["details"]["silent_s"] >= 3500
        assert event["details"]["confirmed"] == "--yes"
        # ended at its last sign of life, not at the moment it was marked
        assert info.ended_utc.timestamp() < time.time() - 3000
    assert main(["export-runs", "--db", str(db), "--out", str(out), str(run_id)]) == EXIT_OK
    assert "1 copied" in _text(capsys)


def test_a_run_that_may_still_be_running_is_not_marked(tmp_path, capsys, monkeypatch):
    db = tmp_path / "shared.db"
    recent = _run_left_running(db, host="bench-pc-9", pid=4242, age_s=30)
    assert main(["mark-interrupted", str(recent), "--db", str(db), "--yes"]) == EXIT_BAD_INPUT
    text = _text(capsys)
    assert "s ago, less than --silent-min 10 min: it may still be running there" in text
    # Alive on this host: never marked, whatever the silence.
    alive = _run_left_running(db, host=socket.gethostname(), pid=os.getpid(), age_s=3600)
    assert main(["mark-interrupted", str(alive), "--db", str(db), "--yes", "--silent-min", "0"]) == EXIT_BAD_INPUT
    assert f"pid {os.getpid()}) is alive on this host" in _text(capsys)
    # No terminal to ask and no --yes: nothing is changed.
    monkeypatch.setattr("sys.stdin.isatty", lambda: False)
    assert main(["mark-interrupted", str(recent), "--db", str(db), "--silent-min", "0"]) == EXIT_BAD_INPUT
    assert "give --yes" in _text(capsys)
    with Store.open(db) as store:
        assert store.run(recent).status == "running" and store.run(alive).status == "running"
    # Knowing better, with a shorter rule: marked.
    assert main(["mark-interrupted", str(recent), "--db", str(db), "--yes", "--silent-min", "0"]) == EXIT_OK
    with Store.open(db) as store:
        assert store.run(recent).status == "interrupted"


def test_a_run_whose_station_lock_is_held_in_the_shared_database_is_not_marked(pg_url, tmp_path, capsys):
    import subprocess
    import sys
    import textwrap

    run_id = _run_left_running(pg_url, host="bench-pc-2", pid=4242, age_s=3600, station="bench-pg-2")
    holder = subprocess.Popen([sys.executable, "-c", textwrap.dedent("""
        import sys, time
        from benchctl.station import parse_station
        from benchctl.station_lock import hold_station
        from benchctl.store import Store
        text = '[station]\\nname = "bench-pg-2"\\n[limits]\\nsource_voltage_max_v = 20.0\\nsource_current_max_a = 1.0\\n' \\
               'dut_output_voltage_max_v = 6.0\\nload_current_max_a = 1.0\\nload_power_max_w = 5.0\\n' \\
               '[instruments.source]\\ndriver = "dc_source"\\nresource = "TCPIP::127.0.0.1::1::SOCKET"\\n'
        hold = hold_station(parse_station(text), Store.open(sys.argv[1]), what="run of efficiency_map")
        hold.note_run(int(sys.argv[2]))
        print("held", flush=True)
        time.sleep(600)
    """), pg_url, str(run_id)], stdout=subprocess.PIPE, text=True)
    try:
        assert holder.stdout.readline().strip() == "held"
        assert main(["mark-interrupted", str(run_id), "--db", pg_url, "--yes"]) == EXIT_BAD_INPUT
        text = _text(capsys)
        assert "may still be running" in text and f"run {run_id}" in text and "is held" in text
    finally:
        holder.kill()
        holder.wait(timeout=60)
    deadline = time.monotonic() + 60
    while time.monotonic() < deadline:  # the killed holder's session ends, and its lock with it
        with Store.open(pg_url) as store:
            if store.station_lock_holder("bench-pg-2") is None:
                break
        time.sleep(0.05)
    assert main(["mark-interrupted", str(run_id), "--db", pg_url, "--yes"]) == EXIT_OK
    with Store.open(pg_url) as store:
        assert store.run(run_id).status == "interrupted"
