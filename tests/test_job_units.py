"""A job over several units: one run per unit and step, all linked to the job, one JUnit file
for the night, and the per-unit hook that gets each unit connected."""

from __future__ import annotations

import junitparser
import pytest

from benchctl.cli import EXIT_BAD_INPUT, EXIT_FAILED, main
from benchctl.errors import ConfigurationError
from benchctl.job import JobFileError, parse_job, parse_serials
from benchctl.job_junit import JobEntry, job_junit_xml
from benchctl.job_units import FixedUnit, JobStopped, OperatorSwap, unit_change_for
from benchctl.store import Store

LIMITS = """
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


def _job(tmp_path, serials_line='dut_serials = ["U1", "U2", "U3"]\nunit_change = "fixed"\n'):
    (tmp_path / "limits.toml").write_text(LIMITS)
    (tmp_path / "params.toml").write_text("vin_v = [36.0, 75.0]\nload_pct = [0.0, 50.0, 100.0]\n")
    job = tmp_path / "night.toml"
    job.write_text('[job]\nname = "night"\ndut_part = "FB-48S05"\ndut_revision = "B"\n' + serials_line +
                   '\n[[step]]\nprocedure = "efficiency_map"\nparams = "params.toml"\nlimits = "limits.toml"\n')
    return job


def test_three_units_one_job_one_junit_file(simulated_bench, tmp_path, capsys):
    bench = simulated_bench("flyback-48v-5v", time_scale=50.0)
    station = bench.write_station(tmp_path / "st.toml")
    db = tmp_path / "night.db"
    xml = tmp_path / "night.xml"
    code = main(["job", str(_job(tmp_path)), "--station", str(station), "--db", str(db), "--junit", str(xml)])
    out = capsys.readouterr().out
    assert code == EXIT_FAILED, out  # the impossible band fails on every unit
    with Store.open(str(db)) as store:
        runs = store.runs().sort_values("run_id")
        assert runs["dut_serial"].tolist() == ["U1", "U2", "U3"]
        assert runs["job_id"].nunique() == 1 and runs["job_id"].notna().all()
        assert set(runs["dut_part"]) == {"FB-48S05"} and set(runs["dut_revision"]) == {"B"}
        for k, run_id in enumerate(runs["run_id"], 1):
            ev = store.events(int(run_id))
            note = ev[ev["kind"] == "job_step"]
            assert len(note) == 1
            d = note["details"].iloc[0]
            assert (d["unit_index"], d["units"], d["step"], d["steps"]) == (k, 3, 1, 1)
            assert d["serials"] == ["U1", "U2", "U3"]
    # read back with junitparser (a JUnit XML reader)
    suites = list(junitparser.JUnitXml.fromfile(str(xml)))
    assert len(suites) == 3
    assert [s.name.split(" / ")[0] for s in suites] == ["U1", "U2", "U3"]
    for s in suites:
        assert s.tests == 2 and s.failures == 1
        props = {p.name: p.value for p in s.properties()}
        assert props["unit"] == s.name.split(" / ")[0] and props["dut_serial"] == props["unit"]


def test_serials_on_the_command_line_replace_the_job_files(simulated_bench, tmp_path, capsys):
    bench = simulated_bench("flyback-48v-5v", time_scale=50.0)
    station = bench.write_station(tmp_path / "st.toml")
    db = tmp_path / "cli.db"
    job = _job(tmp_path, serials_line='dut_serial = "ONE"\n')
    main(["job", str(job), "--station", str(station), "--db", str(db), "--dut-serial", "X7,X9",
          "--unit-change", "fixed", "--dut-rev", "C"])
    capsys.readouterr()
    with Store.open(str(db)) as store:
        runs = store.runs().sort_values("run_id")
        assert runs["dut_serial"].tolist() == ["X7", "X9"] and set(runs["dut_revision"]) == {"C"}


def test_several_units_without_a_way_to_change_them_are_refused_before_any_instrument(simulated_bench, tmp_path,
                                                                                        capsys):
    bench = simulated_bench("flyback-48v-5v")
    station = bench.write_station(tmp_path / "st.toml")
    job = _job(tmp_path, serials_line='dut_serials = ["U1", "U2"]\n')
    code = main(["job", str(job), "--station", str(station), "--db", str(tmp_path / "r.db")])
    err = capsys.readouterr().err
    assert code == EXIT_BAD_INPUT and "unit_change" in err and "--unit-change" in err
    assert bench.instruments["source"].audit.commands() == []


def test_job_file_serials_are_validated():
    base = '[job]\nname = "n"\n{}\n[[step]]\nprocedure = "efficiency_map"\n'
    assert parse_job(base.format('dut_serials = ["A", "B"]')).units == ("A", "B")
    assert parse_job(base.format('dut_serial = "A"')).units == ("A",)
    for bad, words in (('dut_serials = ["A", "A"]', "twice"), ('dut_serials = "A,B"', "list"),
                       ('dut_serial = "A"\ndut_serials = ["B"]', "not both"), ('unit_change = "robot"', "robot")):
        with pytest.raises(JobFileError, match=words):
            parse_job(base.format(bad))
    assert parse_serials(" A, B ,C") == ("A", "B", "C")
    with pytest.raises(JobFileError):
        parse_serials("A,,B")


def test_the_operator_hook_asks_for_each_unit_and_can_stop_the_night():
    asked, told = [], []
    swap = OperatorSwap(lambda p: asked.append(p) or "", told.append, hazardous=True)
    swap.select(0, 2, "U1")
    swap.select(1, 2, "U2")
    assert "connect unit U1 (1/2)" in asked[0] and "connect unit U2 (2/2)" in asked[1]
    assert any("every output is off" in t for t in told) and any("CAUTION" in t for t in told)
    stopper = OperatorSwap(lambda p: "stop", told.append)
    with pytest.raises(JobStopped):
        stopper.select(1, 3, "U2")
    assert isinstance(unit_change_for("", units=1, interactive=False, ask=input, tell=print), FixedUnit)
    with pytest.raises(ConfigurationError, match="unit_change"):
        unit_change_for("", units=2, interactive=False, ask=input, tell=print)
    with pytest.raises(ConfigurationError, match="terminal"):
        unit_change_for("operator", units=2, interactive=False, ask=input, tell=print)


def test_a_night_that_ended_early_says_so_in_its_junit_file(tmp_path):
    entries = [JobEntry("U1", 1, "efficiency_map", 4, "completed"), JobEntry("U1", 2, "loop_gain", 5, "tripped",
                                                                              "interlock: vout over limit"),
               JobEntry("U2", 1, "efficiency_map"), JobEntry("U2", 2, "loop_gain")]
    path = tmp_path / "j.xml"
    path.write_bytes(job_junit_xml("night", 7, entries))
    xml = junitparser.JUnitXml.fromfile(str(path))
    suites = list(xml)
    assert len(suites) == 4 and xml.errors == 3 and xml.tests == 4
    kinds = [r.type for s in suites for case in s for r in case.result]
    assert kinds == ["run_not_completed", "not_run", "not_run"]
