"""``check_run`` / ``benchctl check`` on a store filled through the store API.

The run is a small flyback efficiency map (36-75 V in, 5 V / 5 A out, demo scenario).
Derived results are computed here from the points by their definitions: efficiency
= Pout / Pin, load regulation = (V_NL - V_FL) / V_FL x 100 (textbook convention) -
both common practice. Exit codes follow the rule in benchctl.limits: 1 a required
limit failed, 4 one could not be checked or the run is not completed, else 0.
The XML is read back with junitparser.
"""

from __future__ import annotations

import argparse
import json

import pytest
from junitparser import Failure, JUnitXml

from benchctl.cli import EXIT_FAILED, EXIT_NOT_CHECKED, EXIT_OK
from benchctl.commands.check import add_check_arguments, check_run, cmd_check
from benchctl.errors import LimitsFileError
from benchctl.store import RunStart, Store, sha256_hex

VOUT_V = {0.5: 5.010, 2.5: 5.000, 5.0: 4.985}          # output voltage by load (A)
LOSS_W = {36.0: 3.0, 48.0: 3.3, 75.0: 4.2}             # full-load loss by line (W), hand-picked


def pin_w(vin: float, iout: float) -> float:
    return VOUT_V[iout] * iout + LOSS_W[vin] * (0.3 + 0.7 * iout / 5.0)


def fill_run(store: Store, *, status: str = "completed") -> int:
    run_id = store.begin_run(RunStart(
        procedure="efficiency_map", procedure_sha256=sha256_hex("def run(bench, p): ...\n"),
        station_name="bench-3", parameters={"iout_rated_a": 5.0, "vout_nom_v": 5.0},
        dut_part="FB-48S05", dut_revision="B", dut_serial="0007", operator="test", host="bench-pc-3", pid=1,
    ))
    for vin in LOSS_W:
        for iout, vout in VOUT_V.items():
            pin, pout = pin_w(vin, iout), vout * iout
            seq = store.record_point(run_id, {"vin_set_v": vin, "iout_set_a": iout, "vin_v": vin, "pin_w": pin,
                                              "vout_v": vout, "iout_a": iout, "pout_w": pout})
            store.record_result(run_id, "efficiency", pout / pin, unit="",
                                scope={"seq": seq, "vin_set_v": vin, "iout_set_a": iout})
        v_nl, v_fl = VOUT_V[0.5], VOUT_V[5.0]
        store.record_result(run_id, "load_regulation_pct", (v_nl - v_fl) / v_fl * 100.0, unit="%",
                            scope={"vin_set_v": vin})
    store.end_run(run_id, status)
    return run_id


PASSING = """
[[limit]]
name = "load regulation within +/-1 %"
quantity = "load_regulation_pct"
min = -1.0
max = 1.0
"""
FAILING = """
[[limit]]
name = "efficiency at half load and above"
quantity = "efficiency"
min = 0.86
where.load_pct = { min = 50 }
"""
UNMEASURED = """
[[limit]]
name = "phase margin at the corners"
quantity = "phase_margin_deg"
min = 45
where.vin_set_v = { at = "extremes" }
"""


@pytest.fixture()
def store(tmp_path):
    with Store.open(tmp_path / "runs.db") as s:
        yield s


def write(tmp_path, text: str, name: str = "spec.toml"):
    path = tmp_path / name
    path.write_text("[spec]\nname = \"FB-48S05 rev B\"\n" + text, encoding="utf-8")
    return path


def expected_worst_efficiency() -> float:
    # at >= 50 % load (2.5 and 5 A) the lowest Pout/Pin is at 75 V, 2.5 A or 5 A
    return min(VOUT_V[i] * i / pin_w(v, i) for v in LOSS_W for i in (2.5, 5.0))


def test_one_passing_one_failing_limit_exits_1_and_writes_xml(store, tmp_path, capsys):
    run_id = fill_run(store)
    xml = tmp_path / "check.xml"
    report = check_run(store, run_id, write(tmp_path, PASSING + FAILING), junit_path=xml)
    assert report.exit_code == EXIT_FAILED and report.passed is False
    reg, eff = report.outcomes
    # load regulation (5.010 - 4.985)/4.985 x 100 = 0.5015 % at every line (hand computed)
    assert reg.passed is True
    assert reg.worst_value == pytest.approx((5.010 - 4.985) / 4.985 * 100)
    assert reg.margin == pytest.approx(1.0 - (5.010 - 4.985) / 4.985 * 100)
    assert eff.passed is False
    worst = expected_worst_efficiency()
    # by hand: 75 V, 2.5 A: Pout 5.000 x 2.5 = 12.5 W, loss 4.2 x (0.3 + 0.35) = 2.73 W -> 12.5 / 15.23
    assert worst == pytest.approx(12.5 / 15.23)
    assert eff.worst_value == pytest.approx(worst)
    assert eff.margin == pytest.approx(worst - 0.86)
    assert (eff.worst_scope["vin_set_v"], eff.worst_scope["iout_set_a"]) == (75.0, 2.5)
    # 48 V 2.5 A: 12.5 / (12.5 + 3.3 x 0.65) = 0.8535 and 75 V 5 A: 24.925 / 29.125 = 0.8558 fail too
    assert eff.n_values == 6 and len(eff.failing) == 3
    out = capsys.readouterr().out
    assert "PASS" in out and "FAIL" in out and "FAILED" in out

    suite = next(iter(JUnitXml.fromfile(str(xml))))
    assert (suite.tests, suite.failures, suite.errors, suite.skipped) == (2, 1, 0, 0)
    cases = {c.name: c for c in suite}
    assert cases["load regulation within +/-1 %"].is_passed
    assert isinstance(cases["efficiency at half load and above"].result[0], Failure)
    props = {p.name: p.value for p in suite.properties()}
    assert props["run_id"] == str(run_id) and props["dut_serial"] == "0007" and props["station"] == "bench-3"


def test_outcome_is_stored_with_the_run(store, tmp_path):
    run_id = fill_run(store)
    report = check_run(store, "latest", write(tmp_path, PASSING + FAILING), print_table=False)
    events = store.events(run_id)
    checks = events[events["kind"] == "limit_check"]
    assert len(checks) == 1
    details = checks.iloc[0]["details"]
    assert details["exit_code"] == EXIT_FAILED and details["n_failed"] == 1 and details["n_passed"] == 1
    assert checks.iloc[0]["message"] == report.summary
    results = store.results(run_id).set_index("name")
    stored = results.loc["limit:efficiency at half load and above"]
    assert stored["value"] == pytest.approx(expected_worst_efficiency())
    assert stored["details"]["status"] == "fail" and stored["details"]["limit"]["min"] == 0.86
    assert stored["scope"]["vin_set_v"] == 75.0
    assert results.loc["limit:load regulation within +/-1 %"]["details"]["passed"] is True


def test_only_passing_limits_exit_0(store, tmp_path):
    run_id = fill_run(store)
    report = check_run(store, run_id, write(tmp_path, PASSING), print_table=False, record=False)
    assert report.exit_code == EXIT_OK and report.passed is True
    assert store.events(run_id).empty                       # record=False leaves the run untouched


def test_quantity_without_data_exits_4(store, tmp_path):
    run_id = fill_run(store)
    report = check_run(store, run_id, write(tmp_path, PASSING + UNMEASURED), print_table=False)
    assert report.exit_code == EXIT_NOT_CHECKED
    assert report.outcomes[1].passed is None and "phase_margin_deg" in report.outcomes[1].reason


def test_failure_outranks_not_checked(store, tmp_path):
    run_id = fill_run(store)
    report = check_run(store, run_id, write(tmp_path, FAILING + UNMEASURED), print_table=False)
    assert report.exit_code == EXIT_FAILED


def test_interrupted_run_exits_4_even_when_limits_pass(store, tmp_path):
    run_id = fill_run(store, status="interrupted")
    xml = tmp_path / "i.xml"
    report = check_run(store, run_id, write(tmp_path, PASSING), junit_path=xml, print_table=False)
    assert report.outcomes[0].passed is True
    assert report.exit_code == EXIT_NOT_CHECKED
    suite = next(iter(JUnitXml.fromfile(str(xml))))
    assert (suite.tests, suite.errors) == (2, 1)


def test_bad_limits_file_raises_before_the_store_is_touched(store, tmp_path):
    run_id = fill_run(store)
    with pytest.raises(LimitsFileError) as info:
        check_run(store, run_id, write(tmp_path, '[[limit]]\nname = "x"\nquantity = "efficiency"\nmin = "high"\n'))
    assert "limit[1].min" in str(info.value)
    assert store.events(run_id).empty


def test_cmd_check_json_and_exit_code(store, tmp_path, capsys):
    fill_run(store)
    parser = argparse.ArgumentParser(prog="benchctl check")
    add_check_arguments(parser)
    xml = tmp_path / "cli.xml"
    db = str(tmp_path / "runs.db")
    args = parser.parse_args(["latest", "--limits", str(write(tmp_path, PASSING + FAILING)), "--db", db,
                              "--junit", str(xml), "--json"])
    code = cmd_check(args)
    assert code == EXIT_FAILED
    payload = json.loads(capsys.readouterr().out)
    assert payload["exit_code"] == EXIT_FAILED and payload["n_failed"] == 1
    assert [o["status"] for o in payload["outcomes"]] == ["pass", "fail"]
    assert payload["outcomes"][1]["worst_value"] == pytest.approx(expected_worst_efficiency())
    assert xml.exists()
    args_ok = parser.parse_args(["latest", "--limits", str(write(tmp_path, PASSING, "ok.toml")), "--db", db])
    assert cmd_check(args_ok) == EXIT_OK
    with pytest.raises(SystemExit):
        parser.parse_args(["latest"])                        # --limits is required
