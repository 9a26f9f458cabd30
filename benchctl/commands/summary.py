"""Run summaries for the terminal: an efficiency grid and the derived results."""

from __future__ import annotations

import json
import math

from rich.table import Table

from benchctl.commands.console import console


def _fmt(value, unit: str) -> str:
    if value is None or (isinstance(value, float) and math.isnan(value)):
        return "—"
    if unit == "":
        return f"{value:.4g}"
    return f"{value:.4g} {unit}"


def efficiency_grid(points) -> Table | None:
    """Efficiency in % by load (rows) and line (columns), from a run's wide points."""
    needed = {"vin_set_v", "iout_set_a", "pin_w", "pout_w"}
    if points.empty or not needed <= set(points.columns):
        return None
    frame = points.assign(eff=points["pout_w"] / points["pin_w"].where(points["pin_w"] > 0))
    grid = frame.pivot_table(index="iout_set_a", columns="vin_set_v", values="eff", aggfunc="mean")
    table = Table(title="efficiency (%) by load and line")
    table.add_column("load (A)", justify="right")
    for vin in grid.columns:
        table.add_column(f"{vin:g} V", justify="right")
    for iout, row in grid.iterrows():
        cells = []
        best = row.max()
        for v in row:
            text = "—" if math.isnan(v) else f"{100 * v:.2f}"
            cells.append(f"[bold]{text}[/]" if v == best and not math.isnan(v) else text)
        table.add_row(f"{iout:g}", *cells)
    return table


def results_table(results, *, skip_per_point: bool = True) -> Table | None:
    """Derived results that are not per-point values."""
    if results.empty:
        return None
    table = Table(title="derived results")
    for col in ("result", "where", "value", "note"):
        table.add_column(col, overflow="fold")
    for _, r in results.iterrows():
        scope = r.get("scope") or {}
        if isinstance(scope, str):
            scope = json.loads(scope) if scope else {}
        if skip_per_point and "seq" in scope:
            continue
        details = r.get("details") or {}
        if isinstance(details, str):
            try:
                details = json.loads(details)
            except ValueError:
                details = {"text": details}
        where = ", ".join(f"{k}={v:g}" if isinstance(v, (int, float)) else f"{k}={v}" for k, v in scope.items())
        note = ""
        if isinstance(details, dict):
            if "limit_efficiency" in details:
                verdict = "meets" if details.get("meets_indicative_limit") else "below"
                note = f"{verdict} indicative limit {details['limit_efficiency']:.4f} ({details.get('supply_class')})"
                if not details.get("found", True):
                    note = details.get("reason", "")
            elif "indicative_limit_w" in details:
                note = f"indicative no-load limit {details['indicative_limit_w']:g} W"
            elif "definition" in details:
                note = details["definition"]
        table.add_row(str(r["name"]), where, _fmt(r["value"], r.get("unit") or ""), note)
    return table


def print_run_summary(store, run_id: int) -> None:
    out = console()
    points = store.points(run_id)
    grid = efficiency_grid(points)
    if grid is not None:
        out.print(grid)
    table = results_table(store.results(run_id))
    if table is not None and table.row_count:
        out.print(table)
    events = store.events(run_id)
    if not events.empty:
        ev = Table(title="events")
        for col in ("time (UTC)", "kind", "message"):
            ev.add_column(col, overflow="fold")
        for _, e in events.iterrows():
            ev.add_row(str(e.get("t_utc", "")), str(e["kind"]), str(e["message"]))
        out.print(ev)
