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

from benchctl.exit_codes import EXIT_FAILED, EXIT_INTERRUPTED, EXIT_OK, ExitCode
from benchctl.commands.console import console, error_console, print_caution
from benchctl.commands.stores import open_store
from benchctl.commands.summary import print_run_summary
from benchctl.run_status import RunStatus




class _ProgressView:
    """A progress bar with points done / total, time left, and the last point.

    On a terminal the bar is redrawn in place; elsewhere (a pipe, a log file) nothing is
    drawn during the run and one complete line with the planned points done is printed at
    the end, so the progress never runs into what follows.
    """

    def __init__(self, title: str) -> None:
        self.title = title
        self.done = 0
        self.total = 0
        self.plain = not console().is_terminal
        self.progress = Progress(
            TextColumn("[bold]{task.description}"), BarColumn(), MofNCompleteColumn(),
            TextColumn("points"), TimeElapsedColumn(), TextColumn("left"), TimeRemainingColumn(),
            console=console(),
        )
        self.task = self.progress.add_task(title, total=None)
        self.last = ""
        self.live = Live(self._render(), console=console(), refresh_per_second=8, transient=False)

    def _render(self) -> Group:
        return Group(self.progress, Text(self.last, style="dim", no_wrap=True, overflow="ellipsis"))

    def update(self, done: int, total: int, values: Mapping[str, float]) -> None:
        self.done, self.total = done, total
        if self.plain:
            return
        self.progress.update(self.task, completed=done, total=total)
        if values:
            shown = [f"{k}={v:.5g}" for k, v in values.items() if isinstance(v, (int, float))][:10]
            self.last = "last point: " + "  ".join(shown)
        self.live.update(self._render())

    def __enter__(self) -> "_ProgressView":
        if not self.plain:
            self.live.__enter__()
        return self

    def __exit__(self, *exc: Any) -> None:
        if self.plain:
            console().print(f"{self.title}: {self.done}/{self.total} planned points", markup=False)
        else:
            self.live.__exit__(*exc)
            console().line()


def shutdown_notice(text: str) -> None:
    """What a termination signal started, on the console (stderr): it is shutting down, and how long."""
    error_console().print(f"[bold yellow]{escape(text)}[/]")


def run_procedure(procedure, params, station, store, *, dut, operator: str | None = None, settle: bool = True,
                  quiet: bool = False, job_id: int | None = None, resume_run_id: int | None = None,
                  accept_station_change: bool = False, on_begin=None):
    """Check roles, show the caution when the station is hazardous, then execute with a progress view.

    ``on_begin(run_id)`` is called once the run is stored (a job notes its place in the job there).

    Ctrl-C, SIGTERM and SIGHUP stop the run the same safe way; the console says so (:func:`shutdown_notice`).
    """
    from benchctl.runner import execute

    station.require_roles(procedure.roles, needed_by=f"procedure {procedure.name}")
    if station.limits.hazardous:
        print_caution(f"Station {station.name!r} allows up to {station.limits.source_voltage_max_v:g} V; "
                      "its file acknowledges hazardous voltage.")
    kwargs = dict(dut=dut, operator=operator, settle_enabled=settle, job_id=job_id, resume_run_id=resume_run_id,
                  notify=shutdown_notice)
    if accept_station_change:
        kwargs["accept_station_change"] = True
    if on_begin is not None:
        kwargs["on_begin"] = on_begin
    if quiet:
        return execute(procedure, params, station, store, **kwargs)
    with _ProgressView(f"{procedure.name} on {station.name}") as view:
        return execute(procedure, params, station, store, progress=view.update, **kwargs)


def _exit_code(outcome) -> int:
    if outcome.status == RunStatus.COMPLETED:
        return EXIT_OK
    if outcome.status == RunStatus.INTERRUPTED:
        return ExitCode.for_signal(outcome.signal_name) if outcome.signal_name else EXIT_INTERRUPTED
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


def print_plan(procedure, params, station_name: str, store) -> None:
    """Every planned operating point and the estimated duration; no instrument is touched."""
    from benchctl.job import estimate_duration

    plan = procedure.planned(params)  # a plan() that raises: one line naming the file and line
    table = Table(title=f"{procedure.name}: {len(plan)} planned points")
    keys = sorted({k for point in plan for k in point})
    table.add_column("#", justify="right")
    for k in keys:
        table.add_column(k, justify="right")
    for n, point in enumerate(plan, 1):
        table.add_row(str(n), *[f"{point.get(k, ''):g}" if isinstance(point.get(k), float) else str(point.get(k, ""))
                                for k in keys])
    console().print(table)
    history = store.runs(procedure=procedure.name, station=station_name) if store is not None else None
    est = estimate_duration(history, len(plan))
    if est.seconds is None:
        console().print("estimated duration: unknown (no completed run of this procedure on this station yet)")
    else:
        console().print(f"estimated duration: {est.seconds:.0f} s ({est.seconds_per_point:.2f} s per point, "
                        f"median of {est.basis_runs} earlier run(s) on station {station_name})")


def _check_resume_options(args) -> None:
    """A resume keeps the parameters and DUT the run began with: options that would change them
    are refused (they would otherwise be silently ignored); --accept-station-change needs --resume."""
    from benchctl.errors import ConfigurationError

    if not args.resume:
        if getattr(args, "accept_station_change", False):
            raise ConfigurationError("--accept-station-change goes with --resume RUN only")
        return
    given = [name for name, value in (("--set", args.sets), ("--params", args.params), ("--dut-part", args.dut_part),
                                      ("--dut-rev", args.dut_rev), ("--dut-serial", args.dut_serial),
                                      ("--no-settle", getattr(args, "no_settle", False))) if value]
    if given:
        raise ConfigurationError(
            f"{', '.join(given)} cannot be given with --resume: a resumed run keeps the parameters, DUT and settling "
            f"it began with (stored with run {args.resume}; `benchctl show {args.resume}` lists them). Start a new run to "
            "measure with other values")


def _resume_target(args, store):
    from benchctl.errors import ConfigurationError
    from benchctl.procedure import load_procedure

    run_id = store.resolve_run(args.resume)
    info = store.run(run_id)
    if info.status == RunStatus.RUNNING:
        from benchctl.store.transfer import running_refusal

        live = store.run_liveness(run_id)
        raise ConfigurationError(
            f"run {run_id} cannot be resumed: " + running_refusal(
                run_id, info.host, info.pid, f"its last point or event was stored {live.silent_s:.0f} s ago; if it "
                "is really running, wait for it to end") + ", then resume it")
    if info.status not in (RunStatus.INTERRUPTED, RunStatus.TRIPPED):
        raise ConfigurationError(f"run {run_id} is {info.status}; only interrupted or tripped runs can be resumed")
    procedure = load_procedure(args.procedure or info.procedure)
    if procedure.source_sha256 != info.procedure_sha256:
        raise ConfigurationError(
            f"procedure {procedure.path} changed since run {run_id} began (sha256 {procedure.source_sha256[:12]}… "
            f"vs {info.procedure_sha256[:12]}…); resuming would mix two procedures — start a new run instead")
    params = procedure.resolve_parameters(values=dict(info.parameters))
    return run_id, info, procedure, params


def cmd_run(args: argparse.Namespace) -> int:
    from benchctl.errors import ConfigurationError
    from benchctl.procedure import load_parameter_file, load_procedure
    from benchctl.runner import DutInfo
    from benchctl.station import load_station

    station = load_station(args.station)
    if not args.resume and not args.procedure:
        raise ConfigurationError("give a procedure to run, or --resume RUN to continue one")
    _check_resume_options(args)
    store = open_store(args.db or station.database)
    try:
        if args.resume:
            run_id, info, procedure, params = _resume_target(args, store)
            if info.station_name != station.name:
                raise ConfigurationError(f"run {run_id} ran on station {info.station_name!r}, not {station.name!r}; "
                                         "resume it on the same station")
            dut = DutInfo(info.dut_part, info.dut_revision, info.dut_serial)
        else:
            procedure = load_procedure(args.procedure)
            file_values = load_parameter_file(args.params) if args.params else None
            params = procedure.resolve_parameters(file_values=file_values, cli_values=args.sets)
            run_id, dut = None, DutInfo(args.dut_part, args.dut_rev, args.dut_serial)
        if args.list:
            print_plan(procedure, params, station.name, store)
            return EXIT_OK
        if args.limits:  # a bad limits file is refused before anything is switched on
            from benchctl.limits import load_limits

            load_limits(args.limits)
        outcome = run_procedure(procedure, params, station, store, dut=dut, operator=args.operator,
                                settle=not args.no_settle, quiet=args.json, resume_run_id=run_id,
                                accept_station_change=args.accept_station_change)
        _report_outcome(outcome, store, args.json)
        if not args.json:
            console().print(f"data: {store.url}")
        code = _exit_code(outcome)
        if args.limits and outcome.status == RunStatus.COMPLETED:
            from benchctl.commands.check import check_run

            report = check_run(store, outcome.run_id, args.limits, junit_path=args.junit, print_table=not args.json)
            code = report.exit_code
        return code
    finally:
        store.close()


def cmd_demo(args: argparse.Namespace) -> int:
    from benchctl.procedure import load_procedure
    from benchctl.runner import DutInfo
    from benchctl.station import parse_station
    from benchctl.simulated_instruments.bench import SimulatedBench

    out = console()
    out.print("[bold]benchctl demo[/]: the efficiency map on a simulated bench (no hardware involved)")
    bench = SimulatedBench(args.model, time_scale=args.time_scale, seed=args.seed).start()
    try:
        from benchctl.locations import data_dir as find_data_dir

        data_dir = find_data_dir()
        data_dir.mkdir(exist_ok=True)
        station_path = bench.write_station(data_dir / f"sim-{args.model}.toml")
        station = parse_station(station_path.read_text(encoding="utf-8"), path=station_path)
        out.print(f"simulated {bench.design.description}; station file {station_path}")
        store = open_store(args.db)
        try:
            part = {"flyback-48v-5v": "FB-48S05", "buck-12v-1v2": "POL-12S1V2"}.get(args.model, args.model)
            procedure = load_procedure("efficiency_map")
            # Level VI limits are written for external supplies: indicative for the brick, meaningless for a POL.
            params = procedure.resolve_parameters(values={**bench.procedure_parameters(),
                                                          "external_supply_limits": bench.design.topology != "buck"})
            outcome = run_procedure(procedure, params, station, store, dut=DutInfo(part, "A", "SIM-0001"))
            _report_outcome(outcome, store, False)
            out.print(f"data: [bold]{store.url}[/] (run {outcome.run_id})")
            if outcome.status == RunStatus.COMPLETED:
                from benchctl.report import build_report

                files = build_report(store, outcome.run_id)
                out.print(f"report: [bold]{files.html_path}[/] ({len(files.png_paths)} plots)")
            from benchctl.procedure import procedures_dir

            limits = procedures_dir() / "limits" / f"{args.model}.toml"
            try:
                limits = limits.relative_to(Path.cwd())
            except ValueError:
                pass
            out.print(f"next: benchctl show {outcome.run_id}   |   benchctl export {outcome.run_id} --format csv   |   "
                      f"benchctl check {outcome.run_id} --limits {limits}")
            return _exit_code(outcome)
        finally:
            store.close()
    finally:
        bench.stop()


def cmd_procedures(args: argparse.Namespace) -> int:
    """The bundled procedures and their parameters, read from their source without running them."""
    from benchctl.procedure import available_procedures, find_procedure, load_procedure
    from benchctl.commands.console import error_console
    from benchctl.procedure_summary import NotStatic, read_summary

    for name in available_procedures():
        try:
            proc = read_summary(find_procedure(name))
        except NotStatic as exc:  # a bundled file with computed declarations: benchctl's own, imported
            error_console().print(f"note: {escape(str(exc))}; read by importing it", style="dim")
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
