"""Termination signals sent to a real ``benchctl run`` process end it like Ctrl-C.

The simulated bench runs in this test process; the run is a separate ``python -m
benchctl.cli run`` process reaching it through its sockets. SIGTERM (what a scheduler's
timeout, a service stop or a cancelled CI job sends) and SIGHUP (a closed SSH session),
POSIX.1-2017 <signal.h>, are sent at three moments: before the first point (during the
fixed start-up wait), mid-sweep, and while a point settles. Afterwards the instruments'
own audit logs (same monotonic clock as this process) show the outputs off in the safe
order — the source's OFF before the load's — and the store shows the run interrupted with
the signal named, in its message and in an event.

A second and a third Ctrl-C during a shutdown whose source does not answer do not cut it
short: the load still goes off and the run is still stored.
"""

from __future__ import annotations

import os
import signal
import sqlite3
import subprocess
import sys
import time
from pathlib import Path

import pytest

from benchctl.exit_codes import EXIT_INTERRUPTED, ExitCode
from benchctl.store import Store
from benchctl.simulated_instruments.faults import FaultPlan

#: Generous bounds for a loaded 2-core machine (waits on conditions end far sooner).
START_TIMEOUT_S = 60.0
EXIT_TIMEOUT_S = 60.0


def _committed(db: Path) -> int:
    try:
        con = sqlite3.connect(f"file:{db}?mode=ro", uri=True, timeout=1)
        try:
            return con.execute("select count(*) from points").fetchone()[0]
        finally:
            con.close()
    except sqlite3.Error:
        return 0


def _wait_for(condition, proc: subprocess.Popen, what: str, timeout_s: float = START_TIMEOUT_S) -> None:
    deadline = time.monotonic() + timeout_s
    while not condition():
        if proc.poll() is not None:
            raise AssertionError(f"the run ended (exit {proc.returncode}) before {what}: {_stderr(proc)}")
        if time.monotonic() > deadline:
            raise AssertionError(f"timed out waiting for {what}: {_stderr(proc)}")
        time.sleep(0.005)


def _stderr(proc: subprocess.Popen) -> str:
    path = getattr(proc, "stderr_path", None)
    return path.read_text()[-2000:] if path is not None and path.exists() else ""


def _start_run(bench, tmp_path: Path, sets: list[str],
               procedure: str = "efficiency_map") -> tuple[subprocess.Popen, Path, Path]:
    station = bench.write_station(tmp_path / "station.toml")
    # These tests are about signals, not the watch's timing: on a starved 2-core machine the simulated
    # instruments (in this test process) can miss a few watch periods, which would trip the run first.
    station.write_text(station.read_text().replace("watch_period_s = ", "watch_missed_periods = 20\nwatch_period_s = ",
                                                   1))
    db = tmp_path / "runs.db"
    Store.open(str(db)).close()
    err = tmp_path / "stderr.txt"
    args = [sys.executable, "-m", "benchctl.cli", "run", procedure, "--station", str(station), "--db", str(db),
            "--json"]
    for s in sets:
        args += ["--set", s]
    proc = subprocess.Popen(args, stdout=subprocess.DEVNULL, stderr=err.open("w"), cwd=tmp_path,
                            env={**os.environ, "PYTHONUNBUFFERED": "1"})
    proc.stderr_path = err  # type: ignore[attr-defined]
    return proc, db, err


def _first_state_after(bench, role: str, state: str, value: bool, t_s: float):
    return next((e for e in bench.instruments[role].audit.states(state) if e.t_s >= t_s and e.value is value), None)


def _first_command_after(bench, role: str, text: str, t_s: float):
    return next((e for e in bench.instruments[role].audit.entries()
                 if e.kind == "command" and e.text == text and e.t_s >= t_s), None)


def _load_current_commands(bench) -> list:
    return [e for e in bench.instruments["load"].audit.entries() if e.kind == "command" and e.text.startswith("CURR ")]


def _check_interrupted(db: Path, signal_name: str) -> None:
    with Store.open(str(db)) as store:
        runs = store.runs()
        assert len(runs) == 1
        run_id = int(runs["run_id"].iloc[0])
        info = store.run(run_id)
        assert info.status == "interrupted", (info.status, info.message)
        assert signal_name in info.message, info.message
        events = store.events(run_id)
        stops = events[events["kind"] == "interrupted"]
        assert len(stops) == 1 and stops.iloc[0]["details"]["signal"] == signal_name
        assert signal_name in stops.iloc[0]["message"]


def _check_outputs_off_in_order(bench, t_signal: float) -> None:
    """Source off before load off, both after the signal (the audit logs, one clock)."""
    src_states = bench.instruments["source"].audit.states("output")
    load_states = bench.instruments["load"].audit.states("input")
    assert src_states and src_states[-1].value is False, "the source output must end off"
    assert not load_states or load_states[-1].value is False, "the load input must end off"
    src_off_cmd = _first_command_after(bench, "source", "OUTP OFF", t_signal)
    load_off_cmd = _first_command_after(bench, "load", "INP OFF", t_signal)
    assert src_off_cmd is not None and load_off_cmd is not None, "both outputs were sent OFF after the signal"
    assert src_off_cmd.t_s <= load_off_cmd.t_s, "the source goes off first, then the load"
    src_off = _first_state_after(bench, "source", "output", False, t_signal)
    load_off = _first_state_after(bench, "load", "input", False, t_signal)
    if src_off is not None and load_off is not None:
        assert src_off.t_s <= load_off.t_s


MOMENTS = ("before_first_point", "mid_sweep", "during_settle")


@pytest.mark.parametrize("moment", MOMENTS)
@pytest.mark.parametrize("signal_name", ["SIGTERM", "SIGHUP"])
def test_signal_ends_the_run_safely_and_is_recorded(signal_name, moment, simulated_bench, tmp_path):
    # During the settle: a slow model (τ = 20 ms model = 100 ms real) so a point takes a while to settle.
    bench = simulated_bench("flyback-48v-5v", time_scale=0.2 if moment == "during_settle" else 5.0)
    sets = ["vin_v=40,48", "load_pct=0,50,100"]
    if moment == "before_first_point":
        sets.append("startup_delay_s=30")  # a long fixed wait with the source on, before any point
    proc, db, err = _start_run(bench, tmp_path, sets)
    try:
        if moment == "before_first_point":
            _wait_for(lambda: any(e.value for e in bench.instruments["source"].audit.states("output")), proc,
                      "the source output on")
        elif moment == "mid_sweep":
            _wait_for(lambda: _committed(db) >= 2, proc, "two committed points")
        else:
            # The third load setpoint starts the settle of the third point (after two were committed);
            # the settle is under way once the output meter is being read after it (a point takes
            # about 2 s to settle on this slow model).
            def settling() -> bool:
                currents = _load_current_commands(bench)
                return len(currents) >= 3 and any(
                    # a reading of the settle: MEAS: or, for V, I and P of one integration, INIT then FETC
                    e.kind == "command" and e.text.startswith(("MEAS:", "INIT", "FETC")) and e.t_s > currents[2].t_s
                    for e in bench.instruments["output_meter"].audit.entries())

            _wait_for(settling, proc, "the settle of the third point")
        committed_before = _committed(db)
        t_signal = time.monotonic()
        proc.send_signal(getattr(signal, signal_name))
        proc.wait(timeout=EXIT_TIMEOUT_S)
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
    # 128 + the signal's number (130 SIGINT, 143 SIGTERM, 129 SIGHUP: the shell's convention, from memory).
    assert proc.returncode == ExitCode.for_signal(signal_name) == 128 + getattr(signal, signal_name), err.read_text()
    _check_interrupted(db, signal_name)
    _check_outputs_off_in_order(bench, t_signal)
    assert "shutting down" in err.read_text()
    if moment == "before_first_point":
        assert committed_before == 0 and _committed(db) == 0
        assert not any(e.value for e in bench.instruments["load"].audit.states("input")), \
            "the load was never switched on: the run stopped in the start-up wait"
    elif moment == "during_settle":
        # The point being settled was not recorded: the signal stopped its settle.
        assert _committed(db) == committed_before >= 2
    else:
        assert _committed(db) >= 2


def test_second_and_third_ctrl_c_do_not_cut_the_shutdown_short(simulated_bench, tmp_path):
    bench = simulated_bench("flyback-48v-5v", time_scale=5.0)
    proc, db, err = _start_run(bench, tmp_path, ["vin_v=40,48", "load_pct=0,50,100"])
    plan = FaultPlan(bench)
    try:
        _wait_for(lambda: _committed(db) >= 2, proc, "two committed points")
        plan.fire("unresponsive@source")  # the shutdown's source OFF goes unanswered
        t_signal = time.monotonic()
        proc.send_signal(signal.SIGINT)
        _wait_for(lambda: "shutting down" in err.read_text(), proc, "the shutdown notice", EXIT_TIMEOUT_S)
        proc.send_signal(signal.SIGINT)
        _wait_for(lambda: err.read_text().count("received again") >= 1, proc, "the second notice", EXIT_TIMEOUT_S)
        proc.send_signal(signal.SIGINT)
        proc.wait(timeout=EXIT_TIMEOUT_S)
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
        plan.clear()
    text = err.read_text()
    assert proc.returncode == EXIT_INTERRUPTED, text
    assert text.count("received again") == 2, text
    _check_interrupted(db, "SIGINT")
    # The load went off although the source never answered (its OFF waits unread in the server).
    load_off = _first_command_after(bench, "load", "INP OFF", t_signal)
    assert load_off is not None and bench.instruments["load"].audit.states("input")[-1].value is False
    with Store.open(str(db)) as store:
        events = store.events(int(store.runs()["run_id"].iloc[0]))
        failed = " ".join(m for m in events["message"] if m.startswith("could not confirm every output off"))
        assert "source off confirmation FAILED" in failed  # the unconfirmed source is on record
    # From the first Ctrl-C to the load's OFF: the source's shutdown deadline (0.5 s by default)
    # plus a little; bounded here with generous slack for a loaded machine.
    assert load_off.t_s - t_signal < 0.5 + 5.0



def _sigterm_once(bench, tmp_path, sets, procedure, condition, what) -> float:
    """Run ``procedure``, send SIGTERM once ``condition()`` holds; check exit 143, the stored
    interruption and the outputs off in order. Returns when the signal was sent."""
    proc, db, err = _start_run(bench, tmp_path, sets, procedure=procedure)
    try:
        _wait_for(condition, proc, what)
        t_signal = time.monotonic()
        proc.send_signal(signal.SIGTERM)
        proc.wait(timeout=EXIT_TIMEOUT_S)
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
    assert proc.returncode == ExitCode.TERMINATED, err.read_text()
    _check_interrupted(db, "SIGTERM")
    _check_outputs_off_in_order(bench, t_signal)
    return t_signal


def test_sigterm_during_a_loop_sweep_aborts_the_injection(simulated_bench, tmp_path):
    """A SIGTERM mid-sweep: outputs off, then the analyzer's sweep (its injection) aborted; exit 143."""
    bench = simulated_bench("flyback-48v-5v", time_scale=1.0)
    analyzer = bench.instruments["analyzer"]
    t_signal = _sigterm_once(bench, tmp_path, ["vin_v=48", "load_pct=50", "points=201", "bandwidth_hz=5"], "loop_gain",
                             lambda: any(e.kind == "command" and e.text == "INIT" for e in analyzer.audit.entries()),
                             "the analyzer's sweep to start")
    abort = _first_command_after(bench, "analyzer", "ABOR", t_signal)
    assert abort is not None, "the analyzer's sweep was not aborted at the shutdown"
    source_off = _first_state_after(bench, "source", "output", False, t_signal)
    assert source_off is not None and source_off.t_s <= abort.t_s  # the outputs first, then the injection


def test_sigterm_during_line_injection_switches_the_generator_off(simulated_bench, tmp_path):
    """A SIGTERM while the generator injects on the line: source off, load off, then the generator off."""
    bench = simulated_bench("flyback-48v-5v", time_scale=1.0, generator=True)
    generator = bench.instruments["generator"]
    t_signal = _sigterm_once(bench, tmp_path, ["frequency_hz=100,200,300,500,1000"], "line_rejection",
                             lambda: any(e.value is True for e in generator.audit.states("output")),
                             "the generator's output on")
    assert _first_state_after(bench, "generator", "output", False, t_signal) is not None, "the generator was left on"
    assert generator.audit.states("output")[-1].value is False
