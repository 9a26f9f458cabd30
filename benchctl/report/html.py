"""The run report as one self-contained HTML page (images embedded as base64 data URIs).

Every stored string (DUT serial, messages, parameters, identities ...) passes through
:func:`html.escape` before it reaches the page, so nothing stored can become markup.
Images are embedded as ``data:image/png;base64,...`` (RFC 2397, base64 per RFC 4648).
"""

from __future__ import annotations

import base64
import html
import json
from collections.abc import Iterable, Sequence
from dataclasses import dataclass
from datetime import datetime
from typing import Any

import pandas as pd

from . import style
from .limit_marks import LimitMark
from .result_summary import ResultLine, result_lines, scope_text
from .run_data import RunData

ALERT_EVENT_KINDS = frozenset({"interlock_trip", "interlock_refusal", "error", "interrupted", "calibration_overdue"})
"""Event kinds shown highlighted in the events table."""


@dataclass(frozen=True)
class EmbeddedImage:
    """A rendered figure: PNG bytes, the file name written next to the page, pixel size."""

    file_name: str
    title: str
    caption: str
    png: bytes
    width_px: int
    height_px: int


def esc(value: Any) -> str:
    """HTML-escape any value's text (quotes included)."""
    return html.escape("" if value is None else str(value), quote=True)


def _utc(t: datetime | None) -> str:
    return "—" if t is None else t.strftime("%Y-%m-%d %H:%M:%S UTC")


def _duration(start: datetime | None, end: datetime | None) -> str:
    if start is None or end is None:
        return "—"
    seconds = (end - start).total_seconds()
    minutes, secs = divmod(seconds, 60.0)
    hours, minutes = divmod(minutes, 60.0)
    if hours >= 1:
        return f"{int(hours)} h {int(minutes)} min {secs:.0f} s"
    if minutes >= 1:
        return f"{int(minutes)} min {secs:.0f} s"
    return f"{seconds:.1f} s"


_CSS = f"""
:root {{ --ink: {style.INK}; --muted: {style.MUTED_INK}; --rule: #e4e6ea; --accent: {style.LINE_COLOURS[0]};
        --fail: {style.LIMIT_INK}; --pass: #1d6b46; --warn: #8a5a00; --band: #f6f7f9; }}
* {{ box-sizing: border-box; }}
body {{ margin: 0; background: #ffffff; color: var(--ink);
       font: 15px/1.45 system-ui, -apple-system, "Segoe UI", "DejaVu Sans", Roboto, sans-serif; }}
main {{ max-width: 1000px; margin: 0 auto; padding: 28px 28px 64px; }}
header {{ border-left: 6px solid var(--accent); padding: 4px 0 4px 16px; margin-bottom: 22px; }}
header h1 {{ font-size: 26px; margin: 0 0 4px; letter-spacing: -0.01em; }}
header p {{ margin: 0; color: var(--muted); }}
h2 {{ font-size: 18px; margin: 34px 0 10px; padding-bottom: 4px; border-bottom: 1px solid var(--rule); }}
.facts {{ display: flex; flex-wrap: wrap; gap: 10px; margin: 0; padding: 0; list-style: none; }}
.facts li {{ background: var(--band); border-radius: 6px; padding: 8px 12px; min-width: 130px; }}
.facts b {{ display: block; font-size: 12px; font-weight: 600; color: var(--muted); text-transform: lowercase; }}
.pill {{ display: inline-block; padding: 1px 9px; border-radius: 10px; font-size: 13px; font-weight: 600;
        color: #fff; background: var(--muted); }}
.pill.completed, .pill.pass {{ background: var(--pass); }}
.pill.failed, .pill.tripped, .pill.fail {{ background: var(--fail); }}
.pill.interrupted, .pill.running, .pill.undecided, .pill.not_checked {{ background: var(--warn); }}
.pill.borderline {{ background: #a34700; }}
.pill.suspect {{ background: #6b2f7a; }}
tr.doubtful td {{ background: #fbf5e8; }}
table {{ border-collapse: collapse; width: 100%; font-size: 14px; }}
th, td {{ text-align: left; vertical-align: top; padding: 5px 8px; border-bottom: 1px solid var(--rule); }}
th {{ font-size: 12px; font-weight: 600; color: var(--muted); text-transform: lowercase; }}
tr.alert td {{ background: #fbeff1; }}
td.num {{ font-variant-numeric: tabular-nums; white-space: nowrap; }}
table.kv th {{ width: 210px; text-transform: none; font-size: 14px; color: var(--muted); font-weight: 500; }}
code, .mono {{ font-family: "DejaVu Sans Mono", Menlo, Consolas, monospace; font-size: 13px; word-break: break-all; }}
figure {{ margin: 18px 0 28px; }}
figure img {{ display: block; width: 100%; max-width: {int(style.FIG_WIDTH_IN * style.FIG_DPI)}px; height: auto;
             border: 1px solid var(--rule); border-radius: 4px; }}
figcaption {{ color: var(--muted); font-size: 13px; margin-top: 6px; }}
.note {{ color: var(--muted); font-size: 13px; }}
.empty {{ background: var(--band); border-radius: 6px; padding: 14px 16px; }}
footer {{ margin-top: 40px; color: var(--muted); font-size: 12px; }}
"""


def data_uri(png: bytes) -> str:
    """``data:image/png;base64,...`` for PNG bytes."""
    return "data:image/png;base64," + base64.b64encode(png).decode("ascii")


def _table(headers: Sequence[str], rows: Iterable[Sequence[str]], *, row_classes: Sequence[str] | None = None,
           numeric: Sequence[int] = ()) -> str:
    """Rows are already-escaped HTML cell contents."""
    head = "".join(f"<th>{esc(h)}</th>" for h in headers)
    body = []
    for k, row in enumerate(rows):
        cls = f' class="{row_classes[k]}"' if row_classes and row_classes[k] else ""
        cells = "".join(f'<td class="num">{c}</td>' if j in numeric else f"<td>{c}</td>" for j, c in enumerate(row))
        body.append(f"<tr{cls}>{cells}</tr>")
    return f"<table><thead><tr>{head}</tr></thead><tbody>{''.join(body)}</tbody></table>"


def _kv(rows: Sequence[tuple[str, str]]) -> str:
    """Key/value table; values are already-escaped HTML."""
    return '<table class="kv"><tbody>' + "".join(f"<tr><th>{esc(k)}</th><td>{v}</td></tr>" for k, v in rows) + "</tbody></table>"


_LIMIT_LABELS = {"pass": "pass", "fail": "FAIL", "borderline": "BORDERLINE", "suspect": "SUSPECT",
                 "not_checked": "not checked"}


def _limit_section(limits: Sequence[LimitMark]) -> str:
    if not limits:
        return ""
    rows, classes = [], []
    for m in limits:
        state = m.status if m.status in _LIMIT_LABELS else "not_checked"
        label = _LIMIT_LABELS[state]
        worst = "—" if m.worst_value is None else f"{m.worst_value:.6g}"
        if m.worst_value is not None and m.uncertainty is not None:
            worst += f" ± {m.uncertainty:.2g}"
        bound = m.bound_text + (" (guarded)" if m.decision == "guarded" else "")
        rows.append([esc(m.name), esc(m.quantity), esc(bound), esc(m.where or "every point"), esc(worst),
                     f'<span class="pill {state}">{esc(label)}</span>', esc(m.note)])
        classes.append("alert" if state == "fail" else "doubtful" if state in ("borderline", "suspect") else "")
    counts = {k: sum(1 for m in limits if m.status == k) for k in _LIMIT_LABELS}
    undecided = len(limits) - counts["pass"] - counts["fail"]
    detail = [f"{counts[k]} {k.replace('_', ' ')}" for k in ("borderline", "suspect", "not_checked") if counts[k]]
    summary = (f'<p class="note">{counts["pass"]} passed, {counts["fail"]} failed, {undecided} not decided'
               + (f" ({', '.join(detail)})" if counts["borderline"] or counts["suspect"] else "") + ".</p>")
    if counts["borderline"] or counts["suspect"]:
        summary += ('<p class="note">Borderline: a value within its expanded uncertainty U (k = 2) of a bound '
                    "under guarded acceptance, proven neither inside nor outside. Suspect: a value that would pass "
                    "but was measured at a point that did not settle or had a setpoint off, or whose result is "
                    "flagged. Neither counts as a pass.</p>")
    return ("<h2>Limit checks</h2>" + summary
            + _table(["limit", "quantity", "bound", "where", "worst value", "outcome", "note"], rows,
                     row_classes=classes, numeric=(4,)))


def _quality_section(run: RunData) -> str:
    """Points that did not settle or were not verified, and flagged results (empty when none)."""
    from benchctl.analysis.quality import point_flags, result_flags

    rows = []
    if not run.points.empty and "settled" in run.points.columns:
        for rec in run.points.to_dict("records"):
            flags, reason = point_flags(rec.get("settled"), rec.get("settle_info"), rec.get("settle_reason"))
            if flags:
                where = ", ".join(f"{k} = {rec[k]:g}" for k in ("vin_set_v", "iout_set_a")
                                  if isinstance(rec.get(k), (int, float)))
                rows.append([esc(f"point {rec.get('seq', '')}"), esc(where), esc(", ".join(flags)), esc(reason)])
    n_points = len(rows)
    if not run.results.empty and "details" in run.results.columns:
        for _, r in run.results.iterrows():
            if str(r["name"]).startswith("limit:"):
                continue
            flags, reason = result_flags(r.get("details"))
            if flags:
                rows.append([esc(f"result {r['name']}"), esc(scope_text(r.get("scope"))), esc(", ".join(flags)),
                             esc(reason)])
    if not rows:
        return ""
    note = (f'<p class="note">{n_points} point(s) did not settle or had a setpoint off; {len(rows) - n_points} '
            "derived result(s) are flagged. Their numbers may be wrong: they are drawn hollow and ringed in the "
            "plots and no limit passes on them.</p>")
    return "<h2>Data quality</h2>" + note + _table(["what", "where", "flags", "reason"], rows,
                                                   row_classes=["doubtful"] * len(rows))


def _figures_section(images: Sequence[EmbeddedImage], notes: Sequence[str], has_points: bool) -> str:
    parts = ["<h2>Plots</h2>"]
    if not has_points:
        parts.append('<p class="empty">This run recorded no points, so there is nothing to plot.</p>')
    elif not images:
        parts.append('<p class="empty">No plot applies to the quantities this run recorded.</p>')
    for img in images:
        parts.append(
            f'<figure id="{esc(img.file_name)}"><img src="{data_uri(img.png)}" alt="{esc(img.title)}" '
            f'width="{img.width_px}" height="{img.height_px}">'
            f'<figcaption><b>{esc(img.title)}.</b> {esc(img.caption)} '
            f'(<a href="{esc(img.file_name)}">{esc(img.file_name)}</a>)</figcaption></figure>'
        )
    for note in notes:
        parts.append(f'<p class="note">{esc(note)}</p>')
    return "".join(parts)


def _results_section(lines: Sequence[ResultLine]) -> str:
    if not lines:
        return '<h2>Results</h2><p class="empty">No derived results were stored for this run.</p>'
    rows = [[esc(r.name), esc(r.value_text), esc(r.unit), esc(r.scope_text), esc(r.note)] for r in lines]
    return "<h2>Results</h2>" + _table(["result", "value", "unit", "scope", "note"], rows, numeric=(1,))


def _details_text(details: Any) -> str:
    if details is None or (isinstance(details, dict) and not details):
        return ""
    try:
        return json.dumps(details, sort_keys=True, default=str)
    except (TypeError, ValueError):
        return str(details)


def _events_section(events: pd.DataFrame) -> str:
    if events is None or events.empty:
        return '<h2>Events</h2><p class="empty">No events were stored for this run.</p>'
    rows, classes = [], []
    for _, e in events.iterrows():
        t = e["t_utc"]
        when = t.strftime("%Y-%m-%d %H:%M:%S.%f")[:-3] if hasattr(t, "strftime") and not pd.isna(t) else "—"
        seq = e.get("point_seq")
        rows.append([esc(when), esc(e["kind"]), esc(e["message"]),
                     esc("" if seq is None or pd.isna(seq) else int(seq)),
                     f'<span class="mono">{esc(_details_text(e.get("details")))}</span>'])
        classes.append("alert" if str(e["kind"]) in ALERT_EVENT_KINDS else "")
    n_alert = sum(1 for c in classes if c)
    note = f'<p class="note">{n_alert} of {len(rows)} events are interlock trips, refusals or errors (highlighted).</p>' if n_alert else ""
    return "<h2>Events</h2>" + note + _table(["time", "kind", "message", "point", "details"], rows, row_classes=classes)


def _provenance_section(run: RunData, store_url: str) -> str:
    i = run.info
    rows: list[tuple[str, str]] = [
        ("procedure", esc(i.procedure)),
        ("procedure sha256", f"<code>{esc(i.procedure_sha256)}</code>"),
        ("parameters", f"<code>{esc(json.dumps(i.parameters, sort_keys=True, default=str))}</code>"),
        ("station", esc(i.station_name) + (f" — {esc(i.station_description)}" if i.station_description else "")),
        ("station file sha256", f"<code>{esc(i.station_sha256)}</code>"),
        ("DUT part", esc(i.dut_part or "—")),
        ("DUT revision", esc(i.dut_revision or "—")),
        ("DUT serial", esc(i.dut_serial or "—")),
        ("operator", esc(i.operator or "—")),
        ("host / process", f"{esc(i.host)} / pid {esc(i.pid)}"),
        ("benchctl version", esc(i.benchctl_version)),
        ("started", esc(_utc(i.started_utc))),
        ("ended", esc(_utc(i.ended_utc))),
        ("status", f'<span class="pill {esc(i.status)}">{esc(i.status)}</span> {esc(i.message)}'),
    ]
    if i.job_id is not None:
        rows.append(("job", esc(i.job_id)))
    if store_url:
        rows.append(("store", f"<code>{esc(store_url)}</code>"))
    calibration = calibration_cells(i.station_text, i.started_utc)
    inst_rows = [[esc(x.role), esc(x.identity or "—"), esc(x.driver), f"<code>{esc(x.resource)}</code>",
                  *calibration.get(x.role, ("—", "—"))]
                 for x in i.instruments]
    instruments = (_table(["role", "identity (*IDN?)", "driver", "resource", "calibration due", "certificate"],
                          inst_rows) if inst_rows
                   else '<p class="empty">No instruments were stored for this run.</p>')
    return "<h2>Provenance</h2>" + _kv(rows) + "<h3>Instruments</h3>" + instruments


def calibration_cells(station_text: str | None, started: datetime | None) -> dict[str, tuple[str, str]]:
    """Role -> (due date cell, certificate cell) from the station file stored with the run; the
    due date says when it had passed on the day the run began."""
    from benchctl.station import calibration_records_from_text

    out: dict[str, tuple[str, str]] = {}
    for rec in calibration_records_from_text(station_text):
        days = rec.overdue_days(started.date()) if started is not None else None
        due = esc(rec.due.isoformat())
        if days is not None:
            due += f' <span class="pill failed">overdue {days} day(s) at the run</span>'
        out[rec.role] = (due, esc(rec.certificate or "—"))
    return out


def render_html(
    run: RunData,
    images: Sequence[EmbeddedImage],
    *,
    notes: Sequence[str] = (),
    store_url: str = "",
    generated_utc: datetime | None = None,
) -> str:
    """The whole report page as text (UTF-8). ``notes`` are plain-text remarks about plots
    that were skipped or failed; ``store_url`` must already have its password masked."""
    i = run.info
    dut = " ".join(x for x in (i.dut_part, f"rev {i.dut_revision}" if i.dut_revision else "",
                                f"serial {i.dut_serial}" if i.dut_serial else "") if x) or "DUT not named"
    n_pass = sum(1 for m in run.limits if m.status == "pass")
    limit_fact = ("none stored" if not run.limits
                  else f"all {len(run.limits)} passed" if n_pass == len(run.limits)
                  else f"{n_pass} of {len(run.limits)} passed")
    from .plots import doubtful_points

    n_doubtful = int(doubtful_points(run.points).sum())
    n_alert = 0 if run.events.empty else int(run.events["kind"].astype(str).isin(ALERT_EVENT_KINDS).sum())
    facts = [
        ("status", f'<span class="pill {esc(i.status)}">{esc(i.status)}</span>'),
        ("points", esc(i.n_points) + (f" ({esc(n_doubtful)} unsettled or unverified)" if n_doubtful else "")),
        ("duration", esc(_duration(i.started_utc, i.ended_utc))),
        ("limits", esc(limit_fact)),
        ("trips / errors", esc(n_alert)),
        ("started", esc(_utc(i.started_utc))),
    ]
    facts_html = '<ul class="facts">' + "".join(f"<li><b>{esc(k)}</b>{v}</li>" for k, v in facts) + "</ul>"
    status_note = f'<p class="note">{esc(i.message)}</p>' if i.message else ""
    generated = f"generated {_utc(generated_utc)} by benchctl" if generated_utc else "generated by benchctl"
    body = "".join([
        "<header>",
        f"<h1>Run {run.run_id} · {esc(i.procedure)}</h1>",
        f"<p>{esc(dut)} · station {esc(i.station_name)}</p>",
        "</header>",
        facts_html,
        status_note,
        _limit_section(run.limits),
        _quality_section(run),
        _figures_section(images, notes, has_points=not run.points.empty),
        _results_section(result_lines(run.results)),
        _events_section(run.events),
        _provenance_section(run, store_url),
        f"<footer>{esc(generated)}</footer>",
    ])
    return (
        "<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">"
        "<meta name=\"viewport\" content=\"width=device-width, initial-scale=1\">"
        f"<title>Run {run.run_id} · {esc(i.procedure)} · benchctl report</title>"
        f"<style>{_CSS}</style></head><body><main>{body}</main></body></html>\n"
    )
