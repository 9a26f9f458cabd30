"""The benchctl command as a user meets it: exit codes, clear errors, demo, export."""

from __future__ import annotations

import io
import json
import os
import signal
import socket
import sqlite3
import subprocess
import sys
import time
from pathlib import Path

import pandas as pd
import pytest

from benchctl.cli import EXIT_BAD_INPUT, EXIT_INSTRUMENT, EXIT_OK, main


def run_cli(args, capsys):
    code = main([str(a) for a in args])
    out = capsys.readouterr()
    return code, out.out, out.err


def test_help_does_not_import_heavy_libraries():
    # Start-up: `benchctl --help` must not import pandas, scipy, matplotlib (nor pyvisa, rich).
    code = (
        "import sys\nfrom benchctl.cli import main\n"
        "try:\n    main(['--help'])\nexcept SystemExit:\n    pass\n"
        "heavy = [m for m in ('pandas', 'scipy', 'matplotlib', 'numpy', 'pyvisa', 'rich') if m in sys.modules]\n"
        "print('HEAVY=' + ','.join(heavy))\n"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=60).stdout
    assert "HEAVY=\n" in out, out
    assert "CAUTION" in out and "60 V DC" in out  # the safety caution is in the help


def test_demo_then_export_csv(tmp_path, capsys, monkeypatch):
    monkeypatch.chdir(tmp_path)
    db = tmp_path / "demo.db"
    code, out, err = run_cli(["demo", "--db", db, "--time-scale", "50"], capsys)
    assert code == EXIT_OK, out + err
    assert "efficiency (%) by load and line" in out and "load_regulation_pct" in out
    assert "hazardous voltage" in err  # the flyback's station allows > 60 V: caution shown
    code, out, err = run_cli(["export", "latest", "--db", db, "--format", "csv"], capsys)
    assert code == EXIT_OK
    frame = pd.read_csv(io.StringIO(out), comment="#")  # provenance header lines
    assert len(frame) == 30 and {"vin_v", "iin_a", "pin_w", "vout_v", "iout_a", "pout_w"} <= set(frame.columns)
    code, out, _ = run_cli(["export", "1", "--db", db, "--format", "json"], capsys)
    assert json.loads(out)["units"]["pin_w"] == "W"
    code, out, _ = run_cli(["runs", "--db", db, "--json"], capsys)
    runs = json.loads(out)
    assert runs[0]["status"] == "completed" and runs[0]["procedure"] == "efficiency_map"
    code, out, _ = run_cli(["show", "latest", "--db", db], capsys)
    assert code == EXIT_OK and "instrument source" in out and "benchctl-sim" in out


def test_instruments_command(simulated_bench, tmp_path, capsys):
    bench = simulated_bench("buck-12v-1v2")
    station = bench.write_station(tmp_path / "st.toml")
    code, out, _ = run_cli(["instruments", "--station", station, "--json"], capsys)
    assert code == EXIT_OK
    rows = json.loads(out)["instruments"]
    assert {"source", "load", "input_meter", "output_meter"} <= {r["role"] for r in rows}
    assert all(r["status"] == "ok" and "benchctl-sim" in r["identity"] for r in rows)
    # One instrument gone: non-zero exit, the row says what failed.
    bench.servers["load"].stop()
    code, out, _ = run_cli(["instruments", "--station", station, "--json"], capsys)
    assert code == EXIT_INSTRUMENT
    bad = [r for r in json.loads(out)["instruments"] if r["status"] != "ok"]
    assert [r["role"] for r in bad] == ["load"] and "refused" in bad[0]["status"]


@pytest.mark.parametrize("args, needle", [
    (["run", "no_such_procedure"], "unknown procedure"),
    (["run", "efficiency_map", "--set", "vin_v=lots"], "not a valid float list"),
    (["run", "efficiency_map", "--set", "iout_rated_a=-1"], "below the allowed minimum"),
    (["run", "efficiency_map", "--set", "bogus=1"], "has no parameter 'bogus'"),
])
def test_bad_run_input_is_refused_with_exit_2(args, needle, simulated_bench, tmp_path, capsys):
    bench = simulated_bench("flyback-48v-5v")
    station = bench.write_station(tmp_path / "st.toml")
    code, out, err = run_cli(args + ["--station", station, "--db", tmp_path / "x.db"], capsys)
    assert code == EXIT_BAD_INPUT and needle in err
    assert bench.instruments["source"].audit.states("output") == []  # nothing enabled


def test_station_missing_role(simulated_bench, tmp_path, capsys):
    bench = simulated_bench("flyback-48v-5v")
    text = bench.station_toml()
    path = tmp_path / "st.toml"
    path.write_text(text[: text.index("[instruments.input_meter]")])
    code, _, err = run_cli(["run", "efficiency_map", "--station", path, "--db", tmp_path / "x.db"], capsys)
    assert code == EXIT_BAD_INPUT and "input_meter" in err and "needed by procedure efficiency_map" in err


def test_database_of_another_schema_version(tmp_path, capsys):
    from benchctl.store import Store

    db = tmp_path / "old.db"
    Store.open(str(db)).close()
    with sqlite3.connect(db) as con:  # as if a newer benchctl had written it
        con.execute("UPDATE meta SET schema_version = 99")
    code, _, err = run_cli(["runs", "--db", db], capsys)
    assert code == EXIT_INSTRUMENT and "99" in err and "version" in err


def test_missing_database_is_a_clear_error(tmp_path, capsys):
    code, _, err = run_cli(["runs", "--db", tmp_path / "none.db"], capsys)
    assert code == EXIT_INSTRUMENT and "no database at" in err


def _wait_for_points(db: Path, n: int, timeout_s: float) -> int:
    deadline = time.monotonic() + timeout_s
    count = 0
    while time.monotonic() < deadline:
        if db.exists():
            try:
                con = sqlite3.connect(f"file:{db}?mode=ro", uri=True, timeout=1)
                count = con.execute("select count(*) from points").fetchone()[0]
                con.close()
            except sqlite3.Error:
                count = 0
            if count >= n:
                return count
        time.sleep(0.02)
    return count


def test_sigkill_mid_sweep_keeps_committed_points(simulated_bench, tmp_path):
    from benchctl.store import Store

    bench = simulated_bench("flyback-48v-5v", time_scale=2.0)
    station = bench.write_station(tmp_path / "st.toml")
    db = tmp_path / "kill.db"
    env = {**os.environ, "PYTHONUNBUFFERED": "1"}
    proc = subprocess.Popen(
        [sys.executable, "-m", "benchctl.cli", "run", "efficiency_map", "--station", str(station), "--db", str(db),
         "--set", "vin_v=36,48,75", "--set", "load_pct=0,5,10,15,20,25,30,35,40,45,50,55,60,65,70,75,80,85,90,95,100",
         "--json"],
        stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, env=env,
    )
    try:
        seen = _wait_for_points(db, 5, timeout_s=60)
        assert seen >= 5, "the run should have committed points"
        proc.send_signal(signal.SIGKILL)
        proc.wait(timeout=10)
    finally:
        if proc.poll() is None:
            proc.kill()
    con = sqlite3.connect(db)
    assert con.execute("pragma integrity_check").fetchone()[0] == "ok"
    con.close()
    with Store.open(str(db)) as store:
        run_id = store.resolve_run("latest")
        info = store.run(run_id)
        assert info.status == "interrupted"
        points = store.points(run_id)
        assert len(points) >= seen and list(points["seq"]) == list(range(1, len(points) + 1))
        assert points[["vin_v", "iin_a", "pin_w", "vout_v", "iout_a", "pout_w"]].notna().all().all()


def test_export_an_array_as_csv_and_analyze_it(tmp_path, capsys):
    """A stored Bode array exported as CSV feeds `analyze loop-gain`; margins as python-control finds them."""
    import control
    import numpy as np

    from benchctl.store import RunStart, Store

    # loop 25/(s^3+10s^2+10s+10): python-control cross-check [calc] (PYTHON-CONTROL, benchctl.references; pm 29.11 deg)
    freq = np.logspace(-2, 1, 400)
    w = 2 * np.pi * freq
    s = 1j * w
    t = 25 / (s**3 + 10 * s**2 + 10 * s + 10)
    db = tmp_path / "a.db"
    with Store.open(str(db)) as store:
        run = store.begin_run(RunStart(procedure="loop_gain", procedure_sha256="0" * 64, station_name="x"))
        seq = store.record_point(run, {"vin_set_v": 48.0})
        store.record_array(run, "bode", {"freq_hz": freq, "gain_db": 20 * np.log10(abs(t)),
                                         "phase_deg": np.degrees(np.unwrap(np.angle(t)))}, point_seq=seq)
        store.end_run(run, "completed")
    out_csv = tmp_path / "bode.csv"
    assert main(["export", "latest", "--db", str(db), "--array", "bode", "--out", str(out_csv)]) == EXIT_OK
    capsys.readouterr()
    assert main(["analyze", "loop-gain", str(out_csv), "--json"]) == EXIT_OK
    report = json.loads(capsys.readouterr().out)
    gm, pm, wpc, wgc = control.margin(control.tf([25], [1, 10, 10, 10]))  # (gm ratio, pm deg, rad/s, rad/s)
    assert report["phase_margin_deg"] == pytest.approx(pm, abs=0.1)
    assert report["crossover_hz"] == pytest.approx(wgc / (2 * np.pi), rel=1e-3)
    assert report["gain_margin_db"] == pytest.approx(20 * np.log10(gm), abs=0.05)
    assert main(["export", "latest", "--db", str(db), "--array", "nope"]) == EXIT_BAD_INPUT
