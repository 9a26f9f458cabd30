"""Implementations of the ``benchctl`` commands (rich output lives here and only here).

``dispatch`` maps the project's errors to one clear line on standard error and an exit
code through :func:`benchctl.exit_codes.exit_code_for_error` (bad input 2,
instrument/database trouble 3).
"""

from __future__ import annotations

import argparse
import importlib


_MODULES = {
    "sim": "benchctl.commands.sim",
    "instruments": "benchctl.commands.instruments",
    "run": "benchctl.commands.run",
    "demo": "benchctl.commands.run",
    "procedures": "benchctl.commands.run",
    "runs": "benchctl.commands.data",
    "show": "benchctl.commands.data",
    "mark-interrupted": "benchctl.commands.data",
    "export": "benchctl.commands.data",
    "report": "benchctl.commands.report",
    "check": "benchctl.commands.check",
    "job": "benchctl.commands.job",
    "analyze": "benchctl.commands.analyze",
    "db": "benchctl.commands.db",
    "query": "benchctl.commands.db",
    "export-runs": "benchctl.commands.db",
    "import-runs": "benchctl.commands.db",
    "compare": "benchctl.commands.compare",
    "compare-revisions": "benchctl.commands.compare",
    "stats": "benchctl.commands.stats",
    "revision": "benchctl.commands.revision",
    "serve": "benchctl.commands.serve",
    "probe": "benchctl.commands.probe",
}


def dispatch(args: argparse.Namespace) -> int:
    from benchctl.commands.console import error_console
    from benchctl.errors import BenchctlError
    from benchctl.exit_codes import exit_code_for_error

    from rich.markup import escape

    def report(exc: Exception) -> None:
        # One logical line (soft wrap: the terminal folds it, no newlines are inserted).
        error_console().print(f"[bold red]error:[/] {escape(str(exc))}", soft_wrap=True, highlight=False)

    module = importlib.import_module(_MODULES[args.command])
    handler = getattr(module, "cmd_" + args.command.replace("-", "_"))
    try:
        return handler(args)
    except BenchctlError as exc:
        report(exc)
        return int(exit_code_for_error(exc))
