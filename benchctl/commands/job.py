"""``benchctl job``: several procedures in order on one station, one summary, one exit code."""

from __future__ import annotations

import argparse
from pathlib import Path

from rich.markup import escape
from rich.table import Table

from benchctl.exit_codes import EXIT_BAD_INPUT, EXIT_FAILED, EXIT_INTERRUPTED, EXIT_NOT_CHECKED, EXIT_OK, ExitCode
from benchctl.commands.console import console
from benchctl.commands.run import _exit_code, print_plan, run_procedure
from benchctl.commands.stores import open_store
from benchctl.errors import ConfigurationError
from benchctl.run_status import RunStatus

def _file_part(serial: str) -> str:
    """A serial as a piece of a file name (letters, digits, '-', '_', '.'; others become '_')."""
    return "".join(c if c.isalnum() or c in "-_." else "_" for c in serial) or "unit"


def _unit_change(job, units, args, station):
    import sys

    from benchctl.job_units import unit_change_for

    def ask(prompt: str) -> str:
        return console().input(escape(prompt))

    def tell(text: str) -> None:
        console().print(escape(text))

    kind = getattr(args, "unit_change", None) or job.unit_change
    channels = job.switch_channels if tuple(units) == tuple(job.units) else ()  # --dut-serial: 1, 2, 3 ...
    return unit_change_for(kind, units=len(units), interactive=sys.stdin.isatty(), ask=ask, tell=tell,
                           hazardous=station.limits.hazardous, station=station, channels=channels)


def _job_note(store, job_id: int, job_name: str, units, u: int, step: int, steps: int, procedure: str):
    """``on_begin`` of a job's run: an event ``job_step`` saying where in the job the run stands."""
    details = {"job_id": job_id, "job_name": job_name, "unit": units[u], "unit_index": u + 1, "units": len(units),
               "serials": list(units), "step": step, "steps": steps, "procedure": procedure}

    def note(run_id: int) -> None:
        store.record_event(run_id, "job_step", f"job {job_id} ({job_name}): unit {units[u] or '(no serial)'} "
                           f"{u + 1}/{len(units)}, step {step}/{steps} ({procedure})", details)

    return note


#: Which step outcome decides the job's exit code when several go wrong (worst first).
_SEVERITY = [ExitCode.TERMINATED, ExitCode.HUNG_UP, EXIT_INTERRUPTED, EXIT_FAILED, EXIT_NOT_CHECKED, EXIT_BAD_INPUT, EXIT_OK]


def cmd_job(args: argparse.Namespace) -> int:
    from benchctl.job import estimate_duration, load_job, parse_serials
    from benchctl.job_junit import JobEntry, write_job_junit
    from benchctl.job_units import JobStopped
    from benchctl.limits import load_limits
    from benchctl.procedure import load_parameter_file, load_procedure
    from benchctl.runner import DutInfo
    from benchctl.station import load_station

    job = load_job(args.job)
    station = load_station(args.station)
    # Everything is loaded and validated before the first instrument is touched.
    prepared = []
    for n, step in enumerate(job.steps, 1):
        procedure = load_procedure(step.procedure)
        file_values = load_parameter_file(step.params_file) if step.params_file else None
        params = procedure.resolve_parameters(file_values=file_values, values=step.parameters)
        station.require_roles(procedure.roles, needed_by=f"step {n} ({procedure.name})")
        if step.limits_file is not None:
            load_limits(step.limits_file)
        prepared.append((step, procedure, params))
    units = parse_serials(args.dut_serial) if args.dut_serial else job.units
    part = args.dut_part or job.dut_part
    revision = args.dut_rev or job.dut_revision
    junit_path = Path(args.junit) if args.junit else None
    store = open_store(args.db or station.database)
    hold = None
    try:
        if args.list:
            total = 0.0
            unknown = False
            for step, procedure, params in prepared:
                print_plan(procedure, params, station.name, store)
                est = estimate_duration(store.runs(procedure=procedure.name, station=station.name),
                                        len(procedure.planned(params)))
                unknown |= est.seconds is None
                total += est.seconds or 0.0
            console().print(f"job {job.name!r}: {len(prepared)} step(s) on {len(units)} unit(s) "
                            f"({escape(', '.join(s or '(no serial)' for s in units))}); estimated total "
                            + ("unknown for some steps; known part " if unknown else "")
                            + f"{total * len(units):.0f} s")
            return EXIT_OK
        from benchctl.station_lock import hold_station

        unit_change = _unit_change(job, units, args, station)
        if junit_path is not None and not junit_path.parent.is_dir():
            raise ConfigurationError(f"--junit {junit_path}: directory {junit_path.parent} does not exist; create it "
                                     "or choose another path")
        # The job holds its station for all its steps: no other run slips in between two of them.
        hold = hold_station(station, store, what=f"job {job.name}")
        job_id = store.begin_job(job.name, station.name)  # the database assigns it: unique across stations
        rows = []
        entries = []
        stopped = ""
        try:
            for u, serial in enumerate(units):
                try:
                    unit_change.select(u, len(units), serial)
                except JobStopped as exc:
                    stopped = str(exc)
                    break
                dut = DutInfo(part, revision, serial)
                for n, (step, procedure, params) in enumerate(prepared, 1):
                    console().rule(f"unit {u + 1}/{len(units)} {escape(serial)}: step {n}/{len(prepared)}: "
                                   f"{procedure.name}")
                    note = _job_note(store, job_id, job.name, units, u, n, len(prepared), procedure.name)
                    outcome = run_procedure(procedure, params, station, store, dut=dut, operator=args.operator,
                                            settle=not args.no_settle, job_id=job_id, on_begin=note)
                    code = _exit_code(outcome)
                    check, report = "—", None
                    if step.limits_file is not None and outcome.status == RunStatus.COMPLETED:
                        from benchctl.commands.check import check_run

                        junit = None
                        if args.junit_dir:
                            Path(args.junit_dir).mkdir(parents=True, exist_ok=True)
                            unit_part = f"-{_file_part(serial)}" if len(units) > 1 else ""
                            junit = Path(args.junit_dir) / f"job{job_id}{unit_part}-step{n}-{procedure.name}.xml"
                        report = check_run(store, outcome.run_id, step.limits_file, junit_path=junit)
                        code = report.exit_code
                        check = "passed" if report.exit_code == EXIT_OK else (
                            "FAILED" if report.exit_code == EXIT_FAILED else "not checked")
                    rows.append((serial, n, procedure.name, outcome.run_id, outcome.status, outcome.points, check,
                                 code))
                    entries.append(JobEntry(serial, n, procedure.name, outcome.run_id, outcome.status,
                                            outcome.message, report))
                    if outcome.status == RunStatus.INTERRUPTED:
                        stopped = f"run {outcome.run_id} was interrupted"
                        break  # the operator stopped it: do not start the next step
                if stopped:
                    break
        finally:
            unit_change.close()
            # written however the night ends (a signal too), with the runs it never made
            done = {(e.serial, e.step) for e in entries}
            entries += [JobEntry(serial, n, procedure.name) for serial in units
                        for n, (_s, procedure, _p) in enumerate(prepared, 1) if (serial, n) not in done]
            if junit_path is not None:
                write_job_junit(junit_path, job.name, job_id, entries)
        table = Table(title=f"job {job_id}: {escape(job.name)} on {station.name}")
        for col in ("unit", "step", "procedure", "run", "status", "points", "limits", "exit"):
            table.add_column(col)
        for serial, n, name, run_id, status, points, check, code in rows:
            colour = "green" if code == EXIT_OK else "red"
            table.add_row(escape(serial or "—"), str(n), name, str(run_id), f"[{colour}]{status}[/]", str(points),
                          check, str(code))
        console().print(table)
        if stopped:
            console().print(f"[yellow]{escape(stopped)}; {len(entries) - len(rows)} planned run(s) not made[/]")
        if junit_path is not None:
            console().print(f"JUnit XML of the job: {junit_path}")
        codes = [r[-1] for r in rows]
        if len(rows) < len(prepared) * len(units):
            codes.append(EXIT_INTERRUPTED)
        return next(c for c in _SEVERITY if c in codes) if codes else EXIT_OK
    finally:
        if hold is not None:
            hold.release()
        store.close()
