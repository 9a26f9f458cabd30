"""JUnit XML of a limit check, read back with ``junitparser`` and checked with xml.etree.

Element and attribute names are checked against the common JUnit XML schema
(``junit-10.xsd`` as used by CI servers, after the Ant junit task's report; names
from memory): testsuites/testsuite/testcase, properties/property, failure and error
with ``message``/``type``, skipped with ``message``, system-out/system-err; testsuite
``timestamp`` an ISO 8601 date-time without a zone.
"""

from __future__ import annotations

import re
import xml.etree.ElementTree as ET
from datetime import datetime, timezone

import pytest
from junitparser import Error, Failure, JUnitXml, Skipped

from benchctl.junit import junit_xml, outcome_message, write_junit
from benchctl.limits import RunContext, RunData, check_limits, parse_limits
import numpy as np
import pandas as pd

LIMITS = """
[spec]
name = "FB-48S05"
[[limit]]
name = "efficiency at half load and above"
quantity = "efficiency"
min = 0.85
where.load_pct = { min = 50 }
[[limit]]
name = "efficiency at light load"
quantity = "efficiency"
min = 0.80
where.iout_set_a = 0.5
[[limit]]
name = "phase margin"
quantity = "phase_margin_deg"
min = 45
[[limit]]
name = "ripple target"
quantity = "ripple_pkpk_v"
max = 0.05
required = false
[[limit]]
name = "light-load efficiency target"
quantity = "efficiency"
min = 0.80
where.iout_set_a = 0.5
required = false
[[limit]]
name = "gain margin"
quantity = "gain_margin_db"
min = 10
procedure = "loop_gain"
"""

def points_frame(rows: list[dict]) -> pd.DataFrame:
    """A wide points frame shaped like Store.points."""
    frame = pd.DataFrame(rows)
    frame.insert(0, "seq", np.arange(1, len(rows) + 1, dtype="int64"))
    return frame


def flyback_efficiency_results() -> pd.DataFrame:
    """Per-point efficiency results at 48 V shaped like Store.results (hand-picked values)."""
    rows = [(1, 0.5, 0.781), (2, 1.25, 0.842), (3, 2.5, 0.871), (4, 3.75, 0.866), (5, 5.0, 0.858)]
    return pd.DataFrame({
        "name": ["efficiency"] * len(rows),
        "value": pd.Series([e for _, _, e in rows], dtype="float64"),
        "unit": [""] * len(rows),
        "details": pd.Series([None] * len(rows), dtype="object"),
        "scope": pd.Series([{"seq": s, "vin_set_v": 48.0, "iout_set_a": i} for s, i, _ in rows], dtype="object"),
    })


CHECKED_AT = datetime(2024, 5, 6, 7, 8, 9, tzinfo=timezone.utc)


def make_report(status: str = "completed"):
    ctx = RunContext(
        run_id=12, procedure="efficiency_map", status=status, parameters={"iout_rated_a": 5.0},
        station="bench-3", dut_part="FB-48S05", dut_revision="B", dut_serial="0007", host="bench-pc-3",
        started_utc=datetime(2024, 5, 6, 6, 0, 0, tzinfo=timezone.utc),
        ended_utc=datetime(2024, 5, 6, 6, 30, 0, tzinfo=timezone.utc),
    )
    data = RunData(context=ctx, points=points_frame([{"vin_set_v": 48.0}]), results=flyback_efficiency_results())
    return check_limits(parse_limits(LIMITS), data, checked_utc=CHECKED_AT)


# Outcomes on the hand data (see test_limits_evaluate): pass, fail, not checked (required);
# not checked, fail (advisory); "gain margin" is for another procedure and is left out.
EXPECTED = {
    "efficiency at half load and above": None,
    "efficiency at light load": Failure,
    "phase margin": Error,
    "ripple target": Skipped,
    "light-load efficiency target": None,
}


@pytest.fixture()
def xml_path(tmp_path):
    return write_junit(make_report(), tmp_path / "check.xml")


def test_junitparser_reads_counts_and_results(xml_path):
    xml = JUnitXml.fromfile(str(xml_path))
    suites = list(xml)
    assert len(suites) == 1
    suite = suites[0]
    assert suite.name == "efficiency_map run 12"
    assert (suite.tests, suite.failures, suite.errors, suite.skipped) == (5, 1, 1, 1)
    assert suite.time == pytest.approx(1800.0)            # run duration 06:00 -> 06:30
    assert suite.hostname == "bench-pc-3"
    cases = {c.name: c for c in suite}
    assert set(cases) == set(EXPECTED)
    for name, kind in EXPECTED.items():
        case = cases[name]
        assert case.classname == "benchctl.efficiency_map"
        if kind is None:
            assert case.is_passed, name
        else:
            assert [type(r) for r in case.result] == [kind], name
    failure = cases["efficiency at light load"].result[0]
    assert failure.type == "limit_failed"
    assert "0.781" in failure.message and "iout_set_a=0.5" in failure.message   # worst value and where
    assert "0.781" in failure.text
    assert "not checked" in cases["phase margin"].result[0].message
    assert "advisory limit not met" in cases["light-load efficiency target"].system_out
    props = {p.name: p.value for p in suite.properties()}
    assert props["run_id"] == "12" and props["station"] == "bench-3"
    assert (props["dut_part"], props["dut_revision"], props["dut_serial"]) == ("FB-48S05", "B", "0007")
    assert props["run_status"] == "completed"
    assert props["not_applicable"] == "gain margin"
    # the written counts equal junitparser's own recount of the test cases
    written = (suite.tests, suite.failures, suite.errors, suite.skipped)
    suite.update_statistics()
    assert (suite.tests, suite.failures, suite.errors, suite.skipped) == written


ALLOWED_ATTRIBUTES = {  # junit-10.xsd (from memory)
    "testsuites": {"name", "time", "tests", "failures", "errors", "skipped", "disabled"},
    "testsuite": {"name", "tests", "failures", "errors", "skipped", "time", "timestamp", "hostname", "id",
                  "package", "disabled", "group", "file", "log", "url", "version"},
    "properties": set(),
    "property": {"name", "value"},
    "testcase": {"name", "classname", "time", "assertions", "status", "timestamp", "group", "file", "line"},
    "failure": {"message", "type"},
    "error": {"message", "type"},
    "skipped": {"message"},
    "system-out": set(),
    "system-err": set(),
}
TESTCASE_CHILD_ORDER = ["skipped", "error", "failure", "system-out", "system-err"]


def test_etree_element_and_attribute_names_follow_the_schema(xml_path):
    root = ET.parse(xml_path).getroot()
    assert root.tag == "testsuites"
    for el in root.iter():
        assert el.tag in ALLOWED_ATTRIBUTES, el.tag
        assert set(el.attrib) <= ALLOWED_ATTRIBUTES[el.tag], (el.tag, el.attrib)
    suite = root.find("testsuite")
    assert suite is not None
    assert list(suite)[0].tag == "properties"                        # properties come first
    assert all(child.tag == "testcase" for child in list(suite)[1:])
    assert {"name", "tests", "failures", "errors", "skipped", "time", "timestamp"} <= set(suite.attrib)
    assert re.fullmatch(r"\d{4}-\d{2}-\d{2}T\d{2}:\d{2}:\d{2}", suite.get("timestamp"))
    assert suite.get("timestamp") == "2024-05-06T07:08:09"
    for case in suite.findall("testcase"):
        assert case.get("name") and case.get("classname")
        tags = [c.tag for c in case]
        assert tags == sorted(tags, key=TESTCASE_CHILD_ORDER.index)
        for result in case:
            if result.tag in ("failure", "error", "skipped"):
                assert result.get("message")
    # counts in the attributes agree with the elements present
    cases = suite.findall("testcase")
    assert int(suite.get("tests")) == len(cases)
    assert int(suite.get("failures")) == sum(1 for c in cases if c.find("failure") is not None)
    assert int(suite.get("errors")) == sum(1 for c in cases if c.find("error") is not None)
    assert int(suite.get("skipped")) == sum(1 for c in cases if c.find("skipped") is not None)
    assert root.get("tests") == suite.get("tests")


def test_run_not_completed_adds_an_error_case():
    root = ET.fromstring(junit_xml(make_report("interrupted")))
    suite = root.find("testsuite")
    assert (suite.get("tests"), suite.get("failures"), suite.get("errors")) == ("6", "1", "2")
    case = [c for c in suite.findall("testcase") if c.get("name") == "run completed"]
    assert len(case) == 1
    error = case[0].find("error")
    assert error.get("type") == "run_not_completed" and "interrupted" in error.get("message")


def test_xml_declares_utf8_and_keeps_non_ascii_names(tmp_path):
    text = LIMITS.replace('name = "phase margin"', 'name = "phase margin ≥ 45°"')
    ctx = RunContext(run_id=3, procedure="loop_gain", status="completed")
    data = RunData(context=ctx, points=points_frame([{"vin_set_v": 48.0}]), results=flyback_efficiency_results())
    path = write_junit(check_limits(parse_limits(text), data, checked_utc=CHECKED_AT), tmp_path / "u.xml")
    raw = path.read_bytes()
    assert raw.startswith(b"<?xml version='1.0' encoding='utf-8'?>")
    names = [c.name for s in JUnitXml.fromfile(str(path)) for c in s]
    assert "phase margin ≥ 45°" in names
    assert "gain margin" in names                   # loop_gain run: that limit applies now


def test_outcome_message_states_bound_worst_margin_and_where():
    report = make_report()
    by_name = {o.limit.name: o for o in report.outcomes}
    msg = outcome_message(by_name["efficiency at half load and above"])
    # worst 0.858 at 5 A against min 0.85: margin 0.008, relative 0.008/0.85 = +0.941 % (hand computed)
    assert "efficiency >= 0.85" in msg and "worst 0.858" in msg and "margin 0.008" in msg and "+0.941 %" in msg
    assert "load_pct >= 50 %" in msg


def test_unwritable_path_is_a_configuration_error(tmp_path):
    from benchctl.errors import ConfigurationError

    with pytest.raises(ConfigurationError) as info:
        write_junit(make_report(), tmp_path / "no-such-dir" / "x.xml")
    assert "no-such-dir" in str(info.value)
