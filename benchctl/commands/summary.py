"""Run summaries for the terminal: an efficiency grid and the derived results."""

from __future__ import annotations

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
    # No efficiency at no load: Pout ≈ 0 there, and the input power is the figure of merit.
    loaded = (points["iout_set_a"] > 0) & (points["pin_w"] > 0)
    frame = points.assign(eff=(points["pout_w"] / points["pin_w"]).where(loaded))
    grid = frame.pivot_table(index="iout_set_a", columns="vin_set_v", values="eff", aggfunc="mean")
    table = Table(title="efficiency (%) by load and line (no-load row: input power)")
    table.add_column("load (A)", justify="right")
    for vin in grid.columns:
        table.add_column(f"{vin:g} V", justify="right")
    if (points["iout_set_a"] == 0).any():
        noload = points[points["iout_set_a"] == 0].groupby("vin_set_v")["pin_w"].mean()
        table.add_row("0 (Pin)", *[f"{noload.get(v, float('nan')):.3f} W" for v in grid.columns])
    for iout, row in grid.iterrows():
        if row.isna().all():
            continue
        cells = []
        best = row.max()
        for v in row:
            text = "—" if math.isnan(v) else f"{100 * v:.2f}"
            cells.append(f"[bold]{text}[/]" if v == best and not math.isnan(v) else text)
        table.add_row(f"{iout:g}", *cells)
    return table


_SCOPE_LABELS = {"vin_set_v": ("Vin", "V"), "iout_set_a": ("Iout", "A")}


def _scope_text(scope) -> str:
    """``{"vin_set_v": 48, "iout_set_a": 2.5}`` -> ``Vin 48 V, Iout 2.5 A``."""
    parts = []
    for k, v in scope.items():
        label, unit = _SCOPE_LABELS.get(k, (k, ""))
        parts.append(f"{label} {v:g} {unit}".rstrip() if isinstance(v, (int, float)) else f"{label} {v}")
    return ", ".join(parts)


def _note(details) -> str:
    if not isinstance(details, dict):
        return ""
    if "limit_efficiency" in details:
        if not details.get("found", True):
            return str(details.get("reason", ""))
        verdict = "meets" if details.get("meets_indicative_limit") else "below"
        return f"{verdict} {details['limit_efficiency']:.4f} (indicative)"
    if "indicative_limit_w" in details:
        return f"limit {details['indicative_limit_w']:g} W (indicative)"
    return ""


def results_table(results) -> Table | None:
    """One line per derived result name (per-point results left out): the value, or for a
    result found at several operating points the worst (largest magnitude) with where it was."""
    if results.empty:
        return None
    table = Table(title="derived results (worst case where a result has several operating points)")
    has_notes = any(_note(d) for d in results["details"])
    table.add_column("result", no_wrap=True)
    for col in ("value", "where", "range") + (("note",) if has_notes else ()):
        table.add_column(col, overflow="fold")
    for name, group in results.groupby("name", sort=False):
        scopes = [sc if isinstance(sc, dict) else {} for sc in group["scope"]]
        if any("seq" in sc for sc in scopes) or str(name).startswith("limit:"):
            continue
        values = group["value"].to_numpy(float)
        unit = str(group["unit"].iloc[0] or "")
        if len(group) == 1 or not (values == values).any():
            k = 0
            rng = ""
        else:
            if "efficiency" in str(name) or "margin" in str(name):  # worst = lowest
                k = int(group["value"].fillna(float("inf")).to_numpy().argmin())
            else:
                k = int(abs(group["value"]).fillna(-1).to_numpy().argmax())
            rng = f"{_fmt(float(min(values)), unit)} … {_fmt(float(max(values)), unit)}"
        cells = [str(name), _fmt(float(values[k]), unit), _scope_text(scopes[k]), rng]
        if has_notes:
            cells.append(_note(group["details"].iloc[k]))
        table.add_row(*cells)
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
            t = e.get("t_utc")
            ev.add_row(t.strftime("%Y-%m-%d %H:%M:%S") if hasattr(t, "strftime") else str(t or ""),
                       str(e["kind"]), str(e["message"]))
        out.print(ev)
