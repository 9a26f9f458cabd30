"""Everything a revision summary shows, read from the store once (no plotting, no HTML).

For a part and revision: the runs that stand for each unit (:mod:`benchctl.revision_runs`),
each one's limit verdicts (checked now against the given limits files, without storing
anything; else the checks stored with the runs), the statistics across units
(:mod:`benchctl.unit_statistics`), the figures of merit of each unit with their expanded
uncertainty where the store has it, the instruments used with the accuracy their station
file states, and the provenance of every run.
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field
from datetime import datetime
from pathlib import Path
from typing import Any

import pandas as pd

from benchctl.limits import LimitsFile, check_limits, load_limits
from benchctl.revision_runs import RevisionRuns, revision_runs
from benchctl.unit_statistics import limit_run_data, point_text, statistics_tables, unit_values

from .limit_marks import limit_marks


@dataclass(frozen=True)
class MeritSection:
    """A group of figures of merit: ``title``, the ``procedure`` that measures them, the
    result ``names`` (with a display ``scale`` and unit text per name, e.g. efficiency
    x100 in %)."""

    key: str
    title: str
    procedure: str
    names: tuple[tuple[str, float, str], ...]


#: The figures a reviewer reads, by section (results of the bundled procedures).
MERIT_SECTIONS: tuple[MeritSection, ...] = (
    MeritSection("efficiency", "Efficiency", "efficiency_map",
                 (("efficiency", 100.0, "%"), ("average_efficiency_4pt", 100.0, "%"),
                  ("no_load_input_power_w", 1.0, "W"))),
    MeritSection("regulation", "Regulation", "efficiency_map",
                 (("line_regulation_pct", 1.0, "%"), ("load_regulation_pct", 1.0, "%"),
                  ("max_abs_vout_deviation_pct", 1.0, "%"))),
    MeritSection("loop", "Loop margins", "loop_gain",
                 (("phase_margin_deg", 1.0, "°"), ("gain_margin_db", 1.0, "dB"), ("crossover_hz", 1e-3, "kHz"))),
    MeritSection("ripple", "Output ripple", "ripple", (("ripple_pk_pk_v", 1e3, "mV"), ("ripple_rms_v", 1e3, "mV"))),
    MeritSection("transient", "Load transient", "load_transient",
                 (("transient_peak_deviation_v", 1e3, "mV"), ("transient_recovery_s", 1e6, "µs"))),
)

#: Figures a reviewer expects that no bundled procedure measures yet (listed as not measured).
NOT_YET_MEASURED = ("protection (over-current, over-voltage, under-voltage lockout): no procedure measures it yet",)


@dataclass(frozen=True)
class UnitVerdict:
    """One limit on one unit: ``status`` (pass, fail, borderline, suspect, not_checked),
    the worst value with its U, where, the run, whether the limit is required."""

    serial: str
    run_id: int
    procedure: str
    limit: str
    status: str
    worst_value: float | None
    uncertainty: float | None
    unit: str
    where: str
    required: bool
    reason: str


@dataclass(frozen=True)
class InstrumentUse:
    """An instrument (station, role, identity) the revision's runs used, with the accuracy
    its station file states (text; "" when none) and the runs."""

    station: str
    role: str
    identity: str
    resource: str
    driver: str
    accuracy: str
    run_ids: tuple[int, ...]
    #: The calibration its station file states, as of the runs: "" when none is stated, else
    #: "due YYYY-MM-DD (certificate ...)" with "OVERDUE by N days at run R" where it had passed.
    calibration: str = ""


@dataclass(frozen=True)
class RevisionEvidence:
    """What the summary page shows (module docstring)."""

    part: str
    revision: str
    runs: RevisionRuns
    infos: dict[int, Any]
    results: dict[int, pd.DataFrame]
    points: dict[int, pd.DataFrame]
    verdicts: tuple[UnitVerdict, ...]
    verdict_source: str
    statistics: pd.DataFrame
    per_serial: pd.DataFrame
    instruments: tuple[InstrumentUse, ...]
    limits: tuple[LimitsFile, ...] = ()
    not_measured: tuple[str, ...] = field(default=())

    @property
    def required_failures(self) -> list[UnitVerdict]:
        return [v for v in self.verdicts if v.required and v.status == "fail"]

    @property
    def required_undecided(self) -> list[UnitVerdict]:
        return [v for v in self.verdicts if v.required and v.status in ("borderline", "suspect", "not_checked")]

    @property
    def overall(self) -> str:
        """``failed`` (a required limit failed on a unit), ``incomplete`` (evidence missing or
        a required limit undecided), ``passed`` or ``no_limits``."""
        if self.required_failures:
            return "failed"
        if self.runs.missing or self.required_undecided or not self.runs.serials:
            return "incomplete"
        if not self.verdicts:
            return "no_limits"
        return "passed"

    def merit_table(self, name: str) -> pd.DataFrame:
        """Result ``name`` of every unit: one row per operating point, columns point, then
        per serial ``<serial>`` (value) and ``<serial> U`` (expanded uncertainty, NaN when
        none), flags per serial in ``<serial> flags``."""
        rows: dict[str, dict[str, Any]] = {}
        order: list[str] = []
        for item in self.runs.latest_runs():
            res = self.results.get(item.run_id)
            if res is None or res.empty:
                continue
            sel = res[res["name"] == name]
            for stored_scope, stored_details, value, expanded_u in zip(sel["scope"], sel["details"], sel["value"],
                                                                       sel["expanded_uncertainty"]):
                scope: dict[str, Any] = stored_scope if isinstance(stored_scope, dict) else {}
                point = point_text(scope)
                if point not in rows:
                    rows[point] = {"point": point, "_scope": {k: v for k, v in scope.items() if k != "seq"}}
                    order.append(point)
                details: dict[str, Any] = stored_details if isinstance(stored_details, dict) else {}
                rows[point][item.serial] = float(value)
                rows[point][f"{item.serial} U"] = float(expanded_u)
                rows[point][f"{item.serial} flags"] = tuple(details.get("flags") or ())
        if not rows:
            return pd.DataFrame()
        frame = pd.DataFrame([rows[p] for p in order])
        sort_keys = [k for k in ("vin_set_v", "iout_set_a") if any(k in s for s in frame["_scope"])]
        for k in sort_keys:
            frame[k] = [s.get(k, math.nan) for s in frame["_scope"]]
        if sort_keys:
            frame = frame.sort_values(sort_keys, kind="stable").drop(columns=sort_keys)
        return frame.drop(columns=["_scope"]).reset_index(drop=True)


def _calibration_text(station_text: str | None, role: str, started: list[tuple[int, Any]]) -> str:
    """The calibration record of ``role`` in a stored station text, checked against the runs' start dates."""
    from benchctl.station import calibration_records_from_text

    record = next((r for r in calibration_records_from_text(station_text) if r.role == role), None)
    if record is None:
        return ""
    text = f"due {record.due.isoformat()}" + (f" (certificate {record.certificate})" if record.certificate else "")
    late: list[tuple[int, int]] = []
    for run_id, t in started:
        days = record.overdue_days(t.date()) if t is not None else None
        if days is not None:
            late.append((run_id, days))
    if late:
        run_id, days = max(late, key=lambda x: x[1])
        text += f"; OVERDUE by {days} days at run {run_id}"
    return text


def _accuracy_text(station_text: str | None, role: str) -> str:
    from benchctl.station import station_accuracy_from_text

    try:
        accuracy = station_accuracy_from_text(station_text)
    except Exception as exc:  # a stored station that no longer parses: say so, do not fail the page
        return f"(stored accuracy unreadable: {exc})"
    inst = accuracy.get(role)
    if inst is None:
        return ""
    parts = []
    for quantity, qa in inst.quantities.items():
        terms = "; ".join(f"±({t.pct_of_reading:g} % + {t.offset:g})" + (f" ≤ {t.range_max:g}" if t.range_max else "")
                          for t in qa.terms)
        parts.append(f"{quantity} {terms}")
    return ", ".join(parts)


def _stored_verdicts(serial: str, run_id: int, procedure: str, results: pd.DataFrame) -> list[UnitVerdict]:
    out = []
    for m in limit_marks(results):
        out.append(UnitVerdict(serial, run_id, procedure, m.name, m.status or ("pass" if m.passed else "fail"),
                               m.worst_value, m.uncertainty, m.unit, m.where, True, m.note))
    return out


def revision_evidence(store: Any, part: str, revision: str, *,
                      limits: Iterable[LimitsFile | str | Path] = ()) -> RevisionEvidence:
    """Read the evidence of ``part`` at ``revision`` (module docstring)."""
    files = tuple(x if isinstance(x, LimitsFile) else load_limits(x) for x in limits)
    expected = [p for lf in files for spec in lf.limits for p in spec.procedures]
    runs = revision_runs(store, part, revision, expected=expected)
    infos: dict[int, Any] = {}
    results: dict[int, pd.DataFrame] = {}
    points: dict[int, pd.DataFrame] = {}
    verdicts: list[UnitVerdict] = []
    for item in runs.latest_runs():
        data = limit_run_data(store, item.run_id)
        infos[item.run_id] = store.run(item.run_id)
        results[item.run_id] = data.results
        points[item.run_id] = data.points
        if files:
            for lf in files:
                report = check_limits(lf, data)
                for o in report.outcomes:
                    verdicts.append(UnitVerdict(item.serial, item.run_id, item.procedure, o.limit.name, o.status,
                                                o.worst_value, o.uncertainty, o.unit, o.where, o.limit.required,
                                                o.reason))
        else:
            verdicts += _stored_verdicts(item.serial, item.run_id, item.procedure, data.results)
    values = unit_values(store, runs, files)
    table, per_serial = statistics_tables(values)
    uses: dict[tuple[str, str, str], dict[str, Any]] = {}
    for run_id, info in infos.items():
        for inst in info.instruments:
            key = (info.station_name, inst.role, inst.identity)
            entry = uses.setdefault(key, {"resource": inst.resource, "driver": inst.driver,
                                          "accuracy": _accuracy_text(info.station_text, inst.role), "runs": [],
                                          "text": info.station_text})
            entry["runs"].append(run_id)
    instruments = tuple(
        InstrumentUse(k[0], k[1], k[2], v["resource"], v["driver"], v["accuracy"], tuple(v["runs"]),
                      _calibration_text(v["text"], k[1], [(r, infos[r].started_utc) for r in v["runs"]]))
        for k, v in sorted(uses.items()))
    ran = set(runs.latest["procedure"])
    not_measured = tuple(f"{s.title.lower()}: procedure {s.procedure} was not run on any unit"
                         for s in MERIT_SECTIONS if s.procedure not in ran) + NOT_YET_MEASURED
    return RevisionEvidence(part, revision, runs, infos, results, points, tuple(verdicts),
                            "the limits files given" if files else "the checks stored with the runs",
                            table, per_serial, instruments, files, not_measured)


def period(evidence: RevisionEvidence) -> tuple[datetime | None, datetime | None]:
    """First start and last end of the runs used."""
    latest = evidence.runs.latest
    if latest.empty:
        return None, None
    return latest["started_utc"].min().to_pydatetime(warn=False), latest["ended_utc"].max().to_pydatetime(warn=False)


def serial_list(values: Sequence[str]) -> str:
    return ", ".join(v or "(no serial)" for v in values)


__all__ = ["MERIT_SECTIONS", "InstrumentUse", "MeritSection", "RevisionEvidence", "UnitVerdict", "period",
           "revision_evidence", "serial_list"]
