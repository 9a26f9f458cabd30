"""``benchctl job``: several procedures in order on one station, one summary, one exit code."""

from __future__ import annotations

import argparse
from pathlib import Path

from rich.markup import escape
from rich.table import Table

from benchctl.cli import EXIT_BAD_INPUT, EXIT_FAILED, EXIT_INTERRUPTED, EXIT_NOT_CHECKED, EXIT_OK
from benchctl.commands.console import console
from benchctl.commands.run import _exit_code, print_plan, run_procedure
from benchctl.commands.stores import open_store

#: Which step outcome decides the job's exit code when several go wrong (worst first).
_SEVERITY = [EXIT_INTERRUPTED, EXIT_FAILED, EXIT_NOT_CHECKED, EXIT_BAD_INPUT, EXIT_OK]


def cmd_job(args: argparse.Namespace) -> int:
    from benchctl.job import estimate_duration, load_job
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
            console().print(f"job {job.name!r}: {len(prepared)} step(s); estimated total "
                            + ("unknown for some steps; known part " if unknown else "") + f"{total:.0f} s")
            return EXIT_OK
        from benchctl.station_lock import hold_station

        # The job holds its station for all its steps: no other run slips in between two of them.
        hold = hold_station(station, store, what=f"job {job.name}")
        job_id = store.begin_job(job.name, station.name)  # the database assigns it: unique across stations
        dut = DutInfo(job.dut_part, job.dut_revision, job.dut_serial)
        rows = []
        for n, (step, procedure, params) in enumerate(prepared, 1):
            console().rule(f"step {n}/{len(prepared)}: {procedure.name}")
            outcome = run_procedure(procedure, params, station, store, dut=dut, operator=args.operator,
                                    settle=not args.no_settle, job_id=job_id)
            code = _exit_code(outcome)
            check = "—"
            if step.limits_file is not None and outcome.status == "completed":
                from benchctl.commands.check import check_run

                junit = None
                if args.junit_dir:
                    Path(args.junit_dir).mkdir(parents=True, exist_ok=True)
                    junit = Path(args.junit_dir) / f"job{job_id}-step{n}-{procedure.name}.xml"
                report = check_run(store, outcome.run_id, step.limits_file, junit_path=junit)
                code = report.exit_code
                check = "passed" if report.exit_code == EXIT_OK else ("FAILED" if report.exit_code == EXIT_FAILED
                                                                      else "not checked")
            rows.append((n, procedure.name, outcome.run_id, outcome.status, outcome.points, check, code))
            if outcome.status == "interrupted":
                break  # the operator stopped it: do not start the next step
        table = Table(title=f"job {job_id}: {escape(job.name)} on {station.name}")
        for col in ("step", "procedure", "run", "status", "points", "limits", "exit"):
            table.add_column(col)
        for n, name, run_id, status, points, check, code in rows:
            colour = "green" if code == EXIT_OK else "red"
            table.add_row(str(n), name, str(run_id), f"[{colour}]{status}[/]", str(points), check, str(code))
        console().print(table)
        codes = [r[-1] for r in rows]
        if len(rows) < len(prepared):
            codes.append(EXIT_INTERRUPTED)
        return next(c for c in _SEVERITY if c in codes) if codes else EXIT_OK
    finally:
        if hold is not None:
            hold.release()
        store.close()
