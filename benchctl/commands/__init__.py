"""Implementations of the ``benchctl`` commands (rich output lives here and only here).

``dispatch`` maps the project's errors to one clear line on standard error and an exit
code: bad input 2, instrument/database trouble 3.
"""

from __future__ import annotations

import argparse
import importlib

from benchctl.cli import EXIT_BAD_INPUT, EXIT_INSTRUMENT

_MODULES = {
    "sim": "benchctl.commands.sim",
    "instruments": "benchctl.commands.instruments",
    "run": "benchctl.commands.run",
    "demo": "benchctl.commands.run",
    "procedures": "benchctl.commands.run",
    "runs": "benchctl.commands.data",
    "show": "benchctl.commands.data",
    "export": "benchctl.commands.data",
}


def dispatch(args: argparse.Namespace) -> int:
    from benchctl.commands.console import error_console
    from benchctl.errors import ConfigurationError, InstrumentError, ProcedureError, StoreError, BenchctlError

    module = importlib.import_module(_MODULES[args.command])
    handler = getattr(module, "cmd_" + args.command)
    try:
        return handler(args)
    except (ConfigurationError, ProcedureError) as exc:
        error_console().print(f"[bold red]error:[/] {exc}", markup=True, highlight=False)
        return EXIT_BAD_INPUT
    except (InstrumentError, StoreError) as exc:
        error_console().print(f"[bold red]error:[/] {exc}", markup=True, highlight=False)
        return EXIT_INSTRUMENT
    except BenchctlError as exc:
        error_console().print(f"[bold red]error:[/] {exc}", markup=True, highlight=False)
        return EXIT_BAD_INPUT
