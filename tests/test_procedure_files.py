"""Procedure files are Python: a listing reads them without running them, and a procedure whose
plan() (or import) fails is named with its file and line, in one line, without a traceback."""

from __future__ import annotations

import sys

import pytest

from benchctl.cli import EXIT_BAD_INPUT, EXIT_OK, main
from benchctl.procedure import available_procedures, find_procedure, load_procedure
from benchctl.procedure_summary import NotStatic, read_summary

STATION = """[station]
name = "bench-l"
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

PROCEDURE = '''"""A sweep whose plan fails for large inputs."""
from pathlib import Path

from benchctl.procedure import Parameter, power_parameters

Path({marker!r}).write_text("module code ran")
NAME = "failing_sweep"
ROLES = ("source",)
PARAMETERS = [Parameter("vin_v", "V", [12.0], minimum=0.0, maximum=60.0, kind="float_list", help="line"),
              *power_parameters(startup_delay_s=0.2)]


def _check(v):
    if v > 20:
        raise ValueError(f"{{v}} V is more than this fixture can take\\nsecond line")
    return v


def plan(p):
    return [{{"vin_set_v": _check(v)}} for v in p.vin_v]


def run(bench, p):
    pass
'''


@pytest.fixture
def files(tmp_path):
    station = tmp_path / "station.toml"
    station.write_text(STATION, encoding="utf-8")
    marker = tmp_path / "ran.txt"
    proc = tmp_path / "failing_sweep.py"
    proc.write_text(PROCEDURE.format(marker=str(marker)), encoding="utf-8")
    return station, proc, marker


def test_a_plan_that_raises_is_one_line_naming_the_file_and_line(files, tmp_path, capsys):
    station, proc, _ = files
    code = main(["run", str(proc), "--station", str(station), "--db", str(tmp_path / "r.db"), "--list",
                 "--set", "vin_v=12,24"])
    err = capsys.readouterr().err
    assert code == EXIT_BAD_INPUT
    lines = [line for line in err.splitlines() if line.strip() and not line.startswith("database:")]
    assert len(lines) == 1 and lines[0].startswith("error:"), err
    raising = next(n for n, text in enumerate(proc.read_text().splitlines(), 1) if "raise ValueError" in text)
    assert f"{proc} line {raising}: plan() raised ValueError: 24.0 V is more than this fixture can take second " \
           "line" in lines[0]
    assert "Traceback" not in err
    # Within its range the same file lists its plan.
    assert main(["run", str(proc), "--station", str(station), "--db", str(tmp_path / "r.db"), "--list"]) == EXIT_OK


def test_a_procedure_that_fails_to_import_is_named_with_its_line(tmp_path, capsys):
    station = tmp_path / "station.toml"
    station.write_text(STATION, encoding="utf-8")
    broken = tmp_path / "broken.py"
    broken.write_text("NAME = 'broken'\nROLES = ('source',)\nPARAMETERS = []\nx = 1 / 0\n", encoding="utf-8")
    assert main(["run", str(broken), "--station", str(station), "--db", str(tmp_path / "r.db"), "--list"]) \
        == EXIT_BAD_INPUT
    err = capsys.readouterr().err
    assert f"{broken} line 4 failed to import: ZeroDivisionError" in " ".join(err.split())
    assert "Traceback" not in err


def test_a_listing_reads_declarations_without_running_the_file(files):
    _, proc, marker = files
    summary = read_summary(proc)
    assert not marker.exists()  # the module code (which writes the marker) never ran
    assert summary.name == "failing_sweep" and summary.roles == ("source",)
    assert summary.description == "A sweep whose plan fails for large inputs."
    assert [p.name for p in summary.parameters] == ["vin_v", "source_current_limit_a", "startup_delay_s"]
    assert summary.parameters[2].default == 0.2
    loaded = load_procedure(str(proc))  # importing it does run it: what the README warns about
    assert marker.exists() and loaded.parameters == summary.parameters


def test_computed_declarations_are_not_guessed(tmp_path):
    path = tmp_path / "computed.py"
    path.write_text("ROLES = ('source',)\nPARAMETERS = [make() for make in []]\n", encoding="utf-8")
    with pytest.raises(NotStatic, match="PARAMETERS"):
        read_summary(path)


@pytest.mark.parametrize("name", available_procedures())
def test_the_listing_of_every_bundled_procedure_equals_what_importing_it_declares(name):
    summary = read_summary(find_procedure(name))
    loaded = load_procedure(name)
    assert (summary.name, summary.description, summary.roles, summary.parameters) == \
        (loaded.name, loaded.description, loaded.roles, loaded.parameters)


def test_benchctl_procedures_imports_no_procedure(capsys):
    before = {m for m in sys.modules if m.startswith("benchctl_procedure_")}
    assert main(["procedures"]) == EXIT_OK
    out = capsys.readouterr().out
    after = {m for m in sys.modules if m.startswith("benchctl_procedure_")}
    assert after == before
    for name in available_procedures():
        assert name in out
