"""``benchctl compare RUN_A RUN_B``: what changed between two runs, point by point."""

from __future__ import annotations

import argparse
import json

from rich.markup import escape
from rich.table import Table

from benchctl.exit_codes import EXIT_OK
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


def _print_changes(comparison, title: str = "changes B − A by quantity") -> None:
    """The table of changes by quantity; the tolerance column is the one applied to every delta."""
    from benchctl.commands.summary import _scope_text

    per_quantity: dict[str, list] = {}
    for d in comparison.deltas:
        per_quantity.setdefault(d.quantity, []).append(d)
    table = Table(title=title)
    for col in ("quantity", "matched", "largest change", "where", "tolerance applied", "beyond"):
        table.add_column(col, justify="left" if col in ("quantity", "where", "tolerance applied") else "right")
    for q, ds in per_quantity.items():
        worst = max(ds, key=lambda d: abs(d.delta))
        n_flag = sum(d.flagged for d in ds)
        tol = comparison.tolerances.get(q)
        table.add_row(escape(q), str(len(ds)), f"{worst.delta:+.4g}", escape(_scope_text(worst.where)),
                      escape(tol.rule if tol else f"{worst.tolerance:.3g}"), f"[red]{n_flag}[/]" if n_flag else "0")
    console().print(table)


def cmd_compare_revisions(args: argparse.Namespace) -> int:
    """``benchctl compare-revisions PART A B``: the change of each figure's mean over the units."""
    from benchctl.compare import compare_revisions

    tolerances = _parse_tolerances(args.tolerance)
    with _open(args.db) as store:
        rc = compare_revisions(store, args.part, args.revision_a, args.revision_b, tolerances=tolerances)
        url = store.url
    if not rc.units_a or not rc.units_b:
        missing = [r for r, u in ((args.revision_a, rc.units_a), (args.revision_b, rc.units_b)) if not u]
        raise ConfigurationError(f"{args.part}: no completed run of revision {' or '.join(missing)} in {url}; "
                                 f"list the runs with `benchctl query part {args.part}`")
    if args.json:
        print(json.dumps({"part": rc.part, "revision_a": rc.revision_a, "revision_b": rc.revision_b,
                          "units_a": list(rc.units_a), "units_b": list(rc.units_b),
                          "procedures": {p: {"matched_points": c.matched_points,
                                             "tolerances": {q: {"value": t.value, "source": t.source, "rule": t.rule}
                                                            for q, t in c.tolerances.items()},
                                             "deltas": json.loads(c.frame().to_json(orient="records"))}
                                         for p, c in rc.by_procedure.items()}}, indent=1))
    else:
        console().print(f"{escape(rc.part)} rev {escape(rc.revision_b)} ({len(rc.units_b)} unit(s)) against rev "
                        f"{escape(rc.revision_a)} ({len(rc.units_a)} unit(s)): means over the units")
        for proc, cmp in rc.by_procedure.items():
            _print_changes(cmp, title=f"{proc}: changes B − A by quantity ({cmp.matched_points} operating points)")
        if not rc.by_procedure:
            console().print("no procedure was run on both revisions")
    if args.report:
        from benchctl.report.compare_revisions import write_revision_comparison

        path = write_revision_comparison(rc, args.report, store_url=url)
        if not args.json:
            console().print(f"difference plots: {path}")
    return EXIT_OK


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

            files = build_comparison_report(store, a, b, args.report, comparison=comparison)
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
    _print_changes(comparison)
    flagged = comparison.flagged
    from benchctl.commands.summary import _scope_text

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
