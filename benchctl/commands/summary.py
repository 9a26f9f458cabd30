"""Run summaries for the terminal: data quality, an efficiency grid and the derived results.

Figures are shown with their expanded uncertainty, ``value ± U`` (k = 2, JCGM 100:2008
6.2.1) when the run stored one. Points that did not settle or whose setpoints were not
verified are counted and listed, and marked ``*`` in the grid; results whose number may
be wrong (``details["flags"]``) are counted and marked ``*`` with their flags.
"""

from __future__ import annotations

import math

from rich.markup import escape
from rich.table import Table

from benchctl.analysis.quality import UNVERIFIED, point_flags, result_flags
from benchctl.commands.console import console

#: Points listed by name at most in the data-quality lines (the rest are counted).
MAX_LISTED = 8


def _fmt(value, unit: str, u=None) -> str:
    if value is None or (isinstance(value, float) and math.isnan(value)):
        return "—"
    text = f"{value:.4g}"
    if u is not None and isinstance(u, float) and math.isfinite(u):
        text += f" ± {u:.2g}"
    return text if unit == "" else f"{text} {unit}"


def _finite(x) -> float | None:
    try:
        v = float(x)
    except (TypeError, ValueError):
        return None
    return v if math.isfinite(v) else None


def point_quality(points) -> list[tuple[int, float, float, tuple[str, ...], str]]:
    """(seq, vin_set_v, iout_set_a, flags, reason) of every unsettled or unverified point."""
    if points.empty or "settled" not in points.columns:
        return []
    out = []
    for rec in points.to_dict("records"):
        flags, reason = point_flags(rec.get("settled"), rec.get("settle_info"), rec.get("settle_reason"))
        if flags:
            vin, iout = _finite(rec.get("vin_set_v")), _finite(rec.get("iout_set_a"))
            out.append((int(rec.get("seq", 0)), math.nan if vin is None else vin,
                        math.nan if iout is None else iout, flags, reason))
    return out


def flagged_results(results) -> list[tuple[str, dict, tuple[str, ...], str]]:
    """(name, scope, flags, reasons) of every derived result that carries quality flags."""
    if results is None or results.empty or "details" not in results.columns:
        return []
    out = []
    for _, r in results.iterrows():
        if str(r["name"]).startswith("limit:"):
            continue
        flags, reasons = result_flags(r.get("details"))
        if flags:
            out.append((str(r["name"]), r.get("scope") if isinstance(r.get("scope"), dict) else {}, flags, reasons))
    return out


def quality_lines(points, results) -> list[str]:
    """Plain-text lines on the run's data quality (empty when every point settled and no result is flagged)."""
    lines = []
    bad = point_quality(points)
    if bad:
        n_unver = sum(1 for b in bad if UNVERIFIED in b[3])
        shown = "; ".join(f"{b[1]:g} V, {b[2]:g} A: {', '.join(b[3])}" + (f" ({b[4]})" if b[4] else "")
                          for b in bad[:MAX_LISTED])
        more = f"; … and {len(bad) - MAX_LISTED} more" if len(bad) > MAX_LISTED else ""
        lines.append(f"{len(bad)} of {len(points)} point(s) not trustworthy: {len(bad) - n_unver} unsettled, "
                     f"{n_unver} unverified — {shown}{more}")
    flagged = flagged_results(results)
    if flagged:
        names = sorted({f[0] for f in flagged})
        kinds = sorted({k for f in flagged for k in f[2]})
        lines.append(f"{len(flagged)} derived result(s) flagged ({', '.join(kinds)}): {', '.join(names)}; "
                     "marked * in the tables, limits cannot pass on them")
    return lines


def _efficiency_u(results) -> dict[tuple[float, float], float]:
    """(iout_set_a, vin_set_v) -> the largest expanded uncertainty of the efficiency there."""
    out: dict[tuple[float, float], float] = {}
    if results is None or results.empty or "expanded_uncertainty" not in results.columns:
        return out
    sel = results[results["name"] == "efficiency"]
    for _, r in sel.iterrows():
        scope = r.get("scope") if isinstance(r.get("scope"), dict) else {}
        u = _finite(r.get("expanded_uncertainty"))
        vin, iout = _finite(scope.get("vin_set_v")), _finite(scope.get("iout_set_a"))
        if u is None or vin is None or iout is None:
            continue
        out[(iout, vin)] = max(u, out.get((iout, vin), 0.0))
    return out


def efficiency_grid(points, results=None) -> Table | None:
    """Efficiency in % by load (rows) and line (columns), from a run's wide points, with ± U
    (k = 2) from the efficiency results when stored; * marks an unsettled or unverified point."""
    needed = {"vin_set_v", "iout_set_a", "pin_w", "pout_w"}
    if points.empty or not needed <= set(points.columns):
        return None
    # No efficiency at no load: Pout ≈ 0 there, and the input power is the figure of merit.
    loaded = (points["iout_set_a"] > 0) & (points["pin_w"] > 0)
    frame = points.assign(eff=(points["pout_w"] / points["pin_w"]).where(loaded))
    grid = frame.pivot_table(index="iout_set_a", columns="vin_set_v", values="eff", aggfunc="mean")
    u_at = _efficiency_u(results)
    doubtful = {(b[2], b[1]) for b in point_quality(points)}
    title = "efficiency (%) by load and line (no-load row: input power)"
    if u_at:
        title += "; ± expanded uncertainty U (k = 2)"
    if doubtful:
        title += "; * unsettled or unverified"
    table = Table(title=title)
    table.add_column("load (A)", justify="right")
    for vin in grid.columns:
        table.add_column(f"{vin:g} V", justify="right")
    if (points["iout_set_a"] == 0).any():
        noload = points[points["iout_set_a"] == 0].groupby("vin_set_v")["pin_w"].mean()
        cells = []
        for v in grid.columns:
            mark = "*" if (0.0, float(v)) in doubtful else ""
            cells.append(f"{noload.get(v, float('nan')):.3f} W{mark}")
        table.add_row("0 (Pin)", *cells)
    for iout, row in grid.iterrows():
        if row.isna().all():
            continue
        cells = []
        best = row.max()
        for vin, v in row.items():
            text = "—" if math.isnan(v) else f"{100 * v:.2f}"
            u = u_at.get((float(iout), float(vin)))
            if u is not None and not math.isnan(v):
                text += f" ±{100 * u:.2f}"
            if (float(iout), float(vin)) in doubtful:
                text += "*"
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
    notes = []
    flags, reasons = result_flags(details)
    if flags:
        notes.append(f"* {', '.join(flags)}" + (f": {reasons}" if reasons else ""))
    if "limit_efficiency" in details:
        if not details.get("found", True):
            notes.append(str(details.get("reason", "")))
        else:
            verdict = "meets" if details.get("meets_indicative_limit") else "below"
            notes.append(f"{verdict} {100.0 * details['limit_efficiency']:.2f} % (indicative)")
    elif "indicative_limit_w" in details:
        notes.append(f"limit {details['indicative_limit_w']:g} W (indicative)")
    return "; ".join(notes)


def results_table(results) -> Table | None:
    """One line per derived result name (per-point results left out): the value ± U (k = 2)
    when stored, or for a result found at several operating points the worst (largest
    magnitude) with where it was; flagged results are marked * with their flags."""
    if results.empty:
        return None
    has_u = "expanded_uncertainty" in results.columns and results["expanded_uncertainty"].notna().any()
    title = "derived results (worst case where a result has several operating points)"
    if has_u:
        title += "; ± expanded uncertainty U (k = 2)"
    table = Table(title=title)
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
        scale = 1.0
        if "efficiency" in str(name) and unit == "":  # stored 0..1; people read efficiency in % everywhere
            scale, unit = 100.0, "%"
            values = values * scale
        if len(group) == 1 or not (values == values).any():
            k = 0
            rng = ""
        else:
            if "efficiency" in str(name) or "margin" in str(name):  # worst = lowest
                k = int(group["value"].fillna(float("inf")).to_numpy().argmin())
            else:
                k = int(abs(group["value"]).fillna(-1).to_numpy().argmax())
            rng = f"{_fmt(float(min(values)), unit)} … {_fmt(float(max(values)), unit)}"
        u = _finite(group["expanded_uncertainty"].iloc[k]) if has_u else None
        u = None if u is None else u * scale
        details = group["details"].iloc[k]
        value_text = _fmt(float(values[k]), unit, u)
        n_flagged = sum(1 for d in group["details"] if result_flags(d)[0])
        note = _note(details)
        if result_flags(details)[0]:
            value_text += " *"
        elif n_flagged:
            note = "; ".join(x for x in (f"* {n_flagged} of {len(group)} at other operating points flagged", note) if x)
        cells = [str(name), value_text, _scope_text(scopes[k]), rng]
        if has_notes or n_flagged:
            if not has_notes:
                table.add_column("note", overflow="fold")
                has_notes = True
            cells.append(note)
        table.add_row(*[escape(c) for c in cells])
    return table


def print_run_summary(store, run_id: int) -> None:
    out = console()
    points = store.points(run_id)
    results = store.results(run_id)
    for line in quality_lines(points, results):
        out.print(f"[bold yellow]{escape(line)}[/]")
    grid = efficiency_grid(points, results)
    if grid is not None:
        out.print(grid)
    table = results_table(results)
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
