"""Calibration records: each instrument's due date and certificate in the station file.

Validated at load (a TOML date, RFC 3339 full-date as TOML 1.0 "Local Date"); stored with
the run (a ``calibration`` event, and the station text), shown by ``benchctl show`` and
the report; an instrument past its due date gives a caution and a ``calibration_overdue``
event, or stops the run before any instrument is opened when the station says
``calibration_overdue = "refuse"``. The date of the check is injected (``today=``).
"""

from __future__ import annotations

import datetime as dt

import pytest

from benchctl.errors import CalibrationOverdueError, StationFileError
from benchctl.procedure import load_procedure
from benchctl.runner import execute
from benchctl.station import calibration_records_from_text, parse_station

DUE = dt.date(2027, 3, 31)


def _with_calibration(text: str, *, policy: str | None = None, due: str = "2027-03-31") -> str:
    text = text.replace("[instruments.source]\n",
                        f'[instruments.source]\ncalibration_due = {due}\ncalibration_certificate = "CAL-0042"\n', 1)
    text = text.replace("[instruments.load]\n", "[instruments.load]\ncalibration_due = 2030-01-15\n", 1)
    if policy is not None:
        text = text.replace("[station]\n", f'[station]\ncalibration_overdue = "{policy}"\n', 1)
    return text


def test_calibration_keys_are_validated_at_load(simulated_bench):
    bench = simulated_bench("flyback-48v-5v")
    station = parse_station(_with_calibration(bench.station_toml()))
    source = station.instruments["source"]
    assert (source.calibration_due, source.calibration_certificate) == (DUE, "CAL-0042")
    assert station.calibration_overdue == "warn"  # the default
    # Due on 31 March: in date that day, one day overdue on 1 April.
    assert source.calibration_overdue_days(DUE) is None
    assert source.calibration_overdue_days(dt.date(2027, 4, 1)) == 1
    assert [(r.role, r.due) for r in calibration_records_from_text(station.text)] == \
        [("source", DUE), ("load", dt.date(2030, 1, 15))]

    bad = bench.station_toml().replace("[instruments.source]\n", '[instruments.source]\ncalibration_due = 2027-03-31T10:00:00\n'
                                       'calibration_certificate = 42\n', 1).replace(
        "[instruments.load]\n", '[instruments.load]\ncalibration_certificate = "C-1"\n', 1).replace(
        "[station]\n", '[station]\ncalibration_overdue = "ignore"\n', 1)
    with pytest.raises(StationFileError) as info:
        parse_station(bad)
    problems = "\n".join(info.value.problems)
    assert "instruments.source.calibration_due" in problems and "must be a TOML date" in problems
    assert "instruments.source.calibration_certificate: 42 must be the certificate id as text" in problems
    assert "instruments.load.calibration_certificate: given without calibration_due" in problems
    assert "station.calibration_overdue: 'ignore' must be one of 'warn', 'refuse'" in problems


def _emap(bench):
    emap = load_procedure("efficiency_map")
    params = emap.resolve_parameters(values={**bench.procedure_parameters(), "vin_v": [48.0], "load_pct": [50.0]})
    return emap, params


def test_an_overdue_instrument_gives_a_caution_and_an_event(simulated_bench, benchctl_store):
    bench = simulated_bench("flyback-48v-5v")
    station = parse_station(_with_calibration(bench.station_toml()))
    emap, params = _emap(bench)
    told: list[str] = []
    outcome = execute(emap, params, station, benchctl_store, today=dt.date(2027, 4, 10), notify=told.append)
    assert outcome.status == "completed", outcome.message
    assert len(told) == 1 and "calibration overdue: source (due 2027-03-31, 10 day(s) ago, certificate CAL-0042)" \
        in told[0]
    events = benchctl_store.events(outcome.run_id)
    overdue = events[events["kind"] == "calibration_overdue"]
    assert len(overdue) == 1 and "source due 2027-03-31" in overdue["message"].iloc[0]
    records = events[events["kind"] == "calibration"]
    assert len(records) == 1
    assert "source due 2027-03-31 (CAL-0042)" in records["message"].iloc[0]
    assert "load due 2030-01-15" in records["message"].iloc[0]


def test_in_date_instruments_give_no_caution(simulated_bench, benchctl_store):
    bench = simulated_bench("flyback-48v-5v")
    station = parse_station(_with_calibration(bench.station_toml(), policy="refuse"))
    emap, params = _emap(bench)
    told: list[str] = []
    outcome = execute(emap, params, station, benchctl_store, today=DUE, notify=told.append)
    assert outcome.status == "completed", outcome.message
    assert told == []
    kinds = set(benchctl_store.events(outcome.run_id)["kind"])
    assert "calibration" in kinds and "calibration_overdue" not in kinds


def test_refuse_stops_the_run_before_anything_is_opened(simulated_bench, benchctl_store):
    bench = simulated_bench("flyback-48v-5v")
    station = parse_station(_with_calibration(bench.station_toml(), policy="refuse"))
    emap, params = _emap(bench)
    with pytest.raises(CalibrationOverdueError, match="source .due 2027-03-31, 1 day.s. ago"):
        execute(emap, params, station, benchctl_store, today=dt.date(2027, 4, 1))
    for role, inst in bench.instruments.items():
        assert not [e for e in inst.audit.entries() if e.kind == "command"], f"{role} was spoken to"
    assert benchctl_store.runs().empty  # no run was begun


def test_show_and_the_report_give_the_calibration(simulated_bench, benchctl_store, tmp_path, capsys):
    from benchctl.cli import main
    from benchctl.report.build import build_report

    bench = simulated_bench("flyback-48v-5v")
    # A due date long past: overdue on the day the run begins, whatever day the test runs.
    station = parse_station(_with_calibration(bench.station_toml(), due="2001-02-03"))
    emap, params = _emap(bench)
    outcome = execute(emap, params, station, benchctl_store)
    assert outcome.status == "completed", outcome.message
    capsys.readouterr()
    assert main(["show", str(outcome.run_id), "--db", str(benchctl_store.url)]) == 0
    out = " ".join(capsys.readouterr().out.split())
    assert "due 2001-02-03, certificate CAL-0042 OVERDUE by" in out
    assert "due 2030-01-15" in out
    assert main(["show", str(outcome.run_id), "--db", str(benchctl_store.url), "--json"]) == 0
    import json

    payload = json.loads(capsys.readouterr().out)
    by_role = {c["role"]: c for c in payload["calibration"]}
    assert by_role["source"]["calibration_certificate"] == "CAL-0042"
    assert by_role["source"]["days_overdue_at_run"] > 0 and by_role["load"]["days_overdue_at_run"] is None
    page = build_report(benchctl_store, outcome.run_id, tmp_path / "report").html_path.read_text(encoding="utf-8")
    assert "<th>calibration due</th>" in page and "CAL-0042" in page and "2001-02-03" in page
    assert "overdue" in page and "2030-01-15" in page
