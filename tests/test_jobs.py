"""Nightly jobs, run listing, resume after SIGKILL, and run comparison, end to end."""

from __future__ import annotations

import os
import signal
import sqlite3
import subprocess
import sys
import time

import junitparser
import pytest

from benchctl.cli import EXIT_BAD_INPUT, EXIT_FAILED, EXIT_OK, main
from benchctl.compare import compare_points
from benchctl.job import estimate_duration, parse_job
from benchctl.errors import ConfigurationError
from benchctl.store import Store

LIMITS = """
[spec]
name = "nightly"

[[limit]]
name = "efficiency at half load and above"
quantity = "efficiency"
min = 0.80
where.load_pct = { min = 50 }

[[limit]]
name = "impossible output voltage band"
quantity = "vout_v"
min = 5.2
max = 5.3
"""


def _job_file(tmp_path, limits_text=LIMITS):
    (tmp_path / "limits.toml").write_text(limits_text)
    (tmp_path / "params.toml").write_text("vin_v = [36.0, 75.0]\nload_pct = [0.0, 25.0, 50.0, 75.0, 100.0]\n")
    job = tmp_path / "nightly.toml"
    job.write_text(
        '[job]\nname = "nightly flyback"\ndut_part = "FB-48S05"\ndut_revision = "B"\n\n'
        '[[step]]\nprocedure = "efficiency_map"\nparams = "params.toml"\nlimits = "limits.toml"\n\n'
        '[[step]]\nprocedure = "efficiency_map"\nparams = "params.toml"\n[step.parameters]\ndescending = true\n'
    )
    return job


def test_nightly_job_with_a_passing_and_a_failing_limit(simulated_bench, tmp_path, capsys):
    bench = simulated_bench("flyback-48v-5v", time_scale=50.0)
    station = bench.write_station(tmp_path / "st.toml")
    db = tmp_path / "nightly.db"
    code = main(["job", str(_job_file(tmp_path)), "--station", str(station), "--db", str(db),
                 "--junit-dir", str(tmp_path / "junit")])
    out = capsys.readouterr().out
    assert code == EXIT_FAILED, out  # one limit fails -> the job fails
    xml_files = sorted((tmp_path / "junit").glob("*.xml"))
    assert len(xml_files) == 1  # only the first step has limits
    # JUnit XML read back with junitparser (a standard JUnit XML reader)
    suites = list(junitparser.JUnitXml.fromfile(str(xml_files[0])))
    suite = suites[0]
    assert suite.tests == 2 and suite.failures == 1 and suite.errors == 0
    with Store.open(str(db)) as store:
        runs = store.runs()
        assert len(runs) == 2 and set(runs["status"]) == {"completed"}
        assert runs["job_id"].nunique() == 1 and runs["job_id"].notna().all()
        first = store.resolve_run(int(runs["run_id"].min()))
        names = set(store.results(first)["name"])
        assert "limit:impossible output voltage band" in names
        assert "limit_check" in set(store.events(first)["kind"])
        second = int(runs["run_id"].max())
        assert len(store.points(second)) == 2 * 9  # 5 up + 4 down per line
    _outputs_off(bench)


def test_job_all_passing_exits_zero(simulated_bench, tmp_path, capsys):
    bench = simulated_bench("flyback-48v-5v", time_scale=50.0)
    station = bench.write_station(tmp_path / "st.toml")
    passing = LIMITS.replace("min = 5.2\nmax = 5.3", "min = 4.9\nmax = 5.1")
    code = main(["job", str(_job_file(tmp_path, passing)), "--station", str(station), "--db", str(tmp_path / "j.db")])
    assert code == EXIT_OK, capsys.readouterr().out


def test_bad_job_file_is_refused_before_any_instrument(simulated_bench, tmp_path, capsys):
    bench = simulated_bench("flyback-48v-5v")
    station = bench.write_station(tmp_path / "st.toml")
    job = tmp_path / "bad.toml"
    job.write_text('[[step]]\nprocedure = "efficiency_map"\nlimits = "missing.toml"\ncolour = 3\n')
    code = main(["job", str(job), "--station", str(station), "--db", str(tmp_path / "b.db")])
    err = capsys.readouterr().err
    assert code == EXIT_BAD_INPUT and "step[1].limits" in err and "step[1].colour" in err
    assert bench.instruments["source"].audit.commands() == []
    with pytest.raises(ConfigurationError, match=r"\[\[step\]\]"):
        parse_job('[job]\nname = "x"\n')


def test_listing_touches_no_instrument_and_estimates_from_history(simulated_bench, tmp_path, capsys):
    bench = simulated_bench("flyback-48v-5v", time_scale=50.0)
    station = bench.write_station(tmp_path / "st.toml")
    db = tmp_path / "l.db"
    args = ["run", "efficiency_map", "--station", str(station), "--db", str(db), "--set", "vin_v=36,75",
            "--set", "load_pct=0,50,100"]
    assert main(args + ["--list"]) == EXIT_OK
    out = capsys.readouterr().out
    assert "6 planned points" in out and "unknown" in out
    assert bench.instruments["source"].audit.commands() == []  # nothing was even opened
    assert main(args + ["--json"]) == EXIT_OK
    capsys.readouterr()
    assert main(args + ["--list"]) == EXIT_OK
    assert "median of 1 earlier run(s)" in capsys.readouterr().out
    with Store.open(str(db)) as store:
        est = estimate_duration(store.runs(procedure="efficiency_map", station="sim-flyback-48v-5v"), 6)
        run = store.run(store.resolve_run("latest"))
        per_point = (run.ended_utc - run.started_utc).total_seconds() / run.n_points
    # median of (end − start)/points over the earlier completed runs: here exactly one run
    assert est.basis_runs == 1 and est.seconds == pytest.approx(6 * per_point, rel=1e-4)


def _outputs_off(bench):
    assert bench.instruments["source"].audit.states("output")[-1].value is False
    assert bench.instruments["load"].audit.states("input")[-1].value is False


def test_resume_after_sigkill_has_every_planned_point_once(simulated_bench, tmp_path, capsys):
    bench = simulated_bench("flyback-48v-5v", time_scale=2.0)
    station = bench.write_station(tmp_path / "st.toml")
    db = tmp_path / "resume.db"
    sets = ["--set", "vin_v=36,48,75", "--set", "load_pct=0,10,20,30,40,50,60,70,80,90,100"]
    proc = subprocess.Popen([sys.executable, "-m", "benchctl.cli", "run", "efficiency_map", "--station", str(station),
                             "--db", str(db), *sets, "--json"],
                            stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, env={**os.environ})
    try:
        deadline = time.monotonic() + 60
        count = 0
        while time.monotonic() < deadline and count < 6:
            if db.exists():
                try:
                    with sqlite3.connect(f"file:{db}?mode=ro", uri=True, timeout=1) as con:
                        count = con.execute("select count(*) from points").fetchone()[0]
                except sqlite3.Error:
                    pass
            time.sleep(0.02)
        proc.send_signal(signal.SIGKILL)
        proc.wait(timeout=10)
    finally:
        if proc.poll() is None:
            proc.kill()
    assert count >= 6
    code = main(["run", "--resume", "latest", "--station", str(station), "--db", str(db), "--json",
                 "--operator", "night shift"])
    assert code == EXIT_OK, capsys.readouterr()
    with Store.open(str(db)) as store:
        run_id = store.resolve_run("latest")
        assert len(store.runs()) == 1  # into the same run
        points = store.points(run_id)
        planned = [(v, i) for v in (36.0, 48.0, 75.0) for i in (0.0, 0.5, 1.0, 1.5, 2.0, 2.5, 3.0, 3.5, 4.0, 4.5, 5.0)]
        got = list(zip(points["vin_set_v"], points["iout_set_a"]))
        assert sorted(got) == sorted(planned) and len(got) == len(set(got)) == 33  # every point exactly once
        assert list(points["seq"]) == list(range(1, 34))
        events = store.events(run_id)
        assert {"interrupted", "gap"} <= set(events["kind"])
        assert store.run(run_id).status == "completed"
        # The run keeps the operator it began with; the one who resumed it is named in the gap event.
        assert store.run(run_id).operator != "night shift"
        assert any("resumed by night shift" in m for m in events.loc[events["kind"] == "gap", "message"])
    _outputs_off(bench)
    # A completed run cannot be resumed.
    code = main(["run", "--resume", "latest", "--station", str(station), "--db", str(db)])
    assert code == EXIT_BAD_INPUT and "only interrupted or tripped" in capsys.readouterr().err


def test_compare_two_runs_flags_a_real_change(simulated_bench, station_for, tmp_path, capsys):
    from benchctl.procedure import load_procedure
    from benchctl.runner import execute

    bench = simulated_bench("flyback-48v-5v", time_scale=50.0)
    station = station_for(bench)
    emap = load_procedure("efficiency_map")
    params = emap.resolve_parameters(values={**bench.procedure_parameters(), "load_pct": [0, 25, 50, 75, 100]})
    db = tmp_path / "cmp.db"
    with Store.open(str(db)) as store:
        a = execute(emap, params, station, store).run_id
        b = execute(emap, params, station, store).run_id
        bench.model.inject_fault("overheat")  # losses grow: efficiency drops in run C
        time.sleep(0.5)
        c = execute(emap, params, station, store).run_id
        same = compare_points(store.points(a), store.points(b), run_a=a, run_b=b)
        changed = compare_points(store.points(a), store.points(c), run_a=a, run_b=c)
    assert same.matched_points == 15 and same.only_in_a == same.only_in_b == 0
    # Same DUT, same settings: only meter noise, nothing beyond the tolerances.
    assert [d for d in same.flagged if d.quantity == "efficiency"] == []
    effs = [d for d in changed.deltas if d.quantity == "efficiency"]
    assert effs and all(d.delta < 0 for d in effs)  # the overheated DUT is less efficient everywhere
    assert any(d.flagged for d in effs)
    code = main(["compare", str(a), str(c), "--db", str(db), "--report", str(tmp_path / "cmp")])
    out = capsys.readouterr().out
    assert code == EXIT_OK and "changes beyond tolerance" in out and "15 matched operating points" in out
    assert (tmp_path / "cmp" / "00-compare-efficiency.png").exists()


def test_compare_tolerates_small_setpoint_differences():
    import pandas as pd

    a = pd.DataFrame({"seq": [1, 2], "vin_set_v": [48.0, 48.0], "iout_set_a": [1.0, 2.0], "vout_v": [5.0, 4.99],
                      "pin_w": [6.0, 12.0], "pout_w": [5.0, 9.98]})
    b = a.assign(iout_set_a=[1.004, 2.01], vout_v=[5.0, 4.98])
    cmp = compare_points(a, b, rel_tol=0.01)
    assert cmp.matched_points == 2
    dv = [d for d in cmp.deltas if d.quantity == "vout_v"]
    assert dv[1].delta == pytest.approx(-0.01) and dv[1].flagged  # beyond 2 mV
    assert not dv[0].flagged
    assert compare_points(a, b, rel_tol=0.001).matched_points == 0


def test_sigterm_during_a_job_stops_it_safely_with_143(simulated_bench, tmp_path):
    """A scheduler's SIGTERM in the first step: outputs off, later steps not run, exit 128 + 15."""
    from benchctl.exit_codes import ExitCode

    bench = simulated_bench("flyback-48v-5v", time_scale=2.0)
    station = bench.write_station(tmp_path / "st.toml")
    db = tmp_path / "job.db"
    proc = subprocess.Popen([sys.executable, "-m", "benchctl.cli", "job", str(_job_file(tmp_path)), "--station",
                             str(station), "--db", str(db)],
                            stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, env={**os.environ})
    try:
        deadline = time.monotonic() + 60
        count = 0
        while time.monotonic() < deadline and count < 2 and proc.poll() is None:
            if db.exists():
                try:
                    with sqlite3.connect(f"file:{db}?mode=ro", uri=True, timeout=1) as con:
                        count = con.execute("select count(*) from points").fetchone()[0]
                except sqlite3.Error:
                    pass
            time.sleep(0.02)
        assert count >= 2, "the job did not record two points within 60 s"
        proc.send_signal(signal.SIGTERM)
        proc.wait(timeout=30)
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
    # 128 + SIGTERM's number 15 (the shell's convention, from memory).
    assert proc.returncode == ExitCode.TERMINATED == 128 + signal.SIGTERM
    _outputs_off(bench)
    with Store.open(str(db)) as store:
        runs = store.runs()
        assert len(runs) == 1, runs  # the second step never began
        assert runs["status"].tolist() == ["interrupted"]
        assert "SIGTERM" in " ".join(store.events(int(runs["run_id"].iloc[0]))["message"])
