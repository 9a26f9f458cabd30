"""The revision summary: one self-contained HTML page (and its PNGs) per part and revision.

It is the page a reviewer signs a revision off from, in this order: the verdict and what
it rests on; the evidence matrix (units x procedures: the run used, its status, its limit
verdicts); what is missing; the limit verdicts per unit; the spread across units with
Cp/Cpk and Pp/Ppk; the figures of merit of each unit (efficiency with U, regulation, loop
margins, ripple, transient); the plots; the instruments used and the accuracy stated for
them; the provenance of every run; the change from an earlier revision when asked.
Everything stored is escaped (:func:`benchctl.report.html.esc`); images are embedded as
data URIs and also written as PNG files next to the page.
"""

from __future__ import annotations

import math
import os
from collections.abc import Iterable, Sequence
from dataclasses import dataclass
from datetime import datetime, timezone
from pathlib import Path
from typing import Any

import benchctl
from benchctl.limits import LimitsFile

from .files import write_page
from . import style
from .build import figure_png
from .html import _CSS, EmbeddedImage, _kv, _table, data_uri, esc
from .revision_data import MERIT_SECTIONS, RevisionEvidence, period, revision_evidence, serial_list
from .revision_plots import efficiency_by_unit, first_bound, margins_by_unit, spread_chart

SUMMARY_FILE_NAME = "revision.html"

_VERDICT_TEXT = {
    "passed": "Every required limit passed on every unit",
    "failed": "A required limit failed",
    "incomplete": "Not decided: evidence is missing or a verdict is undecided",
    "no_limits": "No limits were checked",
}

_EXTRA_CSS = """
.banner { border-radius: 8px; padding: 14px 18px; margin: 0 0 18px; color: #fff; font-size: 18px; font-weight: 650; }
.banner.passed { background: var(--pass); } .banner.failed { background: var(--fail); }
.banner.incomplete, .banner.no_limits { background: var(--warn); }
.banner small { display: block; font-weight: 400; font-size: 13px; opacity: 0.92; margin-top: 2px; }
.matrix td { white-space: nowrap; }
.missing li { margin: 3px 0; }
.beyond, .bad { color: var(--fail); font-weight: 600; }
details { margin: 10px 0; } summary { cursor: pointer; color: var(--accent); }
h3 { font-size: 15px; margin: 22px 0 6px; }
"""


@dataclass(frozen=True)
class RevisionSummaryFiles:
    """What :func:`build_revision_summary` wrote."""

    part: str
    revision: str
    out_dir: Path
    html_path: Path
    png_paths: tuple[Path, ...]
    overall: str


def default_out_dir(part: str, revision: str) -> Path:
    from benchctl.locations import data_dir

    safe = "".join(c if c.isalnum() or c in "-_." else "_" for c in f"{part}-{revision}")
    return data_dir() / f"revision-{safe}"


def _num(v: Any, digits: int = 4) -> str:
    if v is None or (isinstance(v, float) and not math.isfinite(v)):
        return "—"
    return f"{v:.{digits}g}"


def _pill(status: str, text: str | None = None) -> str:
    return f'<span class="pill {esc(status)}">{esc(text or status.replace("_", " "))}</span>'


def _image(img: EmbeddedImage) -> str:
    return (f'<figure><img alt="{esc(img.title)}" src="{data_uri(img.png)}" width="{img.width_px}" '
            f'height="{img.height_px}"><figcaption>{esc(img.caption)}</figcaption></figure>')


def _embed(fig: Any, file_name: str, title: str, caption: str) -> EmbeddedImage:
    w, h = fig.get_size_inches()
    return EmbeddedImage(file_name, title, caption, figure_png(fig), int(round(w * style.FIG_DPI)),
                         int(round(h * style.FIG_DPI)))


def _worst_status(statuses: Iterable[str]) -> str:
    order = ("fail", "not_checked", "borderline", "suspect", "pass")
    found = [s for s in statuses if s in order]
    return min(found, key=order.index) if found else ""


def _matrix(ev: RevisionEvidence) -> str:
    procs = ev.runs.procedures
    rows = []
    for serial in ev.runs.serials:
        cells = [esc(serial or "(no serial)")]
        for proc in procs:
            run_id = ev.runs.run_of(serial, proc)
            if run_id is None:
                miss = next((m for m in ev.runs.missing if m.serial == serial and m.procedure == proc), None)
                cells.append(_pill("failed" if miss and miss.kind == "not_completed" else "undecided",
                                   "no completed run" if miss and miss.kind == "not_completed" else "missing"))
                continue
            mine = [v for v in ev.verdicts if v.run_id == run_id and v.required]
            worst = _worst_status(v.status for v in mine)
            text = f"run {run_id}"
            verdict = _pill(worst, {"pass": "pass", "fail": "FAIL"}.get(worst, worst.replace("_", " "))) if worst else \
                '<span class="note">no limits</span>'
            cells.append(f"{esc(text)} {verdict}")
        rows.append(cells)
    return _table(["unit"] + list(procs), rows)


def _verdict_table(ev: RevisionEvidence) -> str:
    if not ev.verdicts:
        return '<p class="empty">No limit was checked for these runs: give the limits files (--limits).</p>'
    serials = list(ev.runs.serials)
    limits = list(dict.fromkeys(v.limit for v in ev.verdicts))
    rows = []
    for name in limits:
        mine = [v for v in ev.verdicts if v.limit == name]
        required = any(v.required for v in mine)
        cells = [esc(name) + ("" if required else ' <span class="note">(advisory)</span>')]
        for serial in serials:
            v = next((x for x in mine if x.serial == serial), None)
            if v is None:
                cells.append("—")
                continue
            value = _num(v.worst_value, 5) + (f" ± {_num(v.uncertainty, 2)}" if v.uncertainty else "")
            cells.append(f"{_pill(v.status)} <span class='note'>{esc(value)} {esc(v.unit)}</span>")
        rows.append(cells)
    return _table(["limit"] + [s or "(no serial)" for s in serials], rows)


def _statistics_section(ev: RevisionEvidence) -> str:
    t = ev.statistics
    if t.empty:
        return ("<h2>Spread across units</h2><p class=\"empty\">No statistics: give the limits files (--limits); "
                "their limits choose the figures, operating points and bounds.</p>")
    # the tightest point of each limit first (smallest Ppk), the rest on request
    tight = []
    for _limit, grp in t[t["limit"] != ""].groupby("limit", sort=False):
        tight.append(grp.iloc[int(grp["ppk"].fillna(math.inf).to_numpy().argmin())])  # the first smallest Ppk

    def rows_of(frame_rows: Sequence[Any]) -> list[list[str]]:
        out = []
        for r in frame_rows:
            cpk_cls = "bad" if (r["cpk"] == r["cpk"] and r["cpk"] < 1.33) else ""
            ppk_cls = "bad" if (r["ppk"] == r["ppk"] and r["ppk"] < 1.33) else ""
            out.append([esc(r["limit"]), esc(r["point"]), esc(r["n"]), esc(_num(r["mean"], 6)), esc(_num(r["sd"], 3)),
                        esc(f"{_num(r['min'], 6)} ({r['min_serial']})"), esc(f"{_num(r['max'], 6)} ({r['max_serial']})"),
                        esc(_num(r["cp"], 3)), f'<span class="{cpk_cls}">{esc(_num(r["cpk"], 3))}</span>',
                        esc(_num(r["pp"], 3)), f'<span class="{ppk_cls}">{esc(_num(r["ppk"], 3))}</span>',
                        f'<b class="bad">{esc(r["outlier_serial"])}</b>' if r["outlier_serial"] else "",
                        f'<span class="note">{esc(r["note"])}</span>'])
        return out

    headers = ["limit", "point", "n", "mean", "s", "min (unit)", "max (unit)", "Cp", "Cpk", "Pp", "Ppk", "outlier",
               "note"]
    notes: list[str] = []
    normality = sorted({n for n in t["normality_note"] if n})
    per = ev.per_serial
    per_rows = [[esc(r["limit"]), esc(r["point"]), esc(r["serial"]), esc(_num(r["value"], 6)),
                 esc(_num(r["expanded_uncertainty"], 2)), esc(_num(r["z"], 3)),
                 '<b class="bad">outlier</b>' if r["outlier"] else "", esc(", ".join(r["flags"]))]
                for r in per.to_dict("records")]
    return "".join([
        "<h2>Spread across units</h2>",
        '<p class="note">Per limit, the operating point with the smallest Ppk. Cp/Cpk use the within-unit-to-unit '
        "sigma from moving ranges of successive units (MR̄/1.128), Pp/Ppk the overall sample s (ISO 22514-2 "
        "indices with the normal model); below 1.33 in red (a common minimum, common practice). Outliers: "
        "Grubbs' test, two-sided, α = 0.05.</p>",
        _table(headers, rows_of(tight), numeric=(2, 3, 4, 5, 6, 7, 8, 9, 10)),
        "".join(f'<p class="note">{esc(n)}</p>' for n in notes[:8]),
        "".join(f'<p class="note">normality: {esc(n)}</p>' for n in normality[:3]),
        f"<details><summary>every operating point ({len(t)})</summary>"
        + _table(headers, rows_of([r for _, r in t.iterrows()]), numeric=(2, 3, 4, 5, 6, 7, 8, 9, 10)) + "</details>",
        f"<details><summary>every unit's value ({len(per)})</summary>"
        + _table(["limit", "point", "unit", "value", "U (k = 2)", "z", "", "flags"], per_rows, numeric=(3, 4, 5))
        + "</details>",
    ])


def _merit_sections(ev: RevisionEvidence) -> str:
    serials = list(ev.runs.serials)
    parts = ["<h2>Figures of merit per unit</h2>",
             '<p class="note">From the run that stands for each unit; ± is the expanded uncertainty U (k = 2) where '
             "the store has it (from the station's instrument accuracy). Flagged values are marked *.</p>"]
    for section in MERIT_SECTIONS:
        blocks = []
        for name, scale, unit in section.names:
            table = ev.merit_table(name)
            if table.empty:
                continue
            rows = []
            for r in table.to_dict("records"):
                cells = [esc(r["point"])]
                vals = []
                for s in serials:
                    v = r.get(s)
                    if v is None or not math.isfinite(v):
                        cells.append("—")
                        continue
                    vals.append(v)
                    u = r.get(f"{s} U")
                    text = f"{v * scale:.4g}" + (f" ± {u * scale:.2g}" if u is not None and math.isfinite(u) else "")
                    flag = "*" if r.get(f"{s} flags") else ""
                    cells.append(esc(text + flag))
                if len(vals) >= 2:
                    import statistics

                    cells.append(esc(f"{statistics.fmean(vals) * scale:.4g} / {statistics.stdev(vals) * scale:.2g}"))
                else:
                    cells.append("—")
                rows.append(cells)
            blocks.append(f"<h3>{esc(name)} ({esc(unit)})</h3>"
                          + _table(["point"] + [s or "(no serial)" for s in serials] + ["mean / s"], rows,
                                   numeric=tuple(range(1, len(serials) + 2))))
        if blocks:
            parts.append(f"<h3 style=\"font-size:17px\">{esc(section.title)}</h3>" + "".join(blocks))
    return "".join(parts)


def _missing_section(ev: RevisionEvidence) -> str:
    items = [esc(m.text) for m in ev.runs.missing] + [esc(t) for t in ev.not_measured]
    if not items:
        return "<h2>What is missing</h2><p>Nothing: every unit has a completed run of every procedure.</p>"
    return "<h2>What is missing</h2><ul class=\"missing\">" + "".join(f"<li>{i}</li>" for i in items) + "</ul>"


def _instrument_section(ev: RevisionEvidence) -> str:
    rows = [[esc(u.station), esc(u.role), esc(u.identity or "—"), f"<code>{esc(u.resource)}</code>",
             esc(u.accuracy) if u.accuracy else '<span class="bad">none stated: its readings carry no type B '
                                                'uncertainty</span>',
             (f'<span class="bad">{esc(u.calibration)}</span>' if "OVERDUE" in u.calibration
              else esc(u.calibration) if u.calibration else '<span class="empty">not stated</span>'),
             esc(", ".join(str(r) for r in u.run_ids))]
            for u in ev.instruments]
    if not rows:
        return "<h2>Instruments</h2><p class=\"empty\">No instruments were stored with these runs.</p>"
    return ("<h2>Instruments and their stated accuracy</h2>"
            '<p class="note">As identified at the start of each run (*IDN?) and as its station file states the '
            "accuracy (a data sheet or a calibration certificate) and its calibration (calibration_due, "
            "calibration_certificate); an instrument past its due date at a run's start is marked OVERDUE.</p>"
            + _table(["station", "role", "identity", "resource", "accuracy (± % of reading + offset, SI units)",
                      "calibration", "runs"], rows))


def _provenance_section(ev: RevisionEvidence, store_url: str) -> str:
    rows = []
    for item in ev.runs.latest_runs():
        info = ev.infos[item.run_id]
        dur = "—" if info.ended_utc is None else f"{(info.ended_utc - info.started_utc).total_seconds():.0f} s"
        rows.append([esc(item.serial), esc(item.procedure), esc(item.run_id), esc(info.status),
                     esc(info.started_utc.strftime("%Y-%m-%d %H:%M:%S") if info.started_utc else "—"), esc(dur),
                     esc(info.station_name), esc(info.host), esc(info.operator),
                     esc("—" if info.job_id is None else info.job_id), esc(info.benchctl_version),
                     f"<code>{esc(info.procedure_sha256[:12])}</code>", f"<code>{esc(info.station_sha256[:12])}</code>"])
    limits = [[esc(lf.name or "—"), f"<code>{esc(str(lf.path or ''))}</code>", f"<code>{esc(lf.sha256[:16])}</code>"]
              for lf in ev.limits]
    return ("<h2>Provenance</h2>"
            + _table(["unit", "procedure", "run", "status", "started (UTC)", "duration", "station", "host", "operator",
                      "job", "benchctl", "procedure sha256", "station sha256"], rows)
            + (("<h3>Limits files</h3>" + _table(["name", "file", "sha256"], limits)) if limits else "")
            + _kv([("store", esc(store_url)), ("verdicts from", esc(ev.verdict_source)),
                   ("runs of this revision in the store", esc(len(ev.runs.runs)))]))


def render_revision_page(ev: RevisionEvidence, images: Sequence[EmbeddedImage], *, store_url: str = "",
                         generated_utc: datetime | None = None, extra_html: str = "") -> str:
    """The whole page as text (already-built ``images``; ``extra_html`` escaped by its maker)."""
    first, last = period(ev)
    overall = ev.overall
    fails = ev.required_failures
    undecided = ev.required_undecided
    detail = []
    if fails:
        detail.append(f"{len(fails)} required limit verdict(s) failed on {len({v.serial for v in fails})} unit(s)")
    if undecided:
        detail.append(f"{len(undecided)} undecided (borderline, suspect or not checked)")
    if ev.runs.missing:
        detail.append(f"{len(ev.runs.missing)} hole(s) in the evidence")
    if not detail:
        detail.append(f"{len(ev.verdicts)} verdict(s) over {len(ev.runs.serials)} unit(s)")
    if ev.not_measured:
        detail.append(f"not measured: {len(ev.not_measured)} group(s) of figures (see What is missing)")
    facts = [("units", esc(f"{len(ev.runs.serials)}: {serial_list(ev.runs.serials)}")),
             ("runs used", esc(len(ev.runs.latest))),
             ("measured", esc(f"{first:%Y-%m-%d %H:%M} – {last:%Y-%m-%d %H:%M} UTC" if first and last else "—")),
             ("verdicts from", esc(ev.verdict_source))]
    facts_html = '<ul class="facts">' + "".join(f"<li><b>{esc(k)}</b>{v}</li>" for k, v in facts) + "</ul>"
    stamp = (generated_utc or datetime.now(timezone.utc)).strftime("%Y-%m-%d %H:%M:%S UTC")
    body = "".join([
        "<header>", f"<h1>{esc(ev.part)} · revision {esc(ev.revision)}</h1>",
        "<p>Release evidence: the latest completed run of each procedure on each unit</p>", "</header>",
        f'<div class="banner {esc(overall)}">{esc(_VERDICT_TEXT[overall])}<small>{esc("; ".join(detail))}</small></div>',
        facts_html,
        "<h2>Evidence matrix</h2>", _matrix(ev) if ev.runs.serials else '<p class="empty">No run of this revision.</p>',
        _missing_section(ev),
        "<h2>Limit verdicts per unit</h2>", _verdict_table(ev),
        _statistics_section(ev),
        _merit_sections(ev),
        "<h2>Plots</h2>" + ("".join(_image(i) for i in images) if images
                            else '<p class="empty">Nothing to plot.</p>'),
        extra_html,
        _instrument_section(ev),
        _provenance_section(ev, store_url),
        f"<footer>generated {esc(stamp)} by benchctl {esc(benchctl.__version__)}</footer>",
    ])
    return ("<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">"
            "<meta name=\"viewport\" content=\"width=device-width, initial-scale=1\">"
            f"<title>{esc(ev.part)} rev {esc(ev.revision)} · revision summary · benchctl</title>"
            f"<style>{_CSS}{_EXTRA_CSS}</style></head><body><main>{body}</main></body></html>\n")


def revision_images(ev: RevisionEvidence) -> list[EmbeddedImage]:
    """The summary's figures (efficiency of every unit, spread at the tightest points, loop margins)."""
    images = []
    label = f"{ev.part} rev {ev.revision}"
    emap = {item.serial: ev.points[item.run_id] for item in ev.runs.latest_runs()
            if item.procedure == "efficiency_map"}
    if emap:
        images.append(_embed(efficiency_by_unit(emap, title=label), "01-efficiency-by-unit.png",
                             "Efficiency of every unit",
                             "Efficiency Pout/Pin against measured output current; a colour per line voltage, a "
                             "marker per unit. No-load points are left out."))
    spread = spread_chart(ev.statistics, ev.per_serial, title=label)
    if spread is not None:
        images.append(_embed(spread, "02-spread.png", "Spread across units",
                             "Each limit at its tightest operating point: every unit's value (marker; an outlier in "
                             "the limit colour), the limit's bounds (lines), the mean ± 3 s (band)."))
    loop = {item.serial: ev.results[item.run_id] for item in ev.runs.latest_runs()
            if item.procedure == "loop_gain"}
    if loop:
        fig = margins_by_unit(loop, phase_min_deg=first_bound(ev.limits, "phase_margin_deg"),
                              gain_min_db=first_bound(ev.limits, "gain_margin_db"), title=label)
        if fig is not None:
            images.append(_embed(fig, "03-loop-margins.png", "Loop margins of every unit",
                                 "Phase and gain margin at each measured operating point, a marker per unit; a "
                                 "gain margin that does not exist (no phase crossover) is not drawn."))
    return images


def build_revision_summary(store: Any, part: str, revision: str, *, limits: Iterable[LimitsFile | str | Path] = (),
                           against: str | None = None,
                           out_dir: str | os.PathLike[str] | None = None) -> RevisionSummaryFiles:
    """Write ``revision.html`` and its PNGs for ``part`` at ``revision`` into ``out_dir``
    (default ``benchctl-data/revision-<part>-<revision>/``); read-only on the store."""
    ev = revision_evidence(store, part, revision, limits=limits)
    images = revision_images(ev)
    extra = ""
    if against:
        from benchctl.compare import compare_revisions

        from .compare_revisions import revision_comparison_section

        section, change_images = revision_comparison_section(compare_revisions(store, part, against, revision))
        extra = section
        images_to_write = images + change_images
    else:
        images_to_write = images
    page = render_revision_page(ev, images, store_url=str(getattr(store, "url", "")), extra_html=extra)
    target = Path(out_dir) if out_dir is not None else default_out_dir(part, revision)
    html_path, paths = write_page(target, SUMMARY_FILE_NAME, page, images_to_write, what="the revision summary")
    return RevisionSummaryFiles(part, revision, target, html_path, tuple(paths), ev.overall)


__all__ = ["SUMMARY_FILE_NAME", "RevisionSummaryFiles", "build_revision_summary", "render_revision_page",
           "revision_images"]
