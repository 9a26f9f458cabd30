"""The ``benchctl`` command: argument parsing and dispatch.

This module imports nothing heavy (no pandas, numpy, scipy, matplotlib, pyvisa, rich)
so that ``benchctl --help`` starts fast; each command's module is imported when run.
Exit codes: 0 success; 1 a run that did not complete or a check that failed; 2 bad
input (files, parameters, options) — nothing was enabled; 3 an instrument or database
problem; 4 a run that could not be checked against its limits; 130 interrupted.
"""

from __future__ import annotations

import argparse
from typing import Any
import sys

from benchctl.exit_codes import (  # noqa: F401  (re-exported while commands move to benchctl.exit_codes)
    EXIT_BAD_INPUT,
    EXIT_FAILED,
    EXIT_INSTRUMENT,
    EXIT_INTERRUPTED,
    EXIT_NOT_CHECKED,
    EXIT_OK,
    exit_code_for_error,
)
from benchctl.safety import CAUTION

from benchctl.locations import DEFAULT_DB_ENV, default_db  # noqa: F401  (re-exported)


def _add_db(p: argparse.ArgumentParser) -> None:
    p.add_argument("--db", default=None, metavar="URL",
                   help=f"database: a SQLite file path or SQLAlchemy URL (default ${DEFAULT_DB_ENV}, else "
                        "benchctl.db in the nearest benchctl-data folder here or above, else ./benchctl-data)")


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="benchctl",
        description="Bench automation and measurement logging for switching power converters: "
                    "run procedures on a station (real or simulated), log every point with provenance, "
                    "analyse and report.",
        epilog=CAUTION,
    )
    parser.add_argument("--version", action="store_true", help="print the version and exit")
    parser.add_argument("-v", "--verbose", action="count", default=0, help="log more (-vv: every SCPI exchange)")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")

    _add_bench_commands(sub)
    _add_review_commands(sub)
    _add_demo_command(sub)
    _add_data_commands(sub)
    _add_analysis_and_db_commands(sub)
    _add_report_commands(sub)
    return parser


def _add_bench_commands(sub: Any) -> None:
    """Sim, instruments, run, job: driving a station."""
    p = sub.add_parser("sim", help="serve a simulated bench (converter model + SCPI instruments) on 127.0.0.1")
    p.add_argument("--model", default="flyback-48v-5v", help="converter model (see --list-models)")
    p.add_argument("--list-models", action="store_true", help="list the converter models and exit")
    p.add_argument("--station-out", metavar="FILE", default=None,
                   help="where to write the station file (default ./benchctl-data/sim-<model>.toml)")
    p.add_argument("--time-scale", type=float, default=1.0, help="model seconds per real second (default 1)")
    p.add_argument("--seed", type=int, default=1, help="seed of the measurement noise")
    p.add_argument("--base-port", type=int, default=0, help="first TCP port (default: free ports)")
    p.add_argument("--thermal-drift", action="store_true",
                   help="let the parts warm with their loss (minutes of model time), so losses creep up")
    p.add_argument("--thermal", action="store_true",
                   help="put the DUT in a thermal chamber (role chamber) with a temperature meter (role temp_meter); "
                        "turns thermal drift on")
    p.add_argument("--dut-protection", action="store_true",
                   help="give the DUT hiccup over-current and latching over-voltage protection (for the "
                        "over_current, short_circuit and over_voltage procedures)")
    p.add_argument("--reading-time", type=float, default=None, metavar="S",
                   help="aperture of every meter, source and load reading in seconds (default 0.02, "
                        "one 50 Hz line cycle)")
    p.add_argument("--fault", action="append", default=[], metavar="SPEC",
                   help="inject a fault for a dry run (repeatable): KIND[@ROLE][:after=N|on=TEXT|at=T|random=SEED"
                        "][,for=S], e.g. drop@source:after=40,for=0 or feedback_open:at=3.5; kinds: unresponsive, "
                        "drop, garble, scpi_error, reset, feedback_open, output_short, overheat, input_sag; "
                        "after=N counts the instrument's messages, at=T the model clock in model seconds from "
                        "the moment `benchctl sim` started (not from a run's start; --time-scale speeds it up)")
    p.add_argument("--quirk", action="append", default=[], metavar="ROLE:QUIRK[,QUIRK]",
                   help="make an instrument depart from textbook SCPI (repeatable), e.g. source:crlf,opc_plus_one "
                        "or scope:slow:0.5; quirks: crlf, opc_plus_one, no_syst_err, no_compound, slow[:S]")
    p.add_argument("--hislip", nargs="?", const="all", default=None, metavar="ROLE[,ROLE]",
                   help="serve the instruments over HiSLIP (TCPIP::127.0.0.1::hislip0,PORT::INSTR) instead of raw "
                        "sockets: all of them, or only these roles")

    p = sub.add_parser("probe", help="find out how an unknown instrument speaks and propose its station-file table")
    p.add_argument("resource", help="VISA resource string, e.g. TCPIP::192.0.2.7::5025::SOCKET")
    p.add_argument("--visa-library", default=None, metavar="LIB",
                   help="VISA library: @py (pyvisa-py, the default), a vendor library's name or path")
    p.add_argument("--timeout-s", type=float, default=2.0, metavar="S",
                   help="how long to wait for each answer while probing (default 2 s)")
    p.add_argument("--role", default="instrument", metavar="NAME", help="role name of the proposed table")
    p.add_argument("--driver", default=None, metavar="NAME",
                   help="driver name to put in the proposed table (e.g. dc_source); left for you to fill otherwise")
    p.add_argument("--allow-reset", action="store_true",
                   help="also try *RST (it returns the instrument to its reset state: outputs may switch)")
    p.add_argument("--json", action="store_true", help="print the findings and the proposal as JSON")
    p.add_argument("--out", metavar="FILE", default=None, help="also write the station-file fragment here")

    p = sub.add_parser("instruments", help="connect to every instrument of a station and identify it")
    p.add_argument("--station", required=True, metavar="FILE", help="station file (TOML)")
    p.add_argument("--json", action="store_true", help="print JSON instead of a table")

    p = sub.add_parser("run", help="run a procedure on a station")
    p.add_argument("procedure", nargs="?", default=None,
                   help="bundled procedure name (see `benchctl procedures`) or a .py path (not with --resume)")
    p.add_argument("--station", required=True, metavar="FILE", help="station file (TOML)")
    p.add_argument("--resume", metavar="RUN", default=None,
                   help="continue an interrupted or tripped run from its last committed point, into the same run "
                        "(its parameters and DUT stay as recorded; the station must be the one it began on)")
    p.add_argument("--accept-station-change", action="store_true",
                   help="with --resume: go on although the station (limits, watch period, instruments) differs from "
                        "the run's record; the change is stored with the run")
    p.add_argument("--list", action="store_true",
                   help="list the planned operating points and the estimated duration; touch no instrument")
    p.add_argument("--limits", metavar="FILE", default=None, help="check the run against these spec limits at the end")
    p.add_argument("--junit", metavar="FILE.xml", default=None, help="with --limits: also write JUnit XML")
    _add_db(p)
    p.add_argument("--set", dest="sets", action="append", default=[], metavar="NAME=VALUE",
                   help="override a parameter (repeatable), e.g. --set vin_v=36,48,75")
    p.add_argument("--params", metavar="FILE", help="TOML file of parameter values")
    p.add_argument("--dut-part", default="", help="DUT part number")
    p.add_argument("--dut-rev", default="", help="DUT revision")
    p.add_argument("--dut-serial", default="", help="DUT serial number")
    p.add_argument("--operator", default=None,
                   help="operator name (default: the login name); with --resume, who resumed it (stored in the "
                        "run's gap event; the run keeps the operator it began with)")
    p.add_argument("--no-settle", action="store_true", help="skip settling waits (dry runs, benchmarks)")
    p.add_argument("--json", action="store_true", help="print the outcome as JSON")

    p = sub.add_parser("job", help="run a job file: several procedures in order, one exit code (nightly)")
    p.add_argument("job", help="job file (TOML)")
    p.add_argument("--station", required=True, metavar="FILE", help="station file (TOML)")
    _add_db(p)
    p.add_argument("--junit-dir", metavar="DIR", default=None, help="write one JUnit XML per checked step here")
    p.add_argument("--junit", metavar="FILE.xml", default=None,
                   help="write one JUnit XML for the whole job: a test suite per unit and step")
    p.add_argument("--dut-serial", default="", metavar="A,B,C",
                   help="run every step on each of these units in turn (instead of the job file's serials)")
    p.add_argument("--dut-part", default="", help="DUT part number (instead of the job file's)")
    p.add_argument("--dut-rev", default="", help="DUT revision (instead of the job file's)")
    p.add_argument("--unit-change", choices=("fixed", "operator"), default=None,
                   help="how the next unit gets connected: operator (the job asks for it, outputs off) or fixed "
                        "(no change: a simulated bench, or a fixture changed outside benchctl); default: the job "
                        "file's unit_change, else operator at a terminal when there are several units")
    p.add_argument("--list", action="store_true", help="list every planned point and the estimated duration only")
    p.add_argument("--no-settle", action="store_true", help="skip settling waits (dry runs)")
    p.add_argument("--operator", default=None, help="operator name (default: the login name)")


def _add_review_commands(sub: Any) -> None:
    """Compare, compare-revisions, stats, revision, serve: reviewing results."""
    p = sub.add_parser("compare", help="compare two runs of the same procedure point by point")
    p.add_argument("run_a", help="run id (the reference) or 'latest'")
    p.add_argument("run_b", help="run id (the new one) or 'latest'")
    _add_db(p)
    p.add_argument("--setpoint-rel-tol", type=float, default=0.01,
                   help="setpoints match when within this relative difference (default 0.01)")
    p.add_argument("--tolerance", action="append", default=[], metavar="QUANTITY=DELTA",
                   help="flag a change beyond DELTA (in the quantity's unit), e.g. --tolerance efficiency=0.003")
    p.add_argument("--report", metavar="DIR", default=None, help="also write a side-by-side report here")
    p.add_argument("--json", action="store_true")

    p = sub.add_parser("compare-revisions",
                       help="compare two revisions of a part: the change of each figure's mean over their units")
    p.add_argument("part", help="DUT part number")
    p.add_argument("revision_a", help="the reference revision")
    p.add_argument("revision_b", help="the new revision")
    _add_db(p)
    p.add_argument("--tolerance", action="append", default=[], metavar="QUANTITY=DELTA",
                   help="flag a change beyond DELTA (in the quantity's unit), e.g. --tolerance efficiency=0.003")
    p.add_argument("--report", metavar="DIR", default=None, help="also write the difference plots and a page here")
    p.add_argument("--json", action="store_true")

    p = sub.add_parser("stats", help="spread and capability (Cp/Cpk, Pp/Ppk) across a revision's units, per limit "
                                     "and operating point")
    p.add_argument("part", help="DUT part number")
    p.add_argument("revision", help="DUT revision")
    p.add_argument("--limits", action="append", default=[], metavar="FILE",
                   help="spec limits file (repeatable): its limits choose the quantities, points and bounds")
    p.add_argument("--quantity", action="append", default=[], metavar="NAME",
                   help="also summarise this result name, without bounds (repeatable)")
    p.add_argument("--per-serial", action="store_true", help="also list each unit's value, z-score and outlier flag")
    _add_db(p)
    p.add_argument("--json", action="store_true")

    p = sub.add_parser("revision", help="write a revision's one-page summary (HTML + PNGs) from the latest completed "
                                        "run of each procedure on each unit")
    p.add_argument("part", help="DUT part number")
    p.add_argument("revision", help="DUT revision")
    p.add_argument("--limits", action="append", default=[], metavar="FILE",
                   help="spec limits file (repeatable): verdicts and capability; without it the checks stored "
                        "with the runs are shown")
    p.add_argument("--against", metavar="REVISION", default=None,
                   help="add the change from this earlier revision (difference plots with the tolerance band)")
    p.add_argument("--out", metavar="DIR", default=None,
                   help="directory for revision.html and its PNGs (default ./benchctl-data/revision-<part>-<rev>/)")
    _add_db(p)

    p = sub.add_parser("serve", help="the read-only lab web view of a store (stations, runs, live progress, "
                                     "revision summaries, trends, nightly jobs)")
    _add_db(p)
    p.add_argument("--host", default="127.0.0.1",
                   help="address to bind (default 127.0.0.1; any other needs an access token)")
    p.add_argument("--port", type=int, default=8470, help="TCP port (default 8470; 0: a free one)")
    p.add_argument("--token-file", metavar="FILE", default=None,
                   help="file holding the access token (else $BENCHCTL_WEB_TOKEN); required off loopback")
    p.add_argument("--limits", action="append", default=[], metavar="FILE",
                   help="limits files for the revision pages' verdicts and capability (repeatable)")


def _add_demo_command(sub: Any) -> None:
    """Demo: the main job on a simulated bench."""
    p = sub.add_parser("demo", help="run the efficiency map on a simulated bench started in-process")
    p.add_argument("--model", default="flyback-48v-5v", help="converter model")
    _add_db(p)
    p.add_argument("--time-scale", type=float, default=20.0, help="model seconds per real second (default 20)")
    p.add_argument("--seed", type=int, default=1, help="seed of the measurement noise")

    sub.add_parser("procedures", help="list the bundled procedures and their parameters")


def _add_data_commands(sub: Any) -> None:
    """Runs, mark-interrupted, show, export: reading the store."""
    p = sub.add_parser("runs", help="list stored runs")
    _add_db(p)
    p.add_argument("--status", default=None, help="only runs with this status")
    p.add_argument("--procedure", default=None, help="only runs of this procedure")
    p.add_argument("--station", dest="station_name", default=None, help="only runs on this station")
    p.add_argument("--limit", type=int, default=50, help="at most this many (newest first)")
    p.add_argument("--json", action="store_true")

    p = sub.add_parser("mark-interrupted",
                       help="mark a run left 'running' by a process that is gone (another host, a renamed machine, "
                            "a removed container) as interrupted, so it can be resumed or exported",
                       description="Marks a run interrupted when all of these hold: it is not a live process of this "
                                   "host; nothing of it (no point, no event) was stored for --silent-min minutes; on "
                                   "a shared PostgreSQL database its station's lock is not held (and, with --station, "
                                   "its lock file is not held). Asks for a confirmation unless --yes; stores an event.")
    p.add_argument("run", help="run id or 'latest'")
    _add_db(p)
    p.add_argument("--station", dest="lock_station", default=None, metavar="FILE",
                   help="the run's station file: its lock file is checked too, and its station.database used")
    p.add_argument("--silent-min", type=float, default=10.0, metavar="MINUTES",
                   help="how long the run must have stored nothing (default 10 minutes)")
    p.add_argument("--yes", action="store_true", help="do not ask for a confirmation (scripts)")

    p = sub.add_parser("show", help="show one run: provenance, events, results")
    p.add_argument("run", help="run id or 'latest'")
    _add_db(p)
    p.add_argument("--json", action="store_true")

    p = sub.add_parser("export", help="export a run's points")
    p.add_argument("run", help="run id or 'latest'")
    _add_db(p)
    p.add_argument("--format", choices=("csv", "json"), default="csv")
    p.add_argument("--out", metavar="FILE", default=None, help="write here instead of standard output")
    p.add_argument("--array", metavar="NAME", default=None,
                   help="export an array record instead of the points (e.g. bode, waveform); "
                        "a Bode CSV feeds `benchctl analyze loop-gain`")
    p.add_argument("--seq", type=int, default=None, metavar="N", help="with --array: the point it belongs to")


def _add_analysis_and_db_commands(sub: Any) -> None:
    """Analyze (files a user brings) and the database commands."""
    from benchctl.commands.analyze import add_analyze_arguments  # light: argparse only

    add_analyze_arguments(sub)
    from benchctl.commands.db_arguments import add_db_arguments  # light: argparse only

    add_db_arguments(sub)


def _add_report_commands(sub: Any) -> None:
    """Report, check: the run report and spec limits."""
    p = sub.add_parser("report", help="write a run's HTML report with its PNG plots")
    p.add_argument("run", help="run id or 'latest'")
    p.add_argument("--out", metavar="DIR", default=None,
                   help="directory for report.html and the PNG files (default ./benchctl-data/report-run<id>/)")
    _add_db(p)

    p = sub.add_parser("check", help="check a run against spec limits (pass/fail, JUnit XML)")
    p.add_argument("run", help="run id or 'latest'")
    p.add_argument("--limits", required=True, metavar="FILE", help="spec limits file (TOML)")
    p.add_argument("--junit", default=None, metavar="FILE.xml", help="also write JUnit XML here")
    _add_db(p)
    p.add_argument("--json", action="store_true", help="print the report as JSON instead of a table")


def _configure_logging(verbose: int) -> None:
    import logging

    level = logging.WARNING if verbose == 0 else logging.INFO if verbose == 1 else logging.DEBUG
    logging.basicConfig(level=level, format="%(asctime)s %(levelname)s %(name)s: %(message)s")


def main(argv: list[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    if args.version:
        from benchctl import __version__

        print(f"benchctl {__version__}")
        return EXIT_OK
    if not args.command:
        parser.print_help()
        return EXIT_OK
    _configure_logging(args.verbose)
    from benchctl import commands

    try:
        return commands.dispatch(args)
    except KeyboardInterrupt as exc:
        print("interrupted", file=sys.stderr)
        return exit_code_for_error(exc)


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
