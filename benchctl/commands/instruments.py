"""``benchctl instruments``: connect to every instrument of a station and identify it."""

from __future__ import annotations

import argparse
import json

from rich.markup import escape
from rich.table import Table

from benchctl.cli import EXIT_INSTRUMENT, EXIT_OK
from benchctl.commands.console import console
from benchctl.errors import BenchctlError
from benchctl.station import load_station


def check_instrument(config) -> dict:
    """Open, identify and read the error queue of one instrument; never raises."""
    row = {"role": config.role, "driver": config.driver, "resource": config.resource, "identity": "", "status": "ok"}
    driver = None
    try:
        driver = config.create().open()
        row["identity"] = str(driver.identity)
        errors = driver.read_errors()
        if errors:
            row["status"] = "error queue: " + "; ".join(f"{c},{m}" for c, m in errors)
    except BenchctlError as exc:
        row["status"] = f"FAILED: {exc}"
    finally:
        if driver is not None:
            driver.close()
    return row


def cmd_instruments(args: argparse.Namespace) -> int:
    station = load_station(args.station)
    rows = [check_instrument(cfg) for cfg in station.instruments.values()]
    bad = [r for r in rows if r["status"] != "ok"]
    if args.json:
        print(json.dumps({"station": station.name, "instruments": rows, "ok": not bad}, indent=2))
    else:
        table = Table(title=f"station {station.name}")
        table.add_column("role", no_wrap=True)
        table.add_column("driver", overflow="fold")
        table.add_column("resource", no_wrap=True)
        table.add_column("identity", overflow="fold")
        table.add_column("status", overflow="fold")
        for r in rows:
            status = "[green]ok[/]" if r["status"] == "ok" else f"[red]{escape(r['status'])}[/]"
            table.add_row(r["role"], r["driver"], r["resource"], escape(r["identity"]), status)
        console().print(table)
    return EXIT_INSTRUMENT if bad else EXIT_OK
