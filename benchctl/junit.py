"""JUnit XML for a limit check, so a CI server shows each spec limit as a test.

The element and attribute names are those of the common JUnit XML schema (the Ant
``junit`` task's report format as CI servers read it, e.g. the ``junit-10.xsd``
schema; common practice, no formal standard)::

    <testsuites name="benchctl check" tests= failures= errors= skipped= time=>
      <testsuite name="<procedure> run <id>" tests= failures= errors= skipped=
                 time="<run duration s>" timestamp="<check time, UTC, no zone>" hostname="<run host>">
        <properties><property name="run_id" value="12"/> ... </properties>
        <testcase classname="benchctl.<procedure>" name="<limit name>" time="0">
          <failure message="..." type="limit_failed">every value outside</failure>
        </testcase>
        ...
      </testsuite>
    </testsuites>

Mapping of outcomes, chosen by what the schema's elements mean:

* passed -> an empty ``<testcase>`` with the worst value in ``<system-out>``;
* failed (required) -> ``<failure type="limit_failed">``: the assertion was evaluated
  and is false; ``message`` has the worst value, the margin and where;
* not checked (required) -> ``<error type="not_checked">``: the check could not be
  carried out because data are missing, a problem to look at, not a deliberate skip
  (``<skipped>`` means "not run on purpose", and CI servers show skipped as green);
* borderline (required; guarded acceptance, a value within its U of a bound) ->
  ``<error type="limit_borderline">``, and suspect (required; a value that would pass
  but comes from an unsettled or unverified point or a flagged result) ->
  ``<error type="limit_suspect">``: the assertion could be neither shown true nor
  false, so it is not a ``<failure>`` (the data do not show a violation) and not a
  pass; the build goes red as for an error, and the check exits 4 (not decided), the
  same as for a limit that could not be checked; the values are listed in the text;
* advisory limits (``required = false``): a failure, borderline or suspect becomes
  ``<system-out>`` text on a passing test case, a not-checked one ``<skipped>``;
* a run whose status is not ``completed`` adds one test case ``run completed`` with
  ``<error type="run_not_completed">``, so the XML alone tells that the run's points
  do not cover the envelope (the check's exit code says the same, 4).

Properties: run_id, procedure, run_status, station, dut_part, dut_revision,
dut_serial, limits_name, limits_file, limits_sha256, started_utc, ended_utc and one
per limit for other procedures (``not_applicable``).
"""

from __future__ import annotations

import logging
import xml.etree.ElementTree as ET
from datetime import datetime, timezone
from pathlib import Path

from benchctl.errors import ConfigurationError
from benchctl.limits import BORDERLINE, COMPLETED_STATUS, FAIL, NOT_CHECKED, SUSPECT, CheckReport, LimitOutcome

log = logging.getLogger(__name__)

#: Values printed in a failure's text at most (the rest are counted).
MAX_LISTED_VALUES = 50


def _fmt(value: float | None, unit: str = "", u: float | None = None) -> str:
    if value is None:
        return "none"
    text = f"{value:.6g}" + (f" ± {u:.3g}" if u is not None else "")
    return text + (f" {unit}" if unit else "")


def _scope_text(scope: dict) -> str:
    return ", ".join(f"{k}={v:.6g}" if isinstance(v, float) else f"{k}={v}" for k, v in scope.items()) or "-"


def outcome_message(outcome: LimitOutcome) -> str:
    """One line: status, worst value, margin to the limit and where it was found."""
    lim = outcome.limit
    spec = lim.bounds_text(outcome.unit)
    if outcome.status == NOT_CHECKED:
        return f"{lim.quantity} {spec} [{outcome.where}]: not checked: {outcome.reason}"
    label = {BORDERLINE: "borderline: ", SUSPECT: "suspect: "}.get(outcome.status, "")
    rule = " (guarded acceptance)" if lim.decision == "guarded" else ""
    text = (f"{label}{lim.quantity} {spec}{rule} [{outcome.where}]: worst "
            f"{_fmt(outcome.worst_value, outcome.unit, outcome.uncertainty)} "
            f"at {_scope_text(dict(outcome.worst_scope))}")
    if outcome.margin is not None:
        text += f", margin {_fmt(outcome.margin, outcome.unit)}"
        if outcome.margin_rel is not None:
            text += f" ({100 * outcome.margin_rel:+.3g} %)"
    return f"{text}; {outcome.reason}"


def _failure_text(outcome: LimitOutcome, items=None) -> str:
    items = outcome.failing if items is None else items
    lines = []
    for item in items[:MAX_LISTED_VALUES]:
        if item.value is None:
            lines.append(f"absent at {_scope_text(dict(item.scope))}: {item.note}")
        else:
            line = (f"{_fmt(item.value, outcome.unit, item.uncertainty)} at {_scope_text(dict(item.scope))}, "
                    f"margin {_fmt(item.margin, outcome.unit)}")
            if item.status != FAIL:
                line = f"{item.status}: {line}"
            lines.append(line + (f": {item.note}" if item.note else ""))
    if len(items) > MAX_LISTED_VALUES:
        lines.append(f"... and {len(items) - MAX_LISTED_VALUES} more")
    return "\n".join(lines)


def _timestamp(moment: datetime | None) -> str:
    """ISO 8601 date-time in UTC without a zone, as the schema's ``timestamp`` expects."""
    moment = moment or datetime.now(timezone.utc)
    if moment.tzinfo is not None:
        moment = moment.astimezone(timezone.utc).replace(tzinfo=None)
    return moment.replace(microsecond=0).isoformat()


def junit_element(report: CheckReport) -> ET.Element:
    """The ``<testsuites>`` element of a check report."""
    run = report.run
    classname = f"benchctl.{run.procedure}"
    cases: list[ET.Element] = []
    failures = errors = skipped = 0
    for outcome in report.outcomes:
        case = ET.Element("testcase", {"classname": classname, "name": outcome.limit.name, "time": "0"})
        message = outcome_message(outcome)
        status, required = outcome.status, outcome.limit.required
        if status == FAIL and required:
            failures += 1
            el = ET.SubElement(case, "failure", {"message": message, "type": "limit_failed"})
            el.text = _failure_text(outcome)
        elif status == NOT_CHECKED and required:
            errors += 1
            ET.SubElement(case, "error", {"message": message, "type": "not_checked"})
        elif status in (BORDERLINE, SUSPECT) and required:
            errors += 1
            el = ET.SubElement(case, "error", {"message": message, "type": f"limit_{status}"})
            el.text = _failure_text(outcome, outcome.doubtful)
        elif status == NOT_CHECKED:
            skipped += 1
            ET.SubElement(case, "skipped", {"message": "advisory limit " + message})
        else:
            out = ET.SubElement(case, "system-out")
            prefix = {FAIL: "advisory limit not met: ", BORDERLINE: "advisory limit borderline: ",
                      SUSPECT: "advisory limit on suspect data: "}.get(status, "")
            out.text = prefix + message
        cases.append(case)
    if run.status != COMPLETED_STATUS:
        errors += 1
        case = ET.Element("testcase", {"classname": classname, "name": "run completed", "time": "0"})
        ET.SubElement(case, "error", {
            "message": f"run {report.run_id} is {run.status!r}, not 'completed': its points may not cover "
                       "the whole envelope; re-run it to check every limit",
            "type": "run_not_completed",
        })
        cases.append(case)

    duration = run.duration_s
    counts = {"tests": str(len(cases)), "failures": str(failures), "errors": str(errors),
              "skipped": str(skipped), "time": f"{duration if duration is not None else 0.0:.3f}"}
    root = ET.Element("testsuites", {"name": "benchctl check", **counts})
    suite = ET.SubElement(root, "testsuite", {
        "name": f"{run.procedure} run {report.run_id}", **counts,
        "timestamp": _timestamp(report.checked_utc), "hostname": run.host or "unknown",
    })
    props = ET.SubElement(suite, "properties")
    values = [
        ("run_id", str(report.run_id)), ("procedure", run.procedure), ("run_status", run.status),
        ("station", run.station), ("dut_part", run.dut_part), ("dut_revision", run.dut_revision),
        ("dut_serial", run.dut_serial), ("limits_name", report.limits_name),
        ("limits_file", report.limits_path), ("limits_sha256", report.limits_sha256),
        ("started_utc", run.started_utc.isoformat() if run.started_utc else ""),
        ("ended_utc", run.ended_utc.isoformat() if run.ended_utc else ""),
    ]
    values += [("not_applicable", name) for name in report.not_applicable]
    for name, value in values:
        ET.SubElement(props, "property", {"name": name, "value": value})
    suite.extend(cases)
    return root


def junit_xml(report: CheckReport) -> bytes:
    """The report as UTF-8 JUnit XML bytes, with an XML declaration."""
    root = junit_element(report)
    ET.indent(root)
    return ET.tostring(root, encoding="utf-8", xml_declaration=True) + b"\n"


def write_junit(report: CheckReport, path: str | Path) -> Path:
    """Write the report's JUnit XML to ``path`` (replaced if it exists); returns the path."""
    path = Path(path)
    data = junit_xml(report)
    try:
        path.write_bytes(data)
    except OSError as exc:
        raise ConfigurationError(
            f"cannot write JUnit XML to {path}: {exc.strerror or exc}; check that the directory exists and is writable"
        ) from exc
    log.info("JUnit XML of run %s written to %s", report.run_id, path)
    return path


__all__ = ["MAX_LISTED_VALUES", "junit_element", "junit_xml", "outcome_message", "write_junit"]
