"""``benchctl run``, ``benchctl demo`` and ``benchctl procedures``."""

from __future__ import annotations

import argparse
import json
from pathlib import Path
from typing import Any, Mapping

from rich.live import Live
from rich.markup import escape
from rich.progress import BarColumn, MofNCompleteColumn, Progress, TextColumn, TimeElapsedColumn, TimeRemainingColumn
from rich.table import Table
from rich.console import Group
from rich.text import Text

from benchctl.cli import EXIT_FAILED, EXIT_INTERRUPTED, EXIT_OK, default_db
from benchctl.commands.console import console, print_caution
from benchctl.commands.summary import print_run_summary


def open_store(db: str | None):
    from benchctl.store import Store

    url = db or default_db()
    if "://" not in url:
        Path(url).parent.mkdir(parents=True, exist_ok=True)
    return Store.open(url)


class _ProgressView:
    """A progress bar with points done / total, time left, and the last point."""

    def __init__(self, title: str) -> None:
        self.progress = Progress(
            TextColumn("[bold]{task.description}"), BarColumn(), MofNCompleteColumn(),
            TextColumn("points"), TimeElapsedColumn(), TextColumn("left"), TimeRemainingColumn(),
            console=console(),
        )
        self.task = self.progress.add_task(title, total=None)
        self.last = ""
        self.live = Live(self._render(), console=console(), refresh_per_second=8, transient=False)

    def _render(self) -> Group:
        return Group(self.progress, Text(self.last, style="dim"))

    def update(self, done: int, total: int, values: Mapping[str, float]) -> None:
        self.progress.update(self.task, completed=done, total=total)
        if values:
            self.last = "last point: " + "  ".join(f"{k}={v:.5g}" for k, v in values.items())
        self.live.update(self._render())

    def __enter__(self) -> "_ProgressView":
        self.live.__enter__()
        return self

    def __exit__(self, *exc: Any) -> None:
        self.live.__exit__(*exc)


def run_procedure(*, procedure_ref: str, station, store, sets: list[str], params_file: str | None,
                  dut, operator: str | None, settle: bool, quiet: bool = False, extra_values: Mapping[str, Any] | None = None):
    """Resolve parameters, caution if needed, then execute with a progress view."""
    from benchctl.procedure import load_parameter_file, load_procedure
    from benchctl.runner import execute

    procedure = load_procedure(procedure_ref)
    file_values = load_parameter_file(params_file) if params_file else None
    params = procedure.resolve_parameters(file_values=file_values, values=extra_values, cli_values=sets)
    station.require_roles(procedure.roles, needed_by=f"procedure {procedure.name}")
    if station.limits.hazardous:
        print_caution(
            f"Station {station.name!r} allows up to {station.limits.source_voltage_max_v:g} V; its file acknowledges "
            "hazardous voltage."
        )
    if quiet:
        return execute(procedure, params, station, store, dut=dut, operator=operator, settle_enabled=settle)
    with _ProgressView(f"{procedure.name} on {station.name}") as view:
        return execute(procedure, params, station, store, dut=dut, operator=operator, settle_enabled=settle,
                       progress=view.update)


def _exit_code(outcome) -> int:
    if outcome.status == "completed":
        return EXIT_OK
    if outcome.status == "interrupted":
        return EXIT_INTERRUPTED
    return EXIT_FAILED


def _report_outcome(outcome, store, as_json: bool) -> None:
    if as_json:
        print(json.dumps({"run_id": outcome.run_id, "status": outcome.status, "message": outcome.message,
                          "points": outcome.points, "duration_s": round(outcome.duration_s, 3)}))
        return
    print_run_summary(store, outcome.run_id)
    style = "green" if outcome.ok else "red"
    console().print(f"run {outcome.run_id}: [{style}]{outcome.status}[/] — {outcome.points} points in "
                    f"{outcome.duration_s:.1f} s")
    if outcome.message:
        console().print(escape(outcome.message))


def cmd_run(args: argparse.Namespace) -> int:
    from benchctl.runner import DutInfo
    from benchctl.station import load_station

    station = load_station(args.station)
    store = open_store(args.db or station.database)
    try:
        outcome = run_procedure(
            procedure_ref=args.procedure, station=station, store=store, sets=args.sets, params_file=args.params,
            dut=DutInfo(args.dut_part, args.dut_rev, args.dut_serial), operator=args.operator,
            settle=not args.no_settle, quiet=args.json,
        )
        _report_outcome(outcome, store, args.json)
        if not args.json:
            console().print(f"data: {store.url}")
        return _exit_code(outcome)
    finally:
        store.close()


def cmd_demo(args: argparse.Namespace) -> int:
    from benchctl.runner import DutInfo
    from benchctl.station import parse_station
    from simulated_instruments.bench import SimulatedBench

    out = console()
    out.print("[bold]benchctl demo[/]: the efficiency map on a simulated bench (no hardware involved)")
    bench = SimulatedBench(args.model, time_scale=args.time_scale, seed=args.seed).start()
    try:
        data_dir = Path("benchctl-data")
        data_dir.mkdir(exist_ok=True)
        station_path = bench.write_station(data_dir / f"sim-{args.model}.toml")
        station = parse_station(station_path.read_text(encoding="utf-8"), path=station_path)
        out.print(f"simulated {bench.design.description}; station file {station_path}")
        store = open_store(args.db)
        try:
            part = {"flyback-48v-5v": "FB-48S05", "buck-12v-1v2": "POL-12S1V2"}.get(args.model, args.model)
            outcome = run_procedure(
                procedure_ref="efficiency_map", station=station, store=store, sets=[], params_file=None,
                dut=DutInfo(part, "A", "SIM-0001"), operator=None, settle=True,
                extra_values=bench.procedure_parameters(),
            )
            _report_outcome(outcome, store, False)
            out.print(f"data: [bold]{store.url}[/] (run {outcome.run_id})")
            out.print(f"next: benchctl show {outcome.run_id}   |   benchctl export {outcome.run_id} --format csv")
            return _exit_code(outcome)
        finally:
            store.close()
    finally:
        bench.stop()


def cmd_procedures(args: argparse.Namespace) -> int:
    from benchctl.procedure import available_procedures, load_procedure

    for name in available_procedures():
        proc = load_procedure(name)
        table = Table(title=f"{proc.name}: {proc.description}", title_justify="left")
        for col in ("parameter", "unit", "default", "range", "help"):
            table.add_column(col, overflow="fold")
        for p in proc.parameters:
            rng = "" if p.minimum is None and p.maximum is None else f"{p.minimum:g}…{p.maximum:g}"
            if p.choices:
                rng = " | ".join(p.choices)
            table.add_row(p.name, p.unit, escape(str(p.default)), rng, p.help)
        console().print(table)
        console().print(f"roles: {', '.join(proc.roles)}\n")
    return EXIT_OK
