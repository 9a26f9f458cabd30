"""``benchctl report RUN [--out DIR] [--db URL]``: write a run's HTML report and PNG plots."""

from __future__ import annotations

import argparse

from rich.markup import escape

from benchctl.exit_codes import EXIT_OK
from benchctl.locations import DEFAULT_DB_ENV
from benchctl.commands.stores import open_existing_store


def add_report_arguments(parser: argparse.ArgumentParser) -> None:
    """Arguments of ``benchctl report``."""
    parser.add_argument("run", help="run id or 'latest'")
    parser.add_argument("--out", metavar="DIR", default=None,
                        help="directory for report.html and the PNG files (default ./benchctl-data/report-run<id>/)")
    parser.add_argument("--db", default=None, metavar="URL",
                        help=f"database: a SQLite file path or SQLAlchemy URL (default ${DEFAULT_DB_ENV} "
                             "or ./benchctl-data/benchctl.db)")


def cmd_report(args: argparse.Namespace) -> int:
    """Build the report of ``args.run``; prints where it was written."""
    from benchctl.commands.console import console
    from benchctl.report import build_report

    with open_existing_store(args.db) as store:
        files = build_report(store, args.run, args.out)
    out = console()
    out.print(f"report of run {files.run_id}: {escape(str(files.html_path))} "
              f"({len(files.png_paths)} plot{'s' if len(files.png_paths) != 1 else ''})")
    for note in files.notes:
        out.print(f"[yellow]note:[/] {escape(note)}")
    return EXIT_OK
