"""Which runs stand for a revision: the latest completed run of each procedure on each unit.

A revision (DUT part + revision) is released on several units (serials). Its evidence is,
for every unit and every procedure, the latest run that completed; earlier runs are
history. What is missing is said, not skipped: a procedure never run on a unit, a unit
whose runs of a procedure all failed, tripped or were interrupted, a run still going, a
later run that did not complete after the completed one used (the unit may have changed).
"""

from __future__ import annotations

from collections.abc import Iterable
from dataclasses import dataclass

import pandas as pd

from benchctl.errors import StoreError
from benchctl.run_status import RunStatus


@dataclass(frozen=True)
class MissingEvidence:
    """One hole in a revision's evidence: ``serial`` (``""``: every unit), ``procedure``,
    ``kind`` (``never_run`` | ``not_completed`` | ``running`` | ``later_not_completed``),
    ``text`` for a reader, ``run_id`` of the run concerned (None when there is none)."""

    serial: str
    procedure: str
    kind: str
    text: str
    run_id: int | None = None


@dataclass(frozen=True)
class LatestRun:
    """One row of :attr:`RevisionRuns.latest`: the run that stands for a unit and a procedure."""

    serial: str
    procedure: str
    run_id: int


@dataclass(frozen=True)
class RevisionRuns:
    """The runs of one part and revision.

    ``runs``: every run of it (``Store.runs`` columns), oldest first. ``latest``: one row
    per (serial, procedure) with a completed run - the latest such (columns serial,
    procedure, run_id, started_utc, ended_utc, station, host, operator, job_id, n_points).
    ``serials`` in order of their first run; ``procedures`` those run on any unit plus the
    ``expected`` ones; ``missing`` the holes.
    """

    part: str
    revision: str
    runs: pd.DataFrame
    latest: pd.DataFrame
    serials: tuple[str, ...]
    procedures: tuple[str, ...]
    missing: tuple[MissingEvidence, ...]

    def latest_runs(self) -> tuple[LatestRun, ...]:
        """The rows of ``latest`` (serial, procedure, run id), in its order."""
        return tuple(LatestRun(str(serial), str(procedure), int(run_id)) for serial, procedure, run_id
                     in zip(self.latest["serial"], self.latest["procedure"], self.latest["run_id"]))

    def run_of(self, serial: str, procedure: str) -> int | None:
        """The run that stands for ``serial`` and ``procedure``, None when there is none."""
        sel = self.latest[(self.latest["serial"] == serial) & (self.latest["procedure"] == procedure)]
        return None if sel.empty else int(sel["run_id"].iloc[0])


_LATEST_COLUMNS = ["serial", "procedure", "run_id", "started_utc", "ended_utc", "station", "host", "operator",
                   "job_id", "n_points"]


def revision_runs(store: object, part: str, revision: str, *, expected: Iterable[str] = (),
                  serials: Iterable[str] = ()) -> RevisionRuns:
    """The runs of ``part`` at ``revision`` in ``store`` (see :class:`RevisionRuns`).

    ``expected`` names procedures the revision should have (from its limits files, say)
    even when no unit ran them; ``serials`` units it should have (from a job).
    """
    if not part:
        raise StoreError("a DUT part number is needed to collect a revision's runs")
    runs = store.runs(dut_part=part)  # type: ignore[attr-defined]
    runs = runs[runs["dut_revision"] == revision].sort_values(["started_utc", "run_id"], kind="stable")
    runs = runs.reset_index(drop=True)
    order = list(dict.fromkeys(list(runs["dut_serial"]) + [s for s in serials if s]))
    procedures = tuple(dict.fromkeys(list(runs["procedure"]) + [p for p in expected if p]))
    latest_rows = []
    missing: list[MissingEvidence] = []
    for serial in order:
        mine = runs[runs["dut_serial"] == serial]
        for procedure in procedures:
            these = mine[mine["procedure"] == procedure]
            label = f"unit {serial or '(no serial)'}"
            if these.empty:
                missing.append(MissingEvidence(serial, procedure, "never_run", f"{procedure} was never run on {label}"))
                continue
            done = these[these["status"] == RunStatus.COMPLETED]
            last = these.iloc[-1]
            if last["status"] == RunStatus.RUNNING:
                missing.append(MissingEvidence(serial, procedure, "running",
                                               f"run {int(last['run_id'])} of {procedure} on {label} is still running",
                                               int(last["run_id"])))
            if done.empty:
                if last["status"] != RunStatus.RUNNING:
                    missing.append(MissingEvidence(
                        serial, procedure, "not_completed",
                        f"no completed run of {procedure} on {label}: its latest, run {int(last['run_id'])}, "
                        f"{last['status']}" + (f" ({last['message']})" if last["message"] else ""),
                        int(last["run_id"])))
                continue
            row = done.iloc[-1]
            later = these[(these["started_utc"] > row["started_utc"]) & (these["status"] != RunStatus.COMPLETED)
                          & (these["status"] != RunStatus.RUNNING)]
            if not later.empty:
                bad = later.iloc[-1]
                missing.append(MissingEvidence(
                    serial, procedure, "later_not_completed",
                    f"after run {int(row['run_id'])} (used here) run {int(bad['run_id'])} of {procedure} on {label} "
                    f"{bad['status']}: check the unit before signing off", int(bad["run_id"])))
            latest_rows.append({
                "serial": serial, "procedure": procedure, "run_id": int(row["run_id"]),
                "started_utc": row["started_utc"], "ended_utc": row["ended_utc"], "station": row["station"],
                "host": row["host"], "operator": row["operator"], "job_id": row["job_id"],
                "n_points": int(row["n_points"]),
            })
    latest = pd.DataFrame(latest_rows, columns=_LATEST_COLUMNS)
    return RevisionRuns(part, revision, runs, latest, tuple(order), procedures, tuple(missing))


__all__ = ["MissingEvidence", "RevisionRuns", "revision_runs"]
