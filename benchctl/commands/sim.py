"""``benchctl sim``: serve a simulated bench until interrupted."""

from __future__ import annotations

import argparse
import threading
from pathlib import Path

from rich.markup import escape
from rich.table import Table

from benchctl.exit_codes import EXIT_BAD_INPUT, EXIT_OK
from benchctl.commands.console import console, error_console, print_caution


def default_station_path(model: str) -> Path:
    from benchctl.locations import data_dir

    return data_dir() / f"sim-{model}.toml"


def cmd_sim(args: argparse.Namespace) -> int:
    from benchctl.simulated_instruments.bench import SimulatedBench
    from benchctl.simulated_instruments.converter import DESIGNS

    out = console()
    if args.list_models:
        table = Table(title="converter models")
        for col in ("name", "description", "input (V)", "output", "fsw"):
            table.add_column(col)
        for name, d in sorted(DESIGNS.items()):
            table.add_row(name, d.description, f"{d.vin_min_v:g}–{d.vin_max_v:g} (nom {d.vin_nom_v:g})",
                          f"{d.vout_nom_v:g} V / {d.iout_rated_a:g} A", f"{d.fsw_hz / 1e3:g} kHz")
        out.print(table)
        return EXIT_OK
    if args.model not in DESIGNS:
        error_console().print(f"[bold red]error:[/] unknown model {args.model!r}; models: {', '.join(sorted(DESIGNS))}")
        return EXIT_BAD_INPUT
    if not args.time_scale > 0:
        error_console().print("[bold red]error:[/] --time-scale must be positive")
        return EXIT_BAD_INPUT
    reading_time = getattr(args, "reading_time", None)
    if reading_time is not None and not 1e-5 <= reading_time <= 10.0:
        error_console().print(f"[bold red]error:[/] --reading-time {reading_time!r} s is outside 1e-05 … 10 s; "
                              "give the aperture of a reading in seconds, e.g. 0.02")
        return EXIT_BAD_INPUT
    from benchctl.simulated_instruments.faults import FaultSpecError, apply_fault_specs, parse_fault_spec

    try:
        specs = [parse_fault_spec(text) for text in args.fault]
    except FaultSpecError as exc:
        error_console().print(f"[bold red]error:[/] --fault: {escape(str(exc))}", soft_wrap=True)
        return EXIT_BAD_INPUT
    from benchctl.simulated_instruments.bench import ROLE_DRIVERS
    from benchctl.simulated_instruments.scpi.quirks import QuirkError, parse_quirk_spec

    quirks: dict = {}
    try:
        for text in getattr(args, "quirk", []):
            role, found = parse_quirk_spec(text)
            if role not in ROLE_DRIVERS:
                raise QuirkError(f"--quirk {text!r}: no role {role!r}; roles: {', '.join(ROLE_DRIVERS)}")
            quirks[role] = found
    except QuirkError as exc:
        error_console().print(f"[bold red]error:[/] {escape(str(exc))}", soft_wrap=True)
        return EXIT_BAD_INPUT
    duts = getattr(args, "duts", 1)
    coupling = getattr(args, "coupling", 1.0)
    if not 1 <= duts <= 16 or not 0.0 < coupling <= 100.0:
        error_console().print(f"[bold red]error:[/] --duts {duts} must be 1 … 16 and --coupling {coupling:g} V/V "
                              "within 0 … 100")
        return EXIT_BAD_INPUT
    hislip = getattr(args, "hislip", None)
    protocol: str | dict[str, str] = "socket"
    if hislip == "all":
        protocol = "hislip"
    elif hislip:
        roles = [r.strip() for r in hislip.split(",") if r.strip()]
        unknown = [r for r in roles if r not in ROLE_DRIVERS]
        if unknown or not roles:
            error_console().print(f"[bold red]error:[/] --hislip {hislip!r}: no role {', '.join(unknown) or '(none)'}; "
                                  f"roles: {', '.join(ROLE_DRIVERS)}", soft_wrap=True)
            return EXIT_BAD_INPUT
        protocol = {r: "hislip" for r in roles}
    bench = SimulatedBench(args.model, time_scale=args.time_scale, seed=args.seed, base_port=args.base_port,
                           thermal_drift=True if getattr(args, "thermal_drift", False) else None,
                           reading_time_s=reading_time, protocol=protocol, quirks=quirks,
                           thermal=getattr(args, "thermal", False), generator=getattr(args, "generator", False),
                           coupling_v_per_v=getattr(args, "coupling", 1.0), duts=getattr(args, "duts", 1),
                           dut_protection=getattr(args, "dut_protection", False))
    bench.start()
    if specs:
        apply_fault_specs(bench, specs)
    try:
        path = bench.write_station(args.station_out or default_station_path(args.model))
        table = Table(title=f"simulated bench: {bench.design.description}")
        table.add_column("role", no_wrap=True)
        table.add_column("VISA resource", no_wrap=True)
        table.add_column("identity", overflow="fold")
        for role, inst in bench.instruments.items():
            ident = inst.identity
            table.add_row(role, bench.resources[role], f"{ident.maker},{ident.model},{ident.serial},{ident.firmware}")
        out.print(table)
        out.print("servers listen on 127.0.0.1 only (loopback); nothing is reachable from the network")
        drift = "on" if bench.model.thermal_drift else "off (--thermal-drift turns it on)"
        out.print(f"readings integrate {bench.reading_time_s * 1e3:g} ms each; thermal drift {drift}; "
                  f"time scale {args.time_scale:g}")
        out.print(f"station file written to [bold]{path}[/]")
        out.print(f"try:  benchctl instruments --station {path}")
        if bench.hazardous:
            print_caution("This simulated converter's input range goes above 60 V DC, as the real one would.")
        if getattr(args, "dut_protection", False):
            out.print("[bold yellow]CAUTION:[/] the simulated DUT has hiccup over-current and latching over-voltage "
                      "protection; the protection procedures push a DUT past normal operation on purpose (on a "
                      "real bench: follow local codes and licensed practice)")
        for spec in args.fault:
            out.print(f"fault armed: {escape(spec)}")
        for role, found in quirks.items():
            out.print(f"quirks of {role}: {escape(', '.join(found.names()))} (try: benchctl probe {bench.resources[role]})")
        out.print("serving until Ctrl-C ...")
        threading.Event().wait()
    except KeyboardInterrupt:
        out.print("stopping the simulated bench")
    finally:
        bench.stop()
    return EXIT_OK
