"""One JUnit XML file for a whole job (a night over several units), for a CI server.

``<testsuites name="benchctl job <name>">`` holds one ``<testsuite>`` per run (unit, step):
a checked run's suite is the one :func:`benchctl.junit.junit_element` writes for its
limit check (same mapping of outcomes), renamed ``<serial> / <step>. <procedure> run <id>``
with properties ``job_id``, ``unit`` and ``step`` added; a run without limits gets one test
case ``run completed`` (an ``<error type="run_not_completed">`` when it did not complete);
a planned run that never started (the job was stopped) gets a suite with one
``<error type="not_run">``, so the file alone shows that the night is incomplete.
"""

from __future__ import annotations

import xml.etree.ElementTree as ET
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from benchctl.errors import ConfigurationError
from benchctl.junit import junit_element
from benchctl.run_status import RunStatus


@dataclass(frozen=True)
class JobEntry:
    """One planned run of a job: ``run_id``/``status`` are None when it never started;
    ``report`` is its limit check (a :class:`~benchctl.limits.CheckReport`) or None."""

    serial: str
    step: int
    procedure: str
    run_id: int | None = None
    status: str | None = None
    message: str = ""
    report: Any = None


_COUNTS = ("tests", "failures", "errors", "skipped")


def _suite(entry: JobEntry, job_id: int) -> ET.Element:
    label = f"{entry.serial or '(no serial)'} / {entry.step}. {entry.procedure}"
    classname = f"benchctl.{entry.procedure}"
    if entry.report is not None:
        suite = junit_element(entry.report).find("testsuite")
        assert suite is not None
        suite.set("name", f"{label} run {entry.run_id}")
    else:
        suite = ET.Element("testsuite", {"name": label + (f" run {entry.run_id}" if entry.run_id else " (not run)"),
                                         "tests": "1", "failures": "0", "errors": "0", "skipped": "0", "time": "0"})
        ET.SubElement(suite, "properties")
        case = ET.SubElement(suite, "testcase", {"classname": classname, "name": "run completed", "time": "0"})
        if entry.run_id is None:
            suite.set("errors", "1")
            ET.SubElement(case, "error", {"type": "not_run", "message": f"{entry.procedure} was not run on unit "
                                          f"{entry.serial or '(no serial)'}: the job ended before it"})
        elif entry.status != RunStatus.COMPLETED:
            suite.set("errors", "1")
            ET.SubElement(case, "error", {"type": "run_not_completed",
                                          "message": f"run {entry.run_id} is {entry.status!r}"
                                                     + (f": {entry.message}" if entry.message else "")})
    props = suite.find("properties")
    if props is None:
        props = ET.Element("properties")
        suite.insert(0, props)
    for name, value in (("job_id", str(job_id)), ("unit", entry.serial), ("step", str(entry.step))):
        ET.SubElement(props, "property", {"name": name, "value": value})
    return suite


def job_junit_xml(job_name: str, job_id: int, entries: Sequence[JobEntry]) -> bytes:
    """The job's JUnit XML bytes (UTF-8, with an XML declaration)."""
    root = ET.Element("testsuites", {"name": f"benchctl job {job_name}"})
    totals = dict.fromkeys(_COUNTS, 0)
    time_s = 0.0
    for entry in entries:
        suite = _suite(entry, job_id)
        for key in _COUNTS:
            totals[key] += int(suite.get(key, "0"))
        time_s += float(suite.get("time", "0") or 0)
        root.append(suite)
    for key in _COUNTS:
        root.set(key, str(totals[key]))
    root.set("time", f"{time_s:.3f}")
    ET.indent(root)
    return ET.tostring(root, encoding="utf-8", xml_declaration=True) + b"\n"


def write_job_junit(path: str | Path, job_name: str, job_id: int, entries: Sequence[JobEntry]) -> Path:
    """Write :func:`job_junit_xml` to ``path``; ConfigurationError when it cannot be written."""
    path = Path(path)
    try:
        path.write_bytes(job_junit_xml(job_name, job_id, entries))
    except OSError as exc:
        raise ConfigurationError(f"cannot write the job's JUnit XML to {path}: {exc.strerror or exc}; check that "
                                 "the directory exists and is writable") from exc
    return path


__all__ = ["JobEntry", "job_junit_xml", "write_job_junit"]
