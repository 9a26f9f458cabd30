"""What each page of the web view shows, read from the store (plain values for the templates).

No Flask here: functions take an open (read-only) store and return dicts, lists and
DataFrames, so they are tested without a server. Plots of a run come from the report's
plot registry (:func:`benchctl.report.build.render_figures`), rendered once per run state
and kept (:class:`PlotCache`); matplotlib's settings are process-wide, so rendering is
serialised.
"""

from __future__ import annotations

import logging
import math
import threading
from collections import OrderedDict
from collections.abc import Sequence
from typing import Any

import pandas as pd
from benchctl.run_status import RunStatus

log = logging.getLogger(__name__)

RUNS_PER_STATION = 6
#: One lock for every matplotlib render of the view (its rc settings are process-wide).
RENDER_LOCK = threading.RLock()
#: Run statuses of a night that did not deliver its evidence.
_BAD_STATUSES = {RunStatus.FAILED, RunStatus.TRIPPED}


def _utc(t: Any) -> str:
    if t is None or (isinstance(t, float) and math.isnan(t)) or t is pd.NaT:
        return "—"
    try:
        return t.strftime("%Y-%m-%d %H:%M:%S")
    except (AttributeError, ValueError):
        return "—"


def stations_overview(store: Any, *, per_station: int = RUNS_PER_STATION) -> dict[str, Any]:
    """Every station with its newest runs, the runs in progress, and the revisions stored."""
    runs = store.runs(limit=2000)
    stations: "OrderedDict[str, list[dict[str, Any]]]" = OrderedDict()
    running = []
    for r in runs.itertuples(index=False):
        row = {"run_id": int(r.run_id), "procedure": r.procedure, "status": r.status, "part": r.dut_part,
               "revision": r.dut_revision, "serial": r.dut_serial, "started": _utc(r.started_utc),
               "points": int(r.n_points), "job_id": None if pd.isna(r.job_id) else int(r.job_id)}
        lst = stations.setdefault(r.station, [])
        if len(lst) < per_station:
            lst.append(row)
        if r.status == RunStatus.RUNNING:
            running.append({**row, "station": r.station})
    revisions = []
    if not runs.empty:
        named = runs[runs["dut_part"] != ""]
        for (part, rev), grp in named.groupby(["dut_part", "dut_revision"], sort=False):
            revisions.append({"part": part, "revision": rev, "units": int(grp["dut_serial"].nunique()),
                              "runs": int(len(grp)), "last": _utc(grp["started_utc"].max())})
    return {"stations": [{"name": k, "runs": v} for k, v in stations.items()], "running": running,
            "revisions": revisions, "n_runs": int(len(runs))}


def planned_total(info: Any) -> int | None:
    """How many points the run plans, when its procedure is a bundled one whose code is the
    code the run ran (same sha256); None otherwise (nothing else is loaded)."""
    from benchctl.procedure import available_procedures, load_procedure

    if info.procedure not in available_procedures():
        return None
    try:
        proc = load_procedure(info.procedure)
        if proc.source_sha256 != info.procedure_sha256:
            return None
        params = proc.resolve_parameters(values=dict(info.parameters or {}))
        return len(proc.planned(params))
    except Exception:  # a plan that cannot be made here: progress without a total
        log.info("no planned total for run %s", info.run_id, exc_info=True)
        return None


class _Progress:
    """The planned totals of runs (they do not change while a run runs)."""

    def __init__(self) -> None:
        self._totals: dict[str, int | None] = {}  # by run_uuid: the same in every store
        self._lock = threading.Lock()

    def total(self, info: Any) -> int | None:
        with self._lock:
            if info.run_uuid not in self._totals:
                self._totals[info.run_uuid] = planned_total(info)
            return self._totals[info.run_uuid]


PROGRESS = _Progress()


def run_progress(store: Any, run_id: int) -> dict[str, Any]:
    """The small JSON of a run's progress: status, points committed, planned points done and
    in all (when known), last message. Points are committed one by one, so this is live."""
    info = store.run(run_id)
    total = PROGRESS.total(info)
    done = info.n_points
    planned_done = None
    if total is not None:
        pts = store.points(run_id)
        if "plan_index" in pts.columns and pts["plan_index"].notna().any():
            planned_done = int(pts["plan_index"].max()) + 1
        else:
            planned_done = done
    return {"run_id": run_id, "status": info.status, "points": done, "planned_done": planned_done,
            "planned_total": total, "message": info.message, "ended": info.ended_utc is not None}


class PlotCache:
    """PNG figures of runs from the report's registry, kept per (run, status, points)."""

    def __init__(self, size: int = 16) -> None:
        self._items: "OrderedDict[tuple[str, str, int], tuple[list[Any], list[str]]]" = OrderedDict()
        self._size = size
        self._lock = RENDER_LOCK

    def figures(self, store: Any, run_id: int) -> tuple[list[Any], list[str]]:
        from benchctl.report.build import render_figures
        from benchctl.report.run_data import load_run_data

        info = store.run(run_id)
        key = (info.run_uuid, info.status, info.n_points)
        with self._lock:  # matplotlib's rc settings are process-wide
            if key in self._items:
                self._items.move_to_end(key)
                return self._items[key]
            images, notes = render_figures(load_run_data(store, run_id))
            self._items[key] = (images, notes)
            while len(self._items) > self._size:
                self._items.popitem(last=False)
            return images, notes


def run_page(store: Any, run_id: int, plots: PlotCache) -> dict[str, Any]:
    """Provenance, results, events, plots and progress of one run."""
    from benchctl.report.html import data_uri
    from benchctl.report.limit_marks import limit_marks
    from benchctl.report.result_summary import result_lines

    info = store.run(run_id)
    results = store.results(run_id)
    events = store.events(run_id)
    images, notes = plots.figures(store, run_id)
    return {
        "info": info, "started": _utc(info.started_utc), "ended": _utc(info.ended_utc),
        "results": result_lines(results), "limits": limit_marks(results),
        "events": [{"t": _utc(e.t_utc), "kind": e.kind, "message": e.message}
                   for e in events.tail(40).itertuples(index=False)],
        "images": [{"title": i.title, "caption": i.caption, "src": data_uri(i.png), "width": i.width_px,
                    "height": i.height_px} for i in images],
        "notes": notes, "progress": run_progress(store, run_id),
    }


def job_history(store: Any, *, limit_jobs: int = 50) -> list[dict[str, Any]]:
    """The newest jobs with a verdict each: ``passed`` (every run completed and every check
    passed), ``failed`` (a run failed or tripped, or a check failed), ``not decided`` (a check
    could not decide), ``interrupted``, ``running`` or ``not checked`` (completed, no limits)."""
    frame = store.job_runs(limit_jobs=limit_jobs)
    jobs = []
    for job_id, grp in frame.groupby("job_id", sort=False):
        statuses = set(grp["status"])
        codes = [c for c in grp["check_exit_code"] if c == c]
        if "running" in statuses:
            verdict = "running"
        elif statuses & _BAD_STATUSES or 1.0 in codes:
            verdict = "failed"
        elif "interrupted" in statuses:
            verdict = "interrupted"
        elif 4.0 in codes:
            verdict = "not decided"
        elif codes and len(codes) == len(grp):
            verdict = "passed"
        else:
            verdict = "not checked" if not codes else "passed"
        first = grp.iloc[0]
        jobs.append({
            "job_id": int(job_id), "name": first["job_name"] or f"job {int(job_id)}", "station": first["job_station"],
            "started": _utc(first["job_started_utc"]), "verdict": verdict,
            "parts": sorted({f"{p} rev {r}".strip() for p, r in zip(grp["dut_part"], grp["dut_revision"]) if p}),
            "units": list(dict.fromkeys(s for s in grp["dut_serial"] if s)),
            "runs": [{"run_id": int(r.run_id), "procedure": r.procedure, "serial": r.dut_serial, "status": r.status,
                      "check": "—" if r.check_exit_code != r.check_exit_code else
                      {0: "passed", 1: "FAILED", 4: "not decided"}.get(int(r.check_exit_code), "?"),
                      "summary": r.check_summary} for r in grp.itertuples(index=False)],
        })
    return jobs


def trend_values(store: Any, part: str, quantity: str) -> pd.DataFrame:
    """Result ``quantity`` of ``part`` for every revision and serial: the latest completed run
    of each procedure per (revision, serial) that has it. Columns revision, serial, run_id,
    point, value, expanded_uncertainty, started_utc; revisions in order of first run."""
    from benchctl.unit_statistics import point_text

    runs = store.runs(dut_part=part, status=RunStatus.COMPLETED)
    rows = []
    if runs.empty:
        return pd.DataFrame(columns=["revision", "serial", "run_id", "point", "value", "expanded_uncertainty",
                                     "started_utc"])
    runs = runs.sort_values(["started_utc", "run_id"])
    latest = runs.groupby(["dut_revision", "dut_serial", "procedure"], sort=False).tail(1)
    for r in latest.itertuples(index=False):
        res = store.results(int(r.run_id))
        for x in res[res["name"] == quantity].itertuples(index=False):
            rows.append({"revision": r.dut_revision, "serial": r.dut_serial, "run_id": int(r.run_id),
                         "point": point_text(x.scope if isinstance(x.scope, dict) else {}), "value": float(x.value),
                         "expanded_uncertainty": float(x.expanded_uncertainty), "started_utc": r.started_utc})
    frame = pd.DataFrame(rows, columns=["revision", "serial", "run_id", "point", "value", "expanded_uncertainty",
                                        "started_utc"])
    order = list(dict.fromkeys(runs["dut_revision"]))
    frame["_order"] = frame["revision"].map({r: k for k, r in enumerate(order)})
    return frame.sort_values(["_order", "started_utc"], kind="stable").drop(columns="_order").reset_index(drop=True)


def trend_quantities(store: Any, part: str) -> list[str]:
    """Result names found in the latest completed run of each procedure of ``part``."""
    runs = store.runs(dut_part=part, status=RunStatus.COMPLETED)
    names: list[str] = []
    for run_id in runs.groupby("procedure").head(1)["run_id"]:
        res = store.results(int(run_id))
        names += [n for n in res["name"] if not str(n).startswith("limit:")]
    return sorted(dict.fromkeys(names))


def trend_table(frame: pd.DataFrame) -> list[dict[str, Any]]:
    """Per revision: units, mean, s, min, max of the values."""
    out = []
    for rev, grp in frame.groupby("revision", sort=False):
        v = grp["value"].dropna()
        out.append({"revision": rev, "units": int(grp["serial"].nunique()), "n": int(len(v)),
                    "mean": float(v.mean()) if len(v) else None, "sd": float(v.std(ddof=1)) if len(v) > 1 else None,
                    "min": float(v.min()) if len(v) else None, "max": float(v.max()) if len(v) else None})
    return out


def trend_png(frame: pd.DataFrame, quantity: str, point: str) -> bytes:
    """The trend plot as PNG bytes (serialised with the plot cache's renders)."""
    from benchctl.report.build import figure_png
    from benchctl.report.revision_plots import trend_figure

    with RENDER_LOCK:
        return figure_png(trend_figure(frame, quantity, point))


def points_of(frame: pd.DataFrame) -> Sequence[str]:
    return list(dict.fromkeys(frame["point"]))


__all__ = ["PROGRESS", "PlotCache", "job_history", "planned_total", "run_page", "run_progress", "stations_overview",
           "trend_png", "trend_quantities", "trend_table", "trend_values"]
