"""Arguments of the database commands (``db``, ``query``, ``export-runs``, ``import-runs``).

Kept apart from :mod:`benchctl.commands.db` so that ``benchctl --help`` imports nothing heavy.
"""

from __future__ import annotations

import argparse
from typing import Any

from benchctl.locations import DEFAULT_DB_ENV

COMMANDS = ("db", "query", "export-runs", "import-runs")

_DB_HELP = (f"database: a SQLite file path or SQLAlchemy URL such as postgresql+psycopg://user:pw@host/db "
            f"(default: the station file's station.database, ${DEFAULT_DB_ENV}, ./benchctl-data/benchctl.db)")


def _add_db(p: argparse.ArgumentParser, help_text: str = _DB_HELP) -> None:
    p.add_argument("--db", default=None, metavar="URL", help=help_text)
    p.add_argument("--station", dest="db_station", default=None, metavar="FILE",
                   help="take the database from this station file's station.database")


def add_db_arguments(subparsers: Any) -> None:
    """Add the ``db``, ``query``, ``export-runs`` and ``import-runs`` commands."""
    p = subparsers.add_parser("db", help="the database's schema: show its version, upgrade it")
    db_sub = p.add_subparsers(dest="db_command", metavar="ACTION", required=True)
    q = db_sub.add_parser("version", help="show the schema version of a database and whether it needs upgrading")
    _add_db(q)
    q.add_argument("--json", action="store_true")
    q = db_sub.add_parser("upgrade", help="upgrade a database to this benchctl's schema (creates an empty one)")
    _add_db(q)
    q.add_argument("--json", action="store_true")

    p = subparsers.add_parser("query", help="queries across runs and stations")
    query_sub = p.add_subparsers(dest="query_command", metavar="QUERY", required=True)
    q = query_sub.add_parser("part", help="every run of a DUT part number, on any station, oldest first")
    q.add_argument("part", help="DUT part number")
    q.add_argument("--revision", default=None, help="only this DUT revision")
    q.add_argument("--procedure", default=None, help="only runs of this procedure")
    q.add_argument("--status", default=None, help="only runs with this status")
    _add_db(q)
    q.add_argument("--json", action="store_true")
    q = query_sub.add_parser("efficiency", help="efficiency of a DUT part at one operating point, per revision")
    q.add_argument("part", help="DUT part number")
    q.add_argument("--vin", dest="vin_v", type=float, required=True, metavar="V", help="input voltage setpoint, V")
    q.add_argument("--iout", dest="iout_a", type=float, required=True, metavar="A", help="output current setpoint, A")
    q.add_argument("--vin-tol", dest="vin_tol_v", type=float, default=1e-6, metavar="V", help="match within (default 1e-6 V)")
    q.add_argument("--iout-tol", dest="iout_tol_a", type=float, default=1e-6, metavar="A", help="match within (default 1e-6 A)")
    q.add_argument("--any-status", action="store_true", help="count runs of any status, not only completed ones")
    q.add_argument("--points", action="store_true", help="list every matching point instead of one row per revision")
    _add_db(q)
    q.add_argument("--json", action="store_true")

    p = subparsers.add_parser("export-runs", help="copy runs of a database into a SQLite file (to move them)")
    p.add_argument("runs", nargs="*", metavar="RUN", help="run ids or 'latest' (default: every run that has ended)")
    p.add_argument("--out", required=True, metavar="FILE", help="SQLite file to copy into (created if missing)")
    _add_db(p, help_text="database to copy from (default as for other commands)")
    p.add_argument("--include-running", action="store_true", help="also copy runs still marked running")
    p.add_argument("--json", action="store_true")

    p = subparsers.add_parser("import-runs", help="copy runs of a station's file into this database, idempotently")
    p.add_argument("source", metavar="SOURCE", help="station's SQLite file, an exported file, or a database URL")
    p.add_argument("runs", nargs="*", metavar="RUN", help="run ids of SOURCE or 'latest' (default: every run that has ended)")
    _add_db(p, help_text="database to copy into, e.g. the shared postgresql+psycopg://... (default as for other commands)")
    p.add_argument("--include-running", action="store_true", help="also copy runs still marked running")
    p.add_argument("--json", action="store_true")
