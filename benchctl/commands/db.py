"""``benchctl db``, ``benchctl query``, ``benchctl export-runs`` and ``benchctl import-runs``.

* ``db version`` / ``db upgrade`` - the schema version of a store; bring it up to date.
* ``query part PART`` - every run of a DUT part number, on any station, oldest first.
* ``query efficiency PART --vin V --iout A`` - efficiency at one operating point, per
  DUT revision (``--points``: every matching point).
* ``export-runs --out FILE [RUN ...]`` - copy runs of ``--db`` into a SQLite file.
* ``import-runs SOURCE [RUN ...]`` - copy runs of a station's file (or an exported
  one) into ``--db``, e.g. the shared PostgreSQL database. Importing twice copies nothing.

The database is ``--db URL``, else the station file's ``station.database``
(``--station FILE``), else ``$BENCHCTL_DB``, else ``./benchctl-data/benchctl.db``.
URLs are shown with the password masked. The arguments are defined in
:mod:`benchctl.commands.db_arguments` (kept light for ``benchctl --help``).
"""

from __future__ import annotations

import argparse
import json
import math
from pathlib import Path
from typing import Any

from rich.markup import escape
from rich.table import Table

from benchctl.exit_codes import EXIT_FAILED, EXIT_OK
from benchctl.locations import default_db
from benchctl.commands.console import console
from benchctl.commands.stores import existing_store_url as _existing

from benchctl.commands.db_arguments import add_db_arguments  # noqa: F401  (re-exported for tests)
from benchctl.run_status import RunStatus


# ---------------------------------------------------------------- helpers
def resolve_db(args: argparse.Namespace) -> str:
    """The database URL or path of a command: --db, station.database, $BENCHCTL_DB, default."""
    if getattr(args, "db", None):
        return str(args.db)
    station_file = getattr(args, "db_station", None)
    if station_file:
        from benchctl.station import load_station

        station = load_station(station_file)
        if station.database:
            return station.database
    return default_db()




def _open(url: str):  # -> Store
    """An existing store to read (read-only when it cannot be written, with a note saying so)."""
    from benchctl.commands.stores import print_store_notes
    from benchctl.store import Store

    store = Store.open(_existing(url), read_only=None)
    print_store_notes(store)
    return store


def _print_json(payload: Any) -> None:
    def default(obj: Any) -> Any:
        if hasattr(obj, "isoformat"):
            return obj.isoformat()
        if hasattr(obj, "item"):
            return obj.item()
        return str(obj)

    print(json.dumps(payload, default=default, indent=1))


def _frame_json(frame: Any) -> Any:
    return json.loads(frame.to_json(orient="records", date_format="iso", double_precision=15))


def _cell(value: Any) -> str:
    if hasattr(value, "strftime"):
        return value.strftime("%Y-%m-%d %H:%M:%S")
    if isinstance(value, float):
        return "—" if math.isnan(value) else f"{value:.6g}"
    return escape(str(value))


def _table(title: str, frame: Any, columns: list[str]) -> Table:
    table = Table(title=title)
    for c in columns:
        table.add_column(c.replace("_", " "))
    for _, row in frame.iterrows():
        table.add_row(*(_cell(row[c]) for c in columns))
    return table


# ---------------------------------------------------------------- db
def cmd_db(args: argparse.Namespace) -> int:
    from dataclasses import asdict

    from benchctl.store import migrate

    url = resolve_db(args)
    if args.db_command == "version":
        state = migrate.schema_state(_existing(url))
        if args.json:
            _print_json(asdict(state))
        else:
            shown = "—" if state.schema_version is None else str(state.schema_version)
            console().print(
                f"{escape(state.url)}: schema version {shown} (revision {state.revision or '—'}), "
                f"this benchctl uses {state.head_version}: [bold]{state.status}[/] — {escape(state.reason)}"
            )
            if state.status == migrate.BEHIND:
                console().print(f"upgrade it with {escape(migrate.upgrade_command(state.url))}")
        return EXIT_OK if state.status in (migrate.CURRENT, migrate.EMPTY) else EXIT_FAILED
    if "://" not in url:
        Path(url).expanduser().absolute().parent.mkdir(parents=True, exist_ok=True)
    result = migrate.upgrade(url)
    if args.json:
        _print_json(asdict(result))
    elif not result.revisions_applied:
        console().print(f"{escape(result.url)} is already at schema version {result.to_version}; nothing to do")
    else:
        before = "an empty database" if result.from_version is None else f"schema version {result.from_version}"
        console().print(
            f"upgraded {escape(result.url)} from {before} to schema version {result.to_version} "
            f"(revisions {', '.join(result.revisions_applied)})"
        )
    return EXIT_OK


# ---------------------------------------------------------------- query
def cmd_query(args: argparse.Namespace) -> int:
    from benchctl.store.history import summarize_by_revision

    with _open(resolve_db(args)) as store:
        if args.query_command == "part":
            frame = store.runs_of_part(args.part, revision=args.revision, procedure=args.procedure, status=args.status)
            if args.json:
                _print_json(_frame_json(frame))
            else:
                console().print(_table(
                    f"runs of {args.part} in {store.url}", frame,
                    ["run_id", "started_utc", "station", "dut_revision", "dut_serial", "procedure", "status", "n_points"],
                ))
            return EXIT_OK
        points = store.efficiency_at(
            args.part, vin_v=args.vin_v, iout_a=args.iout_a, vin_tol_v=args.vin_tol_v, iout_tol_a=args.iout_tol_a,
            status=None if args.any_status else RunStatus.COMPLETED,
        )
        frame = points if args.points else summarize_by_revision(points)
        if args.json:
            _print_json(_frame_json(frame))
            return EXIT_OK
        title = f"efficiency of {args.part} at {args.vin_v:g} V, {args.iout_a:g} A in {store.url}"
        if args.points:
            cols = ["run_id", "started_utc", "station", "dut_revision", "dut_serial", "seq", "vin_v", "iout_a",
                    "pin_w", "pout_w", "efficiency"]
        else:
            cols = ["dut_revision", "n_runs", "n_points", "efficiency_mean", "efficiency_min", "efficiency_max",
                    "first_utc", "last_utc"]
        console().print(_table(title, frame, cols))
        if not args.points and not frame.empty and int(frame["n_points_without_efficiency"].sum()):
            n_other = int(frame["n_points_without_efficiency"].sum())
            console().print(f"{n_other} more matching point(s) have no efficiency (no input or output power "
                            "recorded there, e.g. runs of other procedures); they are not counted above "
                            "(--points lists them)")
        if frame.empty:
            console().print("no stored point matches this operating point (check --vin/--iout and the tolerances)")
    return EXIT_OK


# ---------------------------------------------------------------- moving runs
def _report_copy(report: Any, as_json: bool) -> int:
    from dataclasses import asdict

    if as_json:
        _print_json({"source": report.source_url, "target": report.target_url,
                     "runs": [asdict(r) for r in report.runs]})
    else:
        table = Table(title=f"{escape(report.source_url)} → {escape(report.target_url)}")
        for c in ("source run", "run uuid", "action", "target run", "points", "reason"):
            table.add_column(c)
        for r in report.runs:
            colour = {"copied": "green", "already present": "cyan"}.get(r.action, "yellow")
            table.add_row(str(r.source_run_id), r.run_uuid, f"[{colour}]{r.action}[/]",
                          "—" if r.target_run_id is None else str(r.target_run_id), str(r.n_points), escape(r.reason))
        console().print(table)
        console().print(f"{report.n_copied} copied, {report.n_already_present} already present, "
                        f"{len(report.problems)} not copied")
    return EXIT_FAILED if any(r.action == "conflict" for r in report.runs) else EXIT_OK


def cmd_export_runs(args: argparse.Namespace) -> int:
    from benchctl.store import Store

    out = Path(args.out).expanduser()
    out.absolute().parent.mkdir(parents=True, exist_ok=True)
    with _open(resolve_db(args)) as source, Store.open(str(out)) as target:
        report = target.copy_runs_from(source, args.runs or None, include_running=args.include_running)
    return _report_copy(report, args.json)


def cmd_import_runs(args: argparse.Namespace) -> int:
    from benchctl.store import Store

    target_url = resolve_db(args)
    if "://" not in target_url:
        Path(target_url).expanduser().absolute().parent.mkdir(parents=True, exist_ok=True)
    with _open(args.source) as source, Store.open(target_url) as target:
        report = target.copy_runs_from(source, args.runs or None, include_running=args.include_running)
    return _report_copy(report, args.json)
