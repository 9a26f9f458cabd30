"""The run report: files, embedded images, provenance, escaping, plot contents, registry, CLI.

The run is filled through the store API with an efficiency-map-shaped sweep of a
36-75 V telecom-input flyback (5 V / 5 A): four line voltages x ten load points, load
stepped up and back down, results from the bundled procedure's own analysis, one
interlock event and limit-check results.
"""

from __future__ import annotations

import argparse
import base64
import html
import re
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from PIL import Image

import benchctl
from benchctl.commands.report import add_report_arguments, cmd_report
from benchctl.procedure import load_procedure
from benchctl.report import ReportFigure, build_report, default_out_dir, register_plot, unregister_plot
from benchctl.report import plots, style
from benchctl.report.limit_marks import limit_marks
from benchctl.runner import store_results
from benchctl.store import InstrumentInfo, RunStart, Store, sha256_hex

VINS_V = (36.0, 48.0, 60.0, 75.0)
HOSTILE_SERIAL = "<script>alert('serial')</script>"
IDN_SOURCE = "Northfield Power,bench supply 160 V,SN40021,2.3.1"
IDN_METER = "Kestrel Instruments,PM-4,PM00987,1.08"
PROCEDURE_TEXT = "efficiency map, as run on bench 3"
EXPECTED_PX = (round(style.FIG_WIDTH_IN * style.FIG_DPI), round(style.FIG_HEIGHT_IN * style.FIG_DPI))


def flyback_point(vin_v: float, iout_a: float, descending: bool) -> dict[str, float]:
    """A plausible flyback operating point: fixed, switching and conduction losses
    (loss = P0 + a*Vin + b*I + c*I^2), a warmer descending pass (a little more loss),
    output drooping with load and rising slightly with line."""
    vout = 5.02 - 0.012 * iout_a + 0.0004 * (vin_v - 48.0) - (0.002 if descending else 0.0)
    pout = vout * iout_a
    loss = 0.35 + 0.004 * vin_v + 0.0001 * vin_v**2 + 0.09 * iout_a + 0.055 * iout_a**2
    loss *= 1.03 if descending else 1.0
    pin = pout + loss
    return {"vin_set_v": vin_v, "iout_set_a": iout_a, "vin_v": vin_v - 0.015, "iin_a": pin / vin_v,
            "pin_w": pin, "vout_v": vout, "iout_a": iout_a * 1.0005, "pout_w": pout}


def fill_run(store: Store, *, with_limits: bool = True, serial: str = HOSTILE_SERIAL) -> int:
    proc = load_procedure("efficiency_map")
    params = proc.resolve_parameters(values={"vin_v": list(VINS_V), "descending": True})
    run_id = store.begin_run(RunStart(
        procedure="efficiency_map", procedure_sha256=sha256_hex(PROCEDURE_TEXT), station_name="bench-3",
        station_description="telecom flyback bench <east wall>", parameters=params.as_dict(),
        instruments=[InstrumentInfo("source", "dc_source", "TCPIP::127.0.0.1::5025::SOCKET", IDN_SOURCE),
                     InstrumentInfo("output_meter", "power_meter", "TCPIP::127.0.0.1::5026::SOCKET", IDN_METER)],
        dut_part="FB-4805", dut_revision="C", dut_serial=serial, operator="r.tester", host="benchhost",
    ))
    for point in proc.plan(params):
        store.record_point(run_id, flyback_point(point["vin_set_v"], point["iout_set_a"],
                                                 point["tag"] == "descending"), tag=point["tag"])
    store.record_event(run_id, "interlock_trip", "input current 2.07 A above the 2.0 A limit <iin_max>",
                       {"limit": "iin_max", "value": 2.07})
    store_results(store, run_id, proc, params)
    if with_limits:
        store.record_result(run_id, "limit:efficiency_min", 0.8612, details={
            "limit": {"quantity": "efficiency", "min": 0.86, "where": {"iout_set_a": ">= 2.5"}},
            "worst_value": 0.8612, "passed": True})
        store.record_result(run_id, "limit:vout_band", 4.957, unit="V", details={
            "limit": {"quantity": "vout_v", "min": 4.95, "max": 5.05}, "worst_value": 4.957, "passed": True})
        store.record_result(run_id, "limit:loss_max", 3.2, unit="W", details={
            "limit": {"quantity": "loss_w", "max": 3.0}, "worst_value": 3.2, "passed": False})
        store.record_event(run_id, "limit_check", "1 of 3 limits failed", {"failed": ["loss_max"]})
    store.end_run(run_id, "completed")
    return run_id


@pytest.fixture(scope="module")
def filled(tmp_path_factory):
    root = tmp_path_factory.mktemp("report")
    store = Store.open(root / "bench.db")
    run_id = fill_run(store)
    files = build_report(store, run_id, root / "out")
    yield store, run_id, files
    store.close()


@pytest.fixture(scope="module")
def page(filled) -> str:
    return filled[2].html_path.read_text(encoding="utf-8")


@pytest.fixture(scope="module")
def points(filled) -> pd.DataFrame:
    store, run_id, _ = filled
    return store.points(run_id)


def _legend_texts(ax) -> list[str]:
    leg = ax.get_legend()
    return [] if leg is None else [t.get_text() for t in leg.get_texts()]


# --------------------------------------------------------------------------- files
def test_report_writes_html_and_one_png_per_plot(filled):
    _, _, files = filled
    assert files.html_path.is_file() and files.html_path.name == "report.html"
    names = [p.name for p in files.png_paths]
    assert names == ["01-efficiency-vs-load.png", "02-loss-vs-load.png", "03-vout-vs-load.png",
                     "04-vout-vs-line.png"]
    assert all(p.parent == files.out_dir and p.is_file() for p in files.png_paths)
    assert files.notes == ()


def test_every_png_opens_and_has_the_figure_size(filled):
    # PNG (W3C PNG 2nd ed., 11.2.2 IHDR) read by Pillow's decoder, an outside reader.
    for path in filled[2].png_paths:
        with Image.open(path) as img:
            assert img.format == "PNG"
            assert img.size == EXPECTED_PX  # 8 x 5 in at 110 dpi
            img.verify()


def test_html_embeds_each_png_byte_for_byte(filled, page):
    # data: URIs, RFC 2397; base64 alphabet, RFC 4648 section 4.
    uris = re.findall(r'src="data:image/png;base64,([A-Za-z0-9+/=]+)"', page)
    assert len(uris) == len(filled[2].png_paths)
    for encoded, path in zip(uris, filled[2].png_paths):
        decoded = base64.b64decode(encoded, validate=True)
        assert decoded == path.read_bytes()
        assert decoded[:8] == b"\x89PNG\r\n\x1a\n"  # PNG signature, W3C PNG 2nd ed. 5.2
        assert f'href="{path.name}"' in page


def test_html_has_the_provenance(filled, page):
    store, run_id, _ = filled
    info = store.run(run_id)
    for text in ("bench-3", "FB-4805", IDN_SOURCE, IDN_METER, "TCPIP::127.0.0.1::5025::SOCKET",
                 sha256_hex(PROCEDURE_TEXT), info.station_sha256, benchctl.__version__, "r.tester", "benchhost",
                 info.started_utc.strftime("%Y-%m-%d %H:%M:%S UTC"), info.ended_utc.strftime("%Y-%m-%d %H:%M:%S UTC")):
        assert html.escape(text) in page, text


def test_html_lists_events_results_and_limits(page):
    assert "interlock_trip" in page and "limit_check" in page
    assert html.escape("input current 2.07 A above the 2.0 A limit <iin_max>") in page
    for name in ("line_regulation_pct", "load_regulation_pct", "average_efficiency_4pt", "peak_efficiency"):
        assert name in page
    # per-point results are condensed to one row each, not 70
    results_section = page.split("<h2>Results</h2>")[1].split("<h2>")[0]
    assert results_section.count("<td>efficiency</td>") == 1
    assert results_section.count("<td>loss_w</td>") == 1
    assert "per point (76 points)" in results_section  # 4 lines x (10 up + 9 down)
    assert "efficiency_min" in page and "vout_band" in page and "loss_max" in page
    assert "2 passed, 1 failed, 0 not decided" in page


class _TagCollector(HTMLParser):
    """Counts start tags with the standard library's HTML tokenizer (WHATWG-style parsing)."""

    def __init__(self) -> None:
        super().__init__()
        self.tags: list[str] = []

    def handle_starttag(self, tag, attrs):
        self.tags.append(tag)


def test_stored_strings_are_escaped(page):
    # html.escape (Python docs, html module): < > & " ' become character references.
    assert HOSTILE_SERIAL not in page
    assert html.escape(HOSTILE_SERIAL, quote=True) in page
    assert "<east wall>" not in page and "&lt;east wall&gt;" in page
    collector = _TagCollector()
    collector.feed(page)
    assert "script" not in collector.tags
    assert collector.tags.count("img") == 4


def test_default_out_dir_is_under_benchctl_data(tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    with Store.open(tmp_path / "s.db") as store:
        run_id = store.begin_run(RunStart(procedure="efficiency_map", procedure_sha256="0" * 64,
                                          station_name="bench-3"))
        store.end_run(run_id, "completed")
        files = build_report(store, "latest")
    assert default_out_dir(run_id) == tmp_path.resolve() / "benchctl-data" / f"report-run{run_id}"
    assert files.html_path.resolve() == (tmp_path / "benchctl-data" / f"report-run{run_id}" / "report.html").resolve()
    # From a sub-folder of the project, the same data folder is found (upward, like a repository).
    sub = tmp_path / "notebooks" / "rev-b"
    sub.mkdir(parents=True)
    monkeypatch.chdir(sub)
    assert default_out_dir(run_id) == tmp_path.resolve() / "benchctl-data" / f"report-run{run_id}"


def test_run_without_points_still_reports_so(tmp_path):
    with Store.open(tmp_path / "empty.db") as store:
        run_id = store.begin_run(RunStart(procedure="efficiency_map", procedure_sha256="ab" * 32,
                                          station_name="bench-3", dut_part="FB-4805", dut_serial="S-1"))
        store.record_event(run_id, "error", "source did not answer *IDN?", {})
        store.end_run(run_id, "failed", "source did not answer")
        files = build_report(store, run_id, tmp_path / "out")
    text = files.html_path.read_text(encoding="utf-8")
    assert files.png_paths == ()
    assert list((tmp_path / "out").glob("*.png")) == []
    assert "recorded no points" in text
    assert "data:image/png" not in text
    assert "source did not answer *IDN?" in text and "failed" in text


# --------------------------------------------------------------------------- plots
def _ascending_line(ax, label: str):
    handles, labels = ax.get_legend_handles_labels()
    return handles[labels.index(label)]


def test_efficiency_plot_axes_curves_and_limit(points, filled):
    store, run_id, _ = filled
    limits = limit_marks(store.results(run_id))
    fig = plots.efficiency_vs_load(points, limits=limits, run_id=run_id)
    (ax,) = fig.axes
    assert ax.get_xlabel() == "output current (A)"
    assert ax.get_ylabel() == "efficiency (%)"
    # 4 line voltages x (ascending + descending) + one min line of the efficiency limit
    assert len(ax.lines) == 9
    texts = _legend_texts(ax)
    assert [t for t in texts if t.endswith(" V")] == ["36 V", "48 V", "60 V", "75 V"]
    assert "load ascending" in texts and "load descending" in texts
    (limit_text,) = [t for t in texts if t.startswith("limit ")]
    assert "efficiency_min" in limit_text and "≥ 86 %" in limit_text
    limit_lines = [ln for ln in ax.lines if ln.get_label().startswith("limit ")]
    assert np.allclose(limit_lines[0].get_ydata(), 86.0)  # 0.86 stored as a fraction, drawn in %
    # efficiency = Pout/Pin (common practice), recomputed here
    line = _ascending_line(ax, "48 V")
    expected = [flyback_point(48.0, i, False) for i in (0.5, 1.0, 1.25, 2.0, 2.5, 3.0, 3.75, 4.5, 5.0)]
    assert np.allclose(line.get_xdata(), [p["iout_a"] for p in expected])
    assert np.allclose(line.get_ydata(), [100 * p["pout_w"] / p["pin_w"] for p in expected])
    assert np.all(np.diff(line.get_xdata()) > 0)


def test_descending_pass_is_drawn_differently(points):
    ax = plots.efficiency_vs_load(points).axes[0]
    asc = _ascending_line(ax, "36 V")
    desc = [ln for ln in ax.lines if ln.get_label() == "_nolegend_" and ln.get_color() == asc.get_color()]
    assert len(desc) == 1
    assert asc.get_linestyle() == "-" and asc.get_fillstyle() == "full"
    assert desc[0].get_linestyle() == ":" and desc[0].get_fillstyle() == "none"
    assert desc[0].get_marker() != asc.get_marker()
    # the descending pass is its own data: the warmer pass has more loss, so lower efficiency
    assert np.all(np.asarray(desc[0].get_ydata()) < np.interp(desc[0].get_xdata(), asc.get_xdata(), asc.get_ydata()))


def test_each_line_voltage_has_its_own_colour(points):
    ax = plots.efficiency_vs_load(points).axes[0]
    colours = [_ascending_line(ax, f"{v:g} V").get_color() for v in VINS_V]
    assert len(set(colours)) == 4
    assert colours == [style.line_colour(k) for k in range(4)]


def test_no_limit_results_draw_nothing(points):
    ax = plots.efficiency_vs_load(points, limits=()).axes[0]
    assert len(ax.lines) == 8
    assert not any(t.startswith("limit ") for t in _legend_texts(ax))
    assert limit_marks(pd.DataFrame(columns=["name", "value", "unit", "details", "scope"])) == ()


def test_loss_plot_is_pin_minus_pout(points, filled):
    store, run_id, _ = filled
    ax = plots.loss_vs_load(points, limits=limit_marks(store.results(run_id))).axes[0]
    assert ax.get_xlabel() == "output current (A)" and ax.get_ylabel() == "loss, Pin − Pout (W)"
    line = _ascending_line(ax, "75 V")
    expected = [flyback_point(75.0, i, False) for i in (0.0, 0.5, 1.0, 1.25, 2.0, 2.5, 3.0, 3.75, 4.5, 5.0)]
    assert np.allclose(line.get_ydata(), [p["pin_w"] - p["pout_w"] for p in expected])  # loss = Pin - Pout
    limit_lines = [ln for ln in ax.lines if ln.get_label().startswith("limit loss_max")]
    assert len(limit_lines) == 1 and np.allclose(limit_lines[0].get_ydata(), 3.0)


def test_vout_plots_axes_nominal_and_band(points, filled):
    store, run_id, _ = filled
    limits = limit_marks(store.results(run_id))
    ax = plots.vout_vs_load(points, limits=limits, vout_nom_v=5.0).axes[0]
    assert (ax.get_xlabel(), ax.get_ylabel()) == ("output current (A)", "output voltage (V)")
    # 8 data lines + nominal + min and max of the band (one legend entry)
    assert len(ax.lines) == 11
    texts = _legend_texts(ax)
    assert "nominal 5 V" in texts and "limit vout_band: 4.95 … 5.05 V" in texts
    lo, hi = ax.get_ylim()
    assert lo < 4.95 and hi > 5.05

    ax = plots.vout_vs_line(points, limits=limits, vout_nom_v=5.0).axes[0]
    assert (ax.get_xlabel(), ax.get_ylabel()) == ("input voltage (V)", "output voltage (V)")
    loads = plots.representative_loads_a(points)
    assert loads[0] == 0.0 and loads[-1] == 5.0 and len(loads) == 5
    heavy = _ascending_line(ax, "5 A")
    assert np.allclose(heavy.get_xdata(), [v - 0.015 for v in VINS_V])
    assert np.allclose(heavy.get_ydata(), [flyback_point(v, 5.0, False)["vout_v"] for v in VINS_V])


def test_comparison_hook_draws_second_run_dashed(points, tmp_path):
    with Store.open(tmp_path / "b.db") as other_store:
        other_id = fill_run(other_store, with_limits=False, serial="B-2")
        other = other_store.points(other_id)
    other = other.assign(pin_w=other["pin_w"] * 1.02)  # the other revision loses 2 % more input power
    ax = plots.efficiency_vs_load(points, run_id=7, other_points=other, other_run_id=9).axes[0]
    texts = _legend_texts(ax)
    assert "run 7 · 48 V" in texts and "run 9 · 48 V" in texts
    mine, theirs = _ascending_line(ax, "run 7 · 48 V"), _ascending_line(ax, "run 9 · 48 V")
    assert mine.get_color() == theirs.get_color()
    assert mine.get_linestyle() == "-" and theirs.get_linestyle() == "--"
    assert np.allclose(np.asarray(theirs.get_ydata()), np.asarray(mine.get_ydata()) / 1.02)
    assert len(ax.lines) == 16


# --------------------------------------------------------------------------- registry
def test_a_registered_plot_joins_the_report_only_when_it_applies(tmp_path):
    store = Store.open(tmp_path / "reg.db")
    run_id = store.begin_run(RunStart(procedure="startup_check", procedure_sha256="cd" * 32, station_name="bench-3"))
    for k in range(5):  # output voltage only: none of the standard plots applies
        store.record_point(run_id, {"vout_v": 5.0 + 0.001 * k})
    store.end_run(run_id, "completed")

    @register_plot("test-settle-time", title="Settle time", order=90,
                   applies=lambda run: run.has_columns("vout_v"))
    def _settle(run):
        fig, (ax,) = style.new_figure()
        ax.plot(run.points["seq"], run.points["vout_v"])
        return [ReportFigure("settle-time", "Settle time", "test plot", fig)]

    @register_plot("test-never", title="Never", order=91, applies=lambda run: run.has_columns("no_such_q"))
    def _never(run):
        raise AssertionError("must not be called")

    @register_plot("test-broken", title="Broken plot", order=92, applies=lambda run: True)
    def _broken(run):
        raise ValueError("no data for <this>")

    try:
        files = build_report(store, run_id, tmp_path / "reg")
    finally:
        store.close()
        for key in ("test-settle-time", "test-never", "test-broken"):
            unregister_plot(key)
    names = [p.name for p in files.png_paths]
    assert names == ["01-settle-time.png"]
    assert len(files.notes) == 1 and "Broken plot" in files.notes[0]
    text = files.html_path.read_text(encoding="utf-8")
    assert "no data for &lt;this&gt;" in text


def test_limit_marks_read_tolerantly():
    frame = pd.DataFrame({
        "name": ["efficiency", "limit:a", "limit:b", "limit:c"],
        "value": [0.9, 0.87, np.nan, 5.2],
        "unit": ["", "", "V", "V"],
        "details": [{}, {"quantity": "efficiency", "min": 0.86, "passed": True},
                    {"spec": {"quantity": "vout_v", "max": 5.1}, "reason": "no point where it applies"},
                    {"limit": {"quantity": "vout_v", "max": 5.1, "min": 4.9}, "worst": {"value": 5.2}, "outcome": "fail"}],
        "scope": [{}, {}, {}, {}],
    })
    a, b, c = limit_marks(frame)
    assert (a.name, a.quantity, a.min_value, a.max_value, a.passed, a.worst_value) == ("a", "efficiency", 0.86, None, True, 0.87)
    assert (b.quantity, b.max_value, b.passed, b.worst_value, b.note) == ("vout_v", 5.1, None, None, "no point where it applies")
    assert (c.min_value, c.max_value, c.passed, c.worst_value) == (4.9, 5.1, False, 5.2)


# --------------------------------------------------------------------------- command
def test_cmd_report_writes_into_out(tmp_path, capsys):
    db_path = tmp_path / "cli.db"
    with Store.open(db_path) as store:  # a run without points keeps this test quick
        run_id = store.begin_run(RunStart(procedure="efficiency_map", procedure_sha256="ef" * 32,
                                          station_name="bench-3"))
        store.end_run(run_id, "interrupted", "stopped by the operator")
    parser = argparse.ArgumentParser()
    add_report_arguments(parser)
    args = parser.parse_args(["latest", "--db", str(db_path), "--out", str(tmp_path / "cli")])
    assert cmd_report(args) == 0
    text = (tmp_path / "cli" / "report.html").read_text(encoding="utf-8")
    assert f"Run {run_id} · efficiency_map" in text and "stopped by the operator" in text
    assert "report.html" in capsys.readouterr().out


def test_cmd_report_on_missing_database_says_what_to_do(tmp_path):
    from benchctl.errors import StoreError

    parser = argparse.ArgumentParser()
    add_report_arguments(parser)
    args = parser.parse_args(["latest", "--db", str(tmp_path / "nope.db")])
    with pytest.raises(StoreError, match="benchctl demo"):
        cmd_report(args)


def test_limits_stored_by_the_limit_check_are_drawn(tmp_path):
    # The limit check of benchctl.limits stores its own result shape; the report must read it.
    from benchctl.commands.check import load_run_data as check_run_data
    from benchctl.commands.check import record_check
    from benchctl.limits import check_limits, parse_limits

    spec = parse_limits(
        '[[limit]]\nname = "efficiency at half load and above"\nquantity = "efficiency"\nmin = 0.86\n'
        'where.iout_set_a = { min = 2.5 }\n\n'
        '[[limit]]\nname = "output band"\nquantity = "vout_v"\nmin = 4.95\nmax = 5.05\n'
    )
    with Store.open(tmp_path / "checked.db") as store:
        run_id = fill_run(store, with_limits=False)
        record_check(store, check_limits(spec, check_run_data(store, run_id)))
        marks = {m.name: m for m in limit_marks(store.results(run_id))}
        points = store.points(run_id)
    eff, band = marks["efficiency at half load and above"], marks["output band"]
    assert (eff.quantity, eff.min_value, eff.max_value) == ("efficiency", 0.86, None)
    assert "2.5" in eff.where
    assert (band.quantity, band.min_value, band.max_value, band.where) == ("vout_v", 4.95, 5.05, "")
    # worst efficiency at >= 2.5 A is the 75 V, 2.5 A descending point: recompute it from the model
    worst = min(p["pout_w"] / p["pin_w"] for v in VINS_V for i in (2.5, 3.0, 3.75, 4.5, 5.0)
                for d in (False, True) if not (d and i == 5.0) for p in [flyback_point(v, i, d)])
    assert eff.passed is (worst >= 0.86) and eff.worst_value == pytest.approx(worst)
    ax = plots.efficiency_vs_load(points, limits=tuple(marks.values())).axes[0]
    (line,) = [ln for ln in ax.lines if ln.get_label().startswith("limit efficiency at half load")]
    assert np.allclose(line.get_ydata(), 86.0)
