"""``benchctl check RUN --limits FILE``: a stored run against spec limits.

Prints a table (limit, where, worst value ± U, margin, PASS/FAIL/BORDERLINE/SUSPECT/NOT
CHECKED; the verdicts are explained in :mod:`benchctl.limits`), optionally
writes JUnit XML (:mod:`benchctl.junit`) and JSON, and stores the outcome with the run:
an event ``limit_check`` with the summary and one result ``limit:<limit name>`` per
limit (value = worst value, details = the outcome, scope = where the worst value is).
Each check adds new records; a report shows the latest (highest result id).
Exit code: 0 every required limit passed on a completed run, 1 a required limit
failed, 4 a required limit could not be checked or decided (borderline within U under
guarded acceptance, or suspect data) or the run is not completed (the rule is in
:mod:`benchctl.limits`), 2 a bad limits file or option.
"""

from __future__ import annotations

import argparse
import json
import logging
import math
from datetime import datetime, timezone
from pathlib import Path
from typing import TYPE_CHECKING, Any

from rich.markup import escape
from rich.table import Table

from benchctl.commands.stores import open_existing_store
from benchctl.errors import ConfigurationError
from benchctl.junit import write_junit
from benchctl.limits import (
    BORDERLINE,
    FAIL,
    GUARDED,
    PASS,
    SUSPECT,
    CheckReport,
    LimitOutcome,
    RunData,
    check_limits,
    load_limits,
)

if TYPE_CHECKING:
    from benchctl.store import Store

log = logging.getLogger(__name__)

EVENT_LIMIT_CHECK = "limit_check"
RESULT_PREFIX = "limit:"


def add_check_arguments(parser: argparse.ArgumentParser) -> None:
    """Arguments of ``benchctl check RUN --limits FILE [--junit FILE.xml] [--db URL] [--json]``."""
    parser.add_argument("run", help="run id or 'latest'")
    parser.add_argument("--limits", required=True, metavar="FILE", help="spec limits file (TOML)")
    parser.add_argument("--junit", default=None, metavar="FILE.xml", help="also write JUnit XML here")
    parser.add_argument("--db", default=None, metavar="URL",
                        help="database: a SQLite file path or SQLAlchemy URL (default $BENCHCTL_DB or "
                             "./benchctl-data/benchctl.db)")
    parser.add_argument("--json", action="store_true", help="print the report as JSON instead of a table")


def load_run_data(store: Store, run_id: int) -> RunData:
    """A run's provenance, points, results and units read from the store."""
    from benchctl.limits.outcomes import run_data_from_store

    return run_data_from_store(store, run_id)


def _json_ready(value: Any) -> Any:
    """Replace NaN/inf by None and numpy scalars by Python numbers (strict JSON)."""
    if isinstance(value, dict):
        return {str(k): _json_ready(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_json_ready(v) for v in value]
    if hasattr(value, "item") and not isinstance(value, (str, bytes)):
        value = value.item()
    if isinstance(value, float) and not math.isfinite(value):
        return None
    if isinstance(value, (str, int, float, bool)) or value is None:
        return value
    return str(value)


def record_check(store: Store, report: CheckReport) -> None:
    """Store the check with its run: one ``limit_check`` event, one ``limit:<name>`` result per limit."""
    details = _json_ready({k: v for k, v in report.to_dict().items() if k != "outcomes"})
    store.record_event(report.run_id, EVENT_LIMIT_CHECK, report.summary, details)
    for outcome in report.outcomes:
        store.record_result(
            report.run_id, RESULT_PREFIX + outcome.limit.name, outcome.worst_value, unit=outcome.unit,
            details=_json_ready(outcome.to_dict()), scope=_json_ready(dict(outcome.worst_scope)),
        )


def _fmt(value: float | None, unit: str, u: float | None = None) -> str:
    if value is None:
        return "—"
    return f"{value:.5g}" + (f" ± {u:.2g}" if u is not None else "") + (f" {unit}" if unit else "")


def _status_cell(outcome: LimitOutcome) -> str:
    advisory = "" if outcome.limit.required else " (advisory)"
    if outcome.status == PASS:
        return "[bold green]PASS[/]" + advisory
    if outcome.status == FAIL:
        return ("[bold red]FAIL[/]" if outcome.limit.required else "[magenta]FAIL[/]") + advisory
    if outcome.status == BORDERLINE:
        return "[bold dark_orange]BORDERLINE[/]" + advisory
    if outcome.status == SUSPECT:
        return "[bold magenta]SUSPECT[/]" + advisory
    return "[bold yellow]NOT CHECKED[/]" + advisory


def report_table(report: CheckReport) -> Table:
    """The rich table of a check."""
    title = f"run {report.run_id} ({escape(report.run.procedure)}, {escape(report.run.status)}) against " \
            f"{escape(report.limits_name or report.limits_path or 'limits')}"
    table = Table(title=title)
    for col, justify in (("limit", "left"), ("where", "left"), ("limit value", "right"), ("worst value", "right"),
                         ("margin", "right"), ("status", "left"), ("note", "left")):
        table.add_column(col, justify=justify, overflow="fold")
    for o in report.outcomes:
        margin = _fmt(o.margin, o.unit)
        if o.margin_rel is not None:
            margin += f" ({100 * o.margin_rel:+.3g} %)"
        note = o.reason if o.status != PASS else f"{o.n_values} value(s)"
        bounds = o.limit.bounds_text(o.unit) + (" (guarded)" if o.limit.decision == GUARDED else "")
        table.add_row(escape(o.limit.name), escape(o.where), escape(bounds),
                      escape(_fmt(o.worst_value, o.unit, o.uncertainty)), escape(margin), _status_cell(o),
                      escape(note))
    return table


def print_report(report: CheckReport) -> None:
    from benchctl.commands.console import console

    out = console()
    out.print(report_table(report))
    colour = "green" if report.passed else "red" if report.count(FAIL) else "yellow"
    if report.count(BORDERLINE) or report.count(SUSPECT):
        out.print("borderline: within U (k = 2) of a bound under guarded acceptance; suspect: would pass but taken "
                  "from an unsettled or unverified point or a flagged result. Neither is a pass (exit code 4).")
    out.print(f"[bold {colour}]{escape(report.summary)}[/]")
    if report.not_applicable:
        out.print(f"limits for other procedures, not evaluated: {escape(', '.join(report.not_applicable))}")


def check_run(
    store: Store,
    run_id: int | str,
    limits_path: str | Path,
    *,
    junit_path: str | Path | None = None,
    print_table: bool = True,
    record: bool = True,
    checked_utc: datetime | None = None,
) -> CheckReport:
    """Check run ``run_id`` (an id or ``"latest"``) of ``store`` against a limits file.

    Prints the table when ``print_table``, writes JUnit XML to ``junit_path`` when given,
    stores the outcome with the run when ``record``; returns the report (its
    ``exit_code`` follows :func:`benchctl.limits.exit_code_for`). Raises LimitsFileError
    for a bad limits file and ConfigurationError for a JUnit path that cannot be written,
    both before the store is touched.
    """
    limits = load_limits(limits_path)
    if junit_path is not None and not Path(junit_path).parent.is_dir():
        raise ConfigurationError(
            f"--junit {junit_path}: directory {Path(junit_path).parent} does not exist; create it or choose another path"
        )
    rid = store.resolve_run(run_id)
    data = load_run_data(store, rid)
    report = check_limits(limits, data, checked_utc=checked_utc or datetime.now(timezone.utc))
    if junit_path is not None:
        write_junit(report, junit_path)
    if record:
        record_check(store, report)
    if print_table:
        print_report(report)
    return report


def cmd_check(args: argparse.Namespace) -> int:
    """``benchctl check``: returns the check's exit code."""
    with open_existing_store(args.db) as store:
        report = check_run(store, args.run, args.limits, junit_path=args.junit, print_table=not args.json,
                           record=not store.read_only)  # a read-only store is checked, the outcome not stored
        if store.read_only:
            from benchctl.commands.console import error_console

            error_console().print("note: the check's outcome was not stored with the run (the store is read-only)",
                                  style="yellow", markup=False, highlight=False)
    if args.json:
        print(json.dumps(_json_ready(report.to_dict()), indent=2))
    return report.exit_code


__all__ = [
    "EVENT_LIMIT_CHECK", "RESULT_PREFIX", "add_check_arguments", "check_run", "cmd_check",
    "load_run_data", "print_report", "record_check", "report_table",
]
