"""`benchctl sim` with the optional instruments: the station file it writes reaches them all."""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time

from benchctl.cli import EXIT_BAD_INPUT, main
from benchctl.station import load_station


def test_sim_serves_generator_switch_matrix_and_protected_dut(tmp_path):
    station_path = tmp_path / "sim.toml"
    proc = subprocess.Popen([sys.executable, "-m", "benchctl.cli", "sim", "--generator", "--coupling", "0.5",
                             "--duts", "3", "--dut-protection", "--time-scale", "50", "--station-out",
                             str(station_path)], stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, cwd=tmp_path,
                            env={**os.environ})
    try:
        deadline = time.monotonic() + 60
        while not station_path.exists() and time.monotonic() < deadline and proc.poll() is None:
            time.sleep(0.05)
        assert station_path.exists(), proc.stderr.read().decode() if proc.poll() is not None else "no station file"
        time.sleep(0.2)  # the file is written whole before the servers are announced
        station = load_station(station_path)
        assert station.kind_of("generator") == "function_generator"
        assert station.kind_of("mux") == "switch_matrix"
        assert station.instruments["generator"].options["coupling_v_per_v"] == 0.5
        assert station.instruments["mux"].options["channels"] == 3
        mux = station.instruments["mux"].create().open()
        try:
            assert mux.closed_channel() == 1
        finally:
            mux.close()
    finally:
        proc.send_signal(signal.SIGINT)
        proc.wait(timeout=30)


def test_sim_refuses_bad_counts():
    assert main(["sim", "--duts", "0"]) == EXIT_BAD_INPUT
    assert main(["sim", "--coupling", "-1"]) == EXIT_BAD_INPUT
