"""``benchctl compare RUN_A RUN_B``: what changed between two runs, point by point."""

from __future__ import annotations

import argparse
import json

from rich.table import Table

from benchctl.cli import EXIT_OK
from benchctl.commands.console import console
from benchctl.commands.stores import open_existing_store as _open
from benchctl.errors import ConfigurationError


def _parse_tolerances(items: list[str]) -> dict[str, float]:
    out = {}
    for item in items:
        name, sep, value = item.partition("=")
        try:
            out[name.strip()] = float(value)
        except ValueError:
            raise ConfigurationError(f"--tolerance {item!r}: write QUANTITY=DELTA, e.g. efficiency=0.003") from None
        if not sep or not name.strip():
            raise ConfigurationError(f"--tolerance {item!r}: write QUANTITY=DELTA, e.g. efficiency=0.003")
    return out


def cmd_compare(args: argparse.Namespace) -> int:
    from benchctl.compare import compare_points

    tolerances = _parse_tolerances(args.tolerance)
    with _open(args.db) as store:
        a, b = store.resolve_run(args.run_a), store.resolve_run(args.run_b)
        info_a, info_b = store.run(a), store.run(b)
        if info_a.procedure != info_b.procedure:
            raise ConfigurationError(f"run {a} is {info_a.procedure} and run {b} is {info_b.procedure}; "
                                     "compare runs of the same procedure")
        points_a, points_b = store.points(a), store.points(b)
        comparison = compare_points(points_a, points_b, run_a=a, run_b=b, rel_tol=args.setpoint_rel_tol,
                                    tolerances=tolerances, results_a=store.results(a), results_b=store.results(b))
        if args.report:
            from benchctl.report import build_comparison_report

            files = build_comparison_report(store, a, b, args.report)
            console().print(f"side-by-side report: {files.html_path}")
    if args.json:
        frame = comparison.frame()
        print(json.dumps({"run_a": a, "run_b": b, "matched_points": comparison.matched_points,
                          "only_in_a": comparison.only_in_a, "only_in_b": comparison.only_in_b,
                          "flagged": int(frame["flagged"].sum()) if not frame.empty else 0,
                          "deltas": json.loads(frame.to_json(orient="records"))}, indent=1))
        return EXIT_OK
    out = console()
    out.print(f"run {a} ({info_a.dut_part} rev {info_a.dut_revision or '—'} s/n {info_a.dut_serial or '—'}) → "
              f"run {b} ({info_b.dut_part} rev {info_b.dut_revision or '—'} s/n {info_b.dut_serial or '—'}): "
              f"{comparison.matched_points} matched operating points, {comparison.only_in_a} only in {a}, "
              f"{comparison.only_in_b} only in {b}")
    from benchctl.commands.summary import _scope_text

    per_quantity: dict[str, list] = {}
    for d in comparison.deltas:
        per_quantity.setdefault(d.quantity, []).append(d)
    table = Table(title="changes B − A by quantity")
    for col in ("quantity", "matched", "largest change", "where", "tolerance", "beyond"):
        table.add_column(col, justify="left" if col in ("quantity", "where") else "right")
    for q, ds in per_quantity.items():
        worst = max(ds, key=lambda d: abs(d.delta))
        n_flag = sum(d.flagged for d in ds)
        table.add_row(q, str(len(ds)), f"{worst.delta:+.4g}", _scope_text(worst.where), f"{worst.tolerance:.3g}",
                      f"[red]{n_flag}[/]" if n_flag else "0")
    out.print(table)
    flagged = comparison.flagged
    if flagged:
        detail = Table(title=f"changes beyond tolerance ({len(flagged)}, largest first)")
        for col in ("quantity", "where", "A", "B", "B − A"):
            detail.add_column(col, justify="left" if col in ("quantity", "where") else "right")
        for d in sorted(flagged, key=lambda d: -abs(d.delta) / d.tolerance)[:20]:
            detail.add_row(d.quantity, _scope_text(d.where), f"{d.value_a:.5g}", f"{d.value_b:.5g}",
                           f"[red]{d.delta:+.4g}[/]")
        out.print(detail)
    out.print(f"{len(flagged)} change(s) beyond tolerance")
    return EXIT_OK
