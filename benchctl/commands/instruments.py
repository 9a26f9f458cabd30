"""``benchctl instruments``: connect to every instrument of a station and identify it."""

from __future__ import annotations

import argparse
import json

from benchctl.exit_codes import EXIT_INSTRUMENT, EXIT_OK
from benchctl.commands.console import Column, fitted_table, print_fitted
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
        notes = []
        cells = []
        for r in rows:
            status = r["status"]
            if status != "ok":
                notes.append(f"{len(notes) + 1}. {r['role']}: {status}")
                status = f"FAILED (note {len(notes)})" if status.startswith("FAILED") else f"errors (note {len(notes)})"
            cells.append([r["role"], r["driver"], r["resource"], r["identity"], status])
        table, hidden = fitted_table(
            f"station {station.name}",
            [Column("role"), Column("driver", 2), Column("resource", 1), Column("identity", 3), Column("status")],
            cells, style=lambda i, text: text if i != 4 else ("[green]ok[/]" if text == "ok" else f"[red]{text}[/]"))
        print_fitted(table, hidden, notes)
    return EXIT_INSTRUMENT if bad else EXIT_OK
