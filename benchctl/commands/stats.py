"""``benchctl stats PART REVISION --limits FILE``: spread and capability across a revision's units.

One row per limit and operating point: n units, mean, standard deviation, min and max with
their serials, Cp/Cpk and Pp/Ppk against the limit (ISO 22514-2, see
:mod:`benchctl.analysis.capability`), and the serial Grubbs' test flags as an outlier.
``--per-serial`` lists every unit's value with its z-score; ``--json`` prints both tables.
"""

from __future__ import annotations

import argparse
import json
import math
from typing import Any

from benchctl.exit_codes import EXIT_OK
from benchctl.commands.console import Column, console, fitted_table, print_fitted
from benchctl.commands.stores import open_existing_store


def _num(value: Any, digits: int = 4) -> str:
    if value is None or (isinstance(value, float) and not math.isfinite(value)):
        return "—"
    return f"{value:.{digits}g}"


def _records(frame: Any) -> list[dict[str, Any]]:
    return json.loads(frame.to_json(orient="records", double_precision=15, default_handler=str))


def cmd_stats(args: argparse.Namespace) -> int:
    from benchctl.unit_statistics import revision_statistics

    with open_existing_store(args.db) as store:
        stats = revision_statistics(store, args.part, args.revision, limits=args.limits or (),
                                    quantities=args.quantity or ())
    if args.json:
        print(json.dumps({"part": args.part, "revision": args.revision, "serials": list(stats.runs.serials),
                          "runs": [int(r) for r in stats.runs.latest["run_id"]],
                          "missing": [m.text for m in stats.runs.missing],
                          "statistics": _records(stats.table), "per_serial": _records(stats.per_serial)}, indent=1))
        return EXIT_OK
    out = console()
    serials = ", ".join(stats.runs.serials) or "none"
    out.print(f"{args.part} rev {args.revision}: {len(stats.runs.serials)} unit(s) ({serials}), "
              f"{len(stats.runs.latest)} run(s) used (the latest completed run of each procedure on each unit)",
              markup=False)
    if stats.table.empty:
        out.print("no value to summarise: give --limits FILE (its limits choose the quantities and bounds) or "
                  "--quantity NAME, and check the part and revision", markup=False)
    else:
        cols = [Column("limit"), Column("point"), Column("n", justify="right"), Column("mean", justify="right"),
                Column("sd", justify="right", keep=1), Column("min (serial)", justify="right", keep=3),
                Column("max (serial)", justify="right", keep=3), Column("Cp", justify="right", keep=2),
                Column("Cpk", justify="right"), Column("Pp", justify="right", keep=2),
                Column("Ppk", justify="right"), Column("outlier", keep=1)]
        rows = [(r.limit or r.quantity, r.point, str(r.n), _num(r.mean, 6), _num(r.sd, 3),
                 f"{_num(r.min, 6)} ({r.min_serial})", f"{_num(r.max, 6)} ({r.max_serial})", _num(r.cp, 3),
                 _num(r.cpk, 3), _num(r.pp, 3), _num(r.ppk, 3), r.outlier_serial or "")
                for r in stats.table.itertuples(index=False)]

        def style(i: int, text: str) -> str:
            if i == 11 and text:
                return f"[bold red]{text}[/]"
            if i in (8, 10) and text not in ("—", ""):
                try:
                    return f"[red]{text}[/]" if float(text) < 1.33 else text
                except ValueError:
                    return text
            return text

        table, hidden = fitted_table("spread across units", cols, rows, style=style)
        notes = sorted({n for n in stats.table["note"] if n})
        normality = sorted({n for n in stats.table["normality_note"] if n})[:3]
        print_fitted(table, hidden, [f"note: {n}" for n in notes[:6]] + [f"normality: {n}" for n in normality]
                     + ["Cp/Cpk use the moving-range sigma between successive units, Pp/Ppk the overall s "
                        "(ISO 22514-2); red below 1.33 (a common minimum, common practice)."])
    if args.per_serial and not stats.per_serial.empty:
        cols = [Column("limit"), Column("point"), Column("serial"), Column("value", justify="right"),
                Column("U (k=2)", justify="right", keep=1), Column("z", justify="right"), Column("outlier"),
                Column("flags", keep=2)]
        rows = [(r.limit or r.quantity, r.point, r.serial, _num(r.value, 6), _num(r.expanded_uncertainty, 2),
                 _num(r.z, 3), "OUTLIER" if r.outlier else "", ", ".join(r.flags))
                for r in stats.per_serial.itertuples(index=False)]
        table, hidden = fitted_table("per serial", cols, rows)
        print_fitted(table, hidden)
    for m in stats.runs.missing:
        out.print(f"missing: {m.text}", markup=False, style="yellow")
    return EXIT_OK


__all__ = ["cmd_stats"]
