"""One run at a time on a station: a second run (or job) is refused before it opens anything,
a lock left by a dead process is recognised, and a shared database's lock is seen by every host.

Everything through real processes and sockets; "opened nothing" is read from the simulated
instruments' own audit logs (who sent what, by peer address).
"""

from __future__ import annotations

import json
import logging
import signal
import subprocess
import sys
import textwrap
import threading
import time
from pathlib import Path

import pytest

from benchctl.cli import EXIT_BAD_INPUT, EXIT_OK, main
from benchctl.errors import StationBusyError
from benchctl.station import load_station, parse_station
from benchctl.station_lock import hold_station, lock_file_for
from benchctl.store import Store

WAIT_S = 90.0  # generous: two shared cores, other test runs at the same time


def _wait_for(condition, what: str, timeout_s: float = WAIT_S):
    deadline = time.monotonic() + timeout_s
    while time.monotonic() < deadline:
        value = condition()
        if value:
            return value
        time.sleep(0.05)
    raise AssertionError(f"timed out waiting for {what}")


def _lock_record(path: Path) -> dict | None:
    try:
        text = path.read_text(encoding="utf-8")
        return json.loads(text) if text.strip() else None
    except (OSError, ValueError):
        return None


def _command_sources(bench) -> dict[str, set[str]]:
    return {role: {e.source for e in inst.audit.entries() if e.kind == "command"}
            for role, inst in bench.instruments.items()}


def test_a_second_run_is_refused_before_it_opens_any_instrument(simulated_bench, tmp_path, capsys):
    bench = simulated_bench("flyback-48v-5v", time_scale=50.0)
    station = bench.write_station(tmp_path / "bench-3.toml", name="bench-3")
    lock_path = lock_file_for(load_station(station))
    assert lock_path == tmp_path / "bench-3.toml.lock"
    first = subprocess.Popen(
        [sys.executable, "-m", "benchctl.cli", "run", "efficiency_map", "--station", str(station),
         "--db", str(tmp_path / "first.db"), "--set", "vin_v=48", "--set", "load_pct=25,50",
         "--set", "startup_delay_s=4", "--json"],
        cwd=tmp_path, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    try:
        record = _wait_for(lambda: (r := _lock_record(lock_path)) and r.get("run_id") and r, "the first run to begin")
        assert record["pid"] == first.pid and record["what"] == "run of efficiency_map"
        before = _command_sources(bench)

        code = main(["run", "efficiency_map", "--station", str(station), "--db", str(tmp_path / "second.db"),
                     "--set", "vin_v=48", "--set", "load_pct=50"])
        err = capsys.readouterr().err
        assert code == EXIT_BAD_INPUT, err
        flat = " ".join(err.split())
        assert "station 'bench-3' is in use" in flat
        assert f"run {record['run_id']}" in flat and f"pid {first.pid}" in flat and "since" in flat
        assert str(lock_path) in flat and f"kill -TERM {first.pid}" in flat and "nothing was opened" in flat
        # Nothing of the second run reached an instrument: every command came from the first run's connections.
        after = _command_sources(bench)
        new_sources = {role: after[role] - before[role] for role in after}
        assert not any(new_sources.values()), new_sources
        with Store.open(tmp_path / "second.db") as store:
            assert store.runs().empty  # no run was begun

        out, err = first.communicate(timeout=WAIT_S)
    finally:
        if first.poll() is None:
            first.kill()
    assert first.returncode == EXIT_OK, err
    assert json.loads(out.strip().splitlines()[-1])["status"] == "completed"
    rst = [c for c in bench.instruments["source"].audit.commands() if c.upper().startswith("*RST")]
    assert len(rst) == 1  # only the first run ever reset the source
    assert not lock_path.exists()  # released at the end of the run
    # Free again: the next run takes the station.
    assert main(["run", "efficiency_map", "--station", str(station), "--db", str(tmp_path / "second.db"),
                 "--set", "vin_v=48", "--set", "load_pct=50", "--json"]) == EXIT_OK


HOLDER = textwrap.dedent("""
    import sys, time
    from benchctl.station import load_station, parse_station
    from benchctl.station_lock import hold_station
    from benchctl.store import Store
    kind, where, db = sys.argv[1], sys.argv[2], sys.argv[3]
    station = load_station(where) if kind == "file" else parse_station(open(where).read())
    store = Store.open(db) if db != "-" else None
    hold = hold_station(station, store, what="run of efficiency_map")
    hold.note_run(42)
    print("held", flush=True)
    time.sleep(600)
""")


def _holder(*args: str) -> subprocess.Popen:
    proc = subprocess.Popen([sys.executable, "-c", HOLDER, *args], stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                            text=True)
    line = proc.stdout.readline()
    assert line.strip() == "held", proc.stderr.read()
    return proc


def _kill(proc: subprocess.Popen) -> None:
    proc.send_signal(signal.SIGKILL)
    proc.wait(timeout=WAIT_S)


def test_a_lock_left_by_a_killed_run_is_recognised_and_taken_over(simulated_bench, tmp_path, caplog):
    from benchctl.procedure import load_procedure
    from benchctl.runner import execute

    bench = simulated_bench("flyback-48v-5v", time_scale=50.0)
    path = bench.write_station(tmp_path / "bench-4.toml", name="bench-4")
    holder = _holder("file", str(path), "-")
    try:
        with pytest.raises(StationBusyError) as busy:
            hold_station(load_station(path))
        assert busy.value.holder.pid == holder.pid and busy.value.holder.run_id == 42
        assert busy.value.holder.process_alive is True
    finally:
        _kill(holder)
    lock_path = lock_file_for(load_station(path))
    assert _lock_record(lock_path)["pid"] == holder.pid  # SIGKILL left the file and its record behind
    emap = load_procedure("efficiency_map")
    params = emap.resolve_parameters(values={**bench.procedure_parameters(), "vin_v": [48.0], "load_pct": [50.0]})
    with Store.open(tmp_path / "runs.db") as store, caplog.at_level(logging.WARNING, logger="benchctl.station_lock"):
        outcome = execute(emap, params, load_station(path), store)
    assert outcome.status == "completed", outcome.message
    assert f"stale lock left by run 42 (run of efficiency_map) by pid {holder.pid}" in caplog.text
    assert not lock_path.exists()


def test_one_thread_holds_a_station_and_may_take_it_again(tmp_path):
    path = tmp_path / "bench-5.toml"
    path.write_text(_STATION_TEXT.replace("bench-x", "bench-5"), encoding="utf-8")
    station = load_station(path)
    refused: list[BaseException] = []
    with hold_station(station, what="job nightly") as job:
        with hold_station(station, what="run of efficiency_map") as step:  # a job's step: same thread
            step.note_run(7)
        thread = threading.Thread(target=lambda: _try(station, refused))
        thread.start()
        thread.join(timeout=WAIT_S)
        assert _lock_record(lock_file_for(station))["run_id"] == 7  # the step's run id is in the job's record
    assert len(refused) == 1 and isinstance(refused[0], StationBusyError)
    assert "job nightly" in str(refused[0]) and "another thread of this process" in str(refused[0])
    assert job is not None and not lock_file_for(station).exists()
    with hold_station(station):  # free once the job has ended
        pass


def _try(station, refused: list) -> None:
    try:
        hold_station(station).release()
    except StationBusyError as exc:
        refused.append(exc)


_STATION_TEXT = """
[station]
name = "bench-x"
[limits]
source_voltage_max_v = 20.0
source_current_max_a = 1.0
dut_output_voltage_max_v = 6.0
load_current_max_a = 1.0
load_power_max_w = 5.0
[instruments.source]
driver = "dc_source"
resource = "TCPIP::127.0.0.1::1::SOCKET"
"""


def test_the_shared_database_lock_is_seen_from_another_process_and_freed_by_its_death(pg_url, tmp_path):
    text_path = tmp_path / "station.toml"
    text_path.write_text(_STATION_TEXT.replace("bench-x", "bench-pg"), encoding="utf-8")
    station = parse_station(text_path.read_text(encoding="utf-8"))  # no file: only the database's lock
    Store.open(pg_url).close()
    holder = _holder("text", str(text_path), pg_url)
    try:
        with Store.open(pg_url) as store:
            with pytest.raises(StationBusyError) as busy:
                hold_station(station, store)
            message = " ".join(str(busy.value).split())
            assert "station 'bench-pg' is in use: run 42" in message and f"pid {holder.pid}" in message
            assert "advisory lock in postgresql+psycopg://benchctl:***@" in message and "database session" in message
            seen = store.station_lock_holder("bench-pg")
            assert seen is not None and seen.label.endswith("run 42")
            assert store.station_lock_holder("another-station") is None
    finally:
        _kill(holder)
    # The killed process's session ends, and with it the lock (PostgreSQL releases session locks).
    with Store.open(pg_url) as store:
        def taken():
            try:
                hold_station(station, store).release()
                return True
            except StationBusyError:
                return False

        _wait_for(taken, "the dead holder's session to end")
        assert store.station_lock_holder("bench-pg") is None


def test_a_job_on_a_held_station_is_refused_before_it_begins(simulated_bench, tmp_path, capsys):
    bench = simulated_bench("flyback-48v-5v")
    path = bench.write_station(tmp_path / "bench-6.toml", name="bench-6")
    job = tmp_path / "nightly.toml"
    job.write_text('[job]\nname = "nightly"\n\n[[step]]\nprocedure = "efficiency_map"\n', encoding="utf-8")
    holder = _holder("file", str(path), "-")
    try:
        code = main(["job", str(job), "--station", str(path), "--db", str(tmp_path / "jobs.db")])
    finally:
        _kill(holder)
    err = " ".join(capsys.readouterr().err.split())
    assert code == EXIT_BAD_INPUT and "station 'bench-6' is in use: run 42" in err and f"pid {holder.pid}" in err
    with Store.open(tmp_path / "jobs.db") as store:
        assert store.runs().empty
    assert not any(e.kind == "command" for inst in bench.instruments.values() for e in inst.audit.entries())


def _lock_session_pid(store, station_name: str) -> int:
    holder = store.station_lock_holder(station_name)
    assert holder is not None and holder.session_pid is not None
    return holder.session_pid


def _terminate(store, pid: int) -> None:
    # What a server restart, a cut network or an administrator does to the lock's session
    # (PostgreSQL docs, "Server Signaling Functions": pg_terminate_backend).
    from sqlalchemy import text

    with store._require_open().connect() as conn:
        conn.execute(text("SELECT pg_terminate_backend(:pid)"), {"pid": pid})


def _lost_lock_run(pg_url, simulated_bench, station_for, on_point):
    from benchctl.procedure import load_procedure
    from benchctl.runner import execute

    # time scale 1, 20 ms readings: a map of 6 points that lasts seconds, long enough for several checks
    bench = simulated_bench("flyback-48v-5v", time_scale=1.0, reading_time_s=0.02)
    station = station_for(bench)
    emap = load_procedure("efficiency_map")
    params = emap.resolve_parameters(values={**bench.procedure_parameters(), "vin_v": [40.0, 48.0],
                                             "load_pct": [25.0, 50.0, 100.0]})
    store = Store.open(pg_url)
    try:
        outcome = execute(emap, params, station, store,
                          progress=lambda done, total, values: on_point(done, store, station))
        return bench, store, outcome
    except BaseException:
        store.close()
        raise


def test_a_database_lock_lost_mid_run_is_taken_again_and_the_run_says_so(pg_url, simulated_bench, station_for,
                                                                         monkeypatch):
    import benchctl.station_lock as station_lock

    monkeypatch.setattr(station_lock, "DATABASE_LOCK_CHECK_PERIOD_S", 0.2)

    def on_point(done, store, station):
        if done == 2:
            _terminate(store, _lock_session_pid(store, station.name))

    bench, store, outcome = _lost_lock_run(pg_url, simulated_bench, station_for, on_point)
    try:
        assert outcome.status == "completed", outcome.message
        events = store.events(outcome.run_id)
        notes = events[events["kind"] == "station_lock"]["message"].tolist()
        assert len(notes) == 1 and "was lost" in notes[0] and "taken again" in notes[0]
        assert store.station_lock_holder(store.run(outcome.run_id).station_name) is None  # released at the end, like any other run's
    finally:
        store.close()


def test_a_database_lock_taken_by_another_session_stops_the_run_with_the_outputs_off(
        pg_url, simulated_bench, station_for, monkeypatch):
    # Another host's run takes the station between two checks: this run must not go on driving it.
    import benchctl.station_lock as station_lock
    from sqlalchemy import text
    from benchctl.store.station_locks import station_lock_key

    monkeypatch.setattr(station_lock, "DATABASE_LOCK_CHECK_PERIOD_S", 0.5)
    thief: list = []

    def on_point(done, store, station):
        if done != 2:
            return
        _terminate(store, _lock_session_pid(store, station.name))
        conn = store._require_open().connect().execution_options(isolation_level="AUTOCOMMIT")
        thief.append(conn)
        key = station_lock_key(conn, station.name)
        _wait_for(lambda: conn.execute(text("SELECT pg_try_advisory_lock(:k)"), {"k": key}).scalar(),
                  "the terminated session's lock to be free", timeout_s=5.0)

    bench, store, outcome = _lost_lock_run(pg_url, simulated_bench, station_for, on_point)
    try:
        assert outcome.status == "failed"
        assert "lock of station" in outcome.message and "could not be taken again" in outcome.message
        assert outcome.points < 6
        events = store.events(outcome.run_id)
        assert any("could not be taken again" in m for m in events[events["kind"] == "error"]["message"])
        # the outputs off, source first (the simulated instruments' own audit logs)
        src_off = bench.instruments["source"].audit.states("output")[-1]
        load_off = bench.instruments["load"].audit.states("input")[-1]
        assert src_off.value is False and load_off.value is False and src_off.t_s <= load_off.t_s
    finally:
        for conn in thief:
            conn.close()
        store.close()
