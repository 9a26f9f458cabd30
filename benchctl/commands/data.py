"""``benchctl runs``, ``benchctl show`` and ``benchctl export``: reading the store."""

from __future__ import annotations

import argparse
import json
import sys
from dataclasses import asdict
from pathlib import Path

from rich.markup import escape
from rich.table import Table

from benchctl.exit_codes import EXIT_FAILED, EXIT_OK
from benchctl.commands.stores import open_existing_store as _open
from benchctl.commands.console import Column, console, fitted_table, print_fitted
from benchctl.commands.summary import print_run_summary
from benchctl.run_status import RunStatus




def _json_default(obj):
    if hasattr(obj, "isoformat"):
        from benchctl.export_table import iso_utc

        return iso_utc(obj)
    if hasattr(obj, "item"):
        return obj.item()
    return str(obj)


def _calibration(info) -> list[dict]:
    """The calibration records of the run's station file (stored with the run), with how many
    days past due each was when the run began (None: in date)."""
    from benchctl.station import calibration_records_from_text

    started = info.started_utc.date() if info.started_utc is not None else None
    return [{"role": r.role, "calibration_due": r.due.isoformat(), "calibration_certificate": r.certificate,
             "days_overdue_at_run": r.overdue_days(started) if started is not None else None}
            for r in calibration_records_from_text(info.station_text)]


def cmd_runs(args: argparse.Namespace) -> int:
    with _open(args.db) as store:
        frame = store.runs(status=args.status, procedure=args.procedure, station=args.station_name, limit=args.limit)
        if args.json:
            from benchctl.export_table import json_records

            print(json.dumps(json_records(frame)))
            return EXIT_OK
        names = [c for c in ("run_id", "procedure", "station", "dut_part", "dut_revision", "dut_serial",
                             "status", "started_utc", "n_points") if c in frame.columns]
        keep = {"run_id": 0, "procedure": 0, "status": 0, "started_utc": 1, "n_points": 2, "station": 3,
                "dut_part": 4, "dut_serial": 5, "dut_revision": 6}
        rows = []
        for _, r in frame.iterrows():
            cells = []
            for c in names:
                v = r[c]
                if c == "started_utc" and hasattr(v, "strftime"):
                    v = v.strftime("%Y-%m-%d %H:%M:%S")
                cells.append("" if v is None else str(v))
            rows.append(cells)
        status_at = names.index("status") if "status" in names else -1

        def colour(i: int, text: str) -> str:
            if i != status_at:
                return text
            return f"[{ {'completed': 'green', 'running': 'cyan', 'interrupted': 'yellow'}.get(text, 'red') }]{text}[/]"

        table, hidden = fitted_table(f"runs in {store.url}", [Column(c.replace("_", " "), keep[c],
                                     "right" if c in ("run_id", "n_points") else "left") for c in names], rows,
                                     style=colour)
        print_fitted(table, hidden)
    return EXIT_OK


def cmd_show(args: argparse.Namespace) -> int:
    with _open(args.db) as store:
        run_id = store.resolve_run(args.run)
        info = store.run(run_id)
        if args.json:
            payload = asdict(info)
            payload["calibration"] = _calibration(info)
            payload.pop("station_text", None)
            from benchctl.export_table import json_records

            payload["events"] = json_records(store.events(run_id))
            payload["results"] = json_records(store.results(run_id))
            print(json.dumps(payload, default=_json_default, indent=2))
            return EXIT_OK
        out = console()
        table = Table(title=f"run {run_id}", show_header=False)
        table.add_column("field", style="bold")
        table.add_column("value", overflow="fold")
        rows = [
            ("procedure", f"{info.procedure}  (sha256 {info.procedure_sha256[:16]}…)"),
            ("status", f"{info.status}  {info.message}"),
            ("station", f"{info.station_name}  {info.station_description}"),
            ("DUT", f"part {info.dut_part or '—'}  rev {info.dut_revision or '—'}  serial {info.dut_serial or '—'}"),
            ("operator / host", f"{info.operator or '—'} @ {info.host} (pid {info.pid})"),
            ("benchctl", info.benchctl_version),
            ("started / ended (UTC)", f"{info.started_utc:%Y-%m-%d %H:%M:%S} / "
                                      f"{info.ended_utc:%Y-%m-%d %H:%M:%S}" if info.ended_utc else f"{info.started_utc:%Y-%m-%d %H:%M:%S} / —"),
            ("points", str(info.n_points)),
            ("parameters", json.dumps(info.parameters, default=_json_default)),
        ]
        calibration = {c["role"]: c for c in _calibration(info)}
        for inst in info.instruments:
            rows.append((f"instrument {inst.role}", f"{inst.identity}  [{inst.driver} @ {inst.resource}]"))
            cal = calibration.get(inst.role)
            if cal is not None:
                overdue = (f"  OVERDUE by {cal['days_overdue_at_run']} day(s) when the run began"
                           if cal["days_overdue_at_run"] is not None else "")
                rows.append((f"  calibration {inst.role}", f"due {cal['calibration_due']}"
                             + (f", certificate {cal['calibration_certificate']}" if cal["calibration_certificate"]
                                else "") + overdue))
        for k, v in rows:
            table.add_row(k, escape(v))
        out.print(table)
        print_run_summary(store, run_id)
    return EXIT_OK


def _array_frame(store, run_id: int, name: str, seq: int | None):
    """One array record of a run as a DataFrame of its 1-D columns, with its units."""
    import numpy as np
    import pandas as pd

    from benchctl.errors import ConfigurationError

    listing = store.arrays(run_id)
    found = listing[listing["name"] == name] if not listing.empty else listing
    if found.empty:
        names = sorted(set(listing["name"])) if not listing.empty else []
        raise ConfigurationError(f"run {run_id} has no array named {name!r}; its arrays: {', '.join(names) or 'none'}")
    if seq is None and len(found) > 1:
        seqs = ", ".join(str(int(s)) for s in found["point_seq"].dropna())
        raise ConfigurationError(f"run {run_id} has {len(found)} {name!r} arrays; choose one with --seq (points {seqs})")
    data = store.array(run_id, name, seq if seq is not None else (None if found["point_seq"].isna().all()
                                                                   else int(found["point_seq"].iloc[0])))
    columns = {}
    for col, values in data.items():
        values = np.asarray(values)
        if values.ndim != 1:
            continue
        if np.iscomplexobj(values):
            columns[f"{col}_re"], columns[f"{col}_im"] = values.real, values.imag
        else:
            columns[col] = values
    return pd.DataFrame(columns), dict(data.units)


def cmd_export(args: argparse.Namespace) -> int:
    with _open(args.db) as store:
        run_id = store.resolve_run(args.run)
        from benchctl.export_table import export_points, points_csv, provenance_lines

        info = store.run(run_id)
        if args.array:
            frame, units = _array_frame(store, run_id, args.array, args.seq)
            csv_text = "".join(f"# {line}\n" for line in provenance_lines(info)) + frame.to_csv(index=False)
        else:
            raw = store.points(run_id)
            units = {**store.quantity_units(run_id), "efficiency_pct": "%", "loss_w": "W"}
            frame = export_points(raw)
            csv_text = points_csv(raw, info)  # column names carry their units (vin_v, pout_w)
        if args.format == "csv":
            text = csv_text
        else:
            records = json.loads(frame.to_json(orient="records"))
            text = json.dumps({"run_id": run_id, "provenance": provenance_lines(info), "units": units,
                               "points": records}, indent=1)
        if args.out:
            Path(args.out).write_text(text, encoding="utf-8")
            what = f"{len(frame)} rows of array {args.array!r}" if args.array else f"{len(frame)} points"
            console().print(f"wrote {what} of run {run_id} to {args.out}")
        else:
            sys.stdout.write(text)
    return EXIT_OK


def _age(seconds: float) -> str:
    if seconds < 120:
        return f"{seconds:.0f} s"
    if seconds < 7200:
        return f"{seconds / 60:.0f} min"
    return f"{seconds / 3600:.1f} h"


def _lock_holder_of_other_run(holder, run_id: int) -> bool:
    """True when a station lock is held by a run other than ``run_id`` (so ``run_id`` is not running)."""
    other = getattr(holder, "run_id", None)
    return other is not None and int(other) != int(run_id)


def cmd_mark_interrupted(args: argparse.Namespace) -> int:
    """``benchctl mark-interrupted RUN``: the rule is in the command's description (cli.py)."""
    import getpass
    import socket

    from benchctl.commands.stores import existing_store_url
    from benchctl.errors import ConfigurationError, StationBusyError
    from benchctl.locations import default_db
    from benchctl.store import Store

    station = None
    if args.lock_station:
        from benchctl.station import load_station

        station = load_station(args.lock_station)
    url = existing_store_url(args.db or (station.database if station is not None else None) or default_db())
    with Store.open(url) as store:
        run_id = store.resolve_run(args.run)
        live = store.run_liveness(run_id)
        if live.status != RunStatus.RUNNING:
            how = " when the store was just opened (its process on this host is gone)" \
                if run_id in store.recovered_runs else ""
            raise ConfigurationError(f"run {run_id} is {live.status}{how}, not running; nothing to mark. "
                                     + ("Resume it with `benchctl run --resume "
                                        f"{run_id} --station FILE`" if live.status in (RunStatus.INTERRUPTED, RunStatus.TRIPPED) else ""))
        where = f"host {live.host}, pid {live.pid}"
        if live.this_host and live.process_alive:
            raise ConfigurationError(
                f"run {run_id} is running: its process ({where}) is alive on this host. Stop it where it runs "
                f"(Ctrl-C in its terminal, or `kill -TERM {live.pid}`); it then ends as interrupted by itself")
        holder = store.station_lock_holder(live.station_name)
        if holder is not None and not _lock_holder_of_other_run(holder, run_id):
            raise ConfigurationError(
                f"run {run_id} may still be running: the lock of station {live.station_name!r} in {store.url} is held "
                f"(database session {holder.session_pid}, {holder.label or 'no label'}); a live run holds it for its "
                "whole life. Stop that run where it runs, or wait until its session is gone")
        if station is not None:
            from benchctl.station_lock import hold_station

            try:
                hold_station(station, None, what="a check by mark-interrupted").release()
            except StationBusyError as exc:
                if not _lock_holder_of_other_run(exc.holder, run_id):
                    raise ConfigurationError(f"run {run_id} may still be running: {exc}") from exc
        if live.silent_s < args.silent_min * 60:
            raise ConfigurationError(
                f"run {run_id} ({where}) stored its last point or event {_age(live.silent_s)} ago, less than "
                f"--silent-min {args.silent_min:g} min: it may still be running there. If you know its process is "
                "gone, give a shorter --silent-min")
        checked = "alive: no" if live.this_host else f"not checked (host {live.host} is not this host)"
        summary = (f"run {run_id} on station {live.station_name!r} ({where}): still marked running, nothing stored "
                   f"for {_age(live.silent_s)}; its process: {checked}")
        console().print(escape(summary))
        if not args.yes:
            if not sys.stdin.isatty():
                raise ConfigurationError(f"run {run_id} not marked: give --yes to confirm without a terminal")
            answer = input(f"mark run {run_id} interrupted? [y/N] ").strip().lower()
            if answer not in ("y", "yes"):
                console().print("nothing changed")
                return EXIT_FAILED
        try:
            operator = getpass.getuser()
        except (KeyError, OSError):
            operator = ""
        reason = (f"marked by {operator or '?'}@{socket.gethostname()}: no point or event for {_age(live.silent_s)} "
                  f"(rule: at least {args.silent_min:g} min), process {where} "
                  + ("gone" if live.this_host else "on another host, not checked"))
        store.mark_interrupted(run_id, reason=reason, expected_last_activity_utc_s=live.last_activity_utc_s, details={
            "marked_by": "benchctl mark-interrupted", "operator": operator, "marked_on_host": socket.gethostname(),
            "run_host": live.host, "run_pid": live.pid, "silent_s": round(live.silent_s, 3),
            "silent_min_rule": args.silent_min, "process_alive": live.process_alive,
            "confirmed": "--yes" if args.yes else "at the terminal"})
        console().print(f"run {run_id} marked interrupted; resume it with `benchctl run --resume {run_id} "
                        "--station FILE`, or export it")
    return EXIT_OK
