"""Uncertainty and data quality are visible: ± U in the summary and the report, error bars in
the plots, unsettled and unverified points drawn hollow and ringed and counted everywhere.

A run is filled through the store API: a flyback efficiency map (36 and 75 V, 0-5 A) with
the station's instrument accuracy stored in its station text, two points that did not
settle or verify, and the bundled procedure's own analysis (through the runner's
``store_results``, which re-reads the accuracy from the stored station text).
"""

from __future__ import annotations

import io

import numpy as np
import pytest
from matplotlib.container import ErrorbarContainer
from rich.console import Console

from benchctl.commands import summary
from benchctl.procedure import load_procedure
from benchctl.report import build_report, plots, style
from benchctl.runner import store_results
from benchctl.store import RunStart, Store, sha256_hex

STATION_TEXT = """
[station]
name = "bench-7"

[limits]
source_voltage_max_v = 80.0
source_current_max_a = 3.0
dut_output_voltage_max_v = 6.0
load_current_max_a = 6.0
load_power_max_w = 35.0

[instruments.input_meter]
driver = "power_meter"
resource = "TCPIP::192.0.2.21::5025::SOCKET"
[instruments.input_meter.accuracy]
power = { pct_of_reading = 0.1, offset = 0.002 }

[instruments.output_meter]
driver = "power_meter"
resource = "TCPIP::192.0.2.22::5025::SOCKET"
[instruments.output_meter.accuracy]
power = { pct_of_reading = 0.05, offset = 0.001 }
voltage = { pct_of_reading = 0.02, offset = 0.001 }
"""

LOADS_A = (0.0, 1.25, 2.5, 3.75, 5.0)
UNSETTLED = (36.0, 2.5)
UNVERIFIED = (75.0, 1.25)


def _point(vin: float, iout: float) -> dict[str, float]:
    vout = 5.02 - 0.012 * iout + 0.0004 * (vin - 48.0)
    pout = vout * iout
    pin = pout + 0.35 + 0.004 * vin + 0.09 * iout + 0.055 * iout ** 2
    return {"vin_set_v": vin, "iout_set_a": iout, "vin_v": vin, "iin_a": pin / vin, "pin_w": pin,
            "vout_v": vout, "iout_a": iout, "pout_w": pout, "pin_sd_w": 0.01, "pout_sd_w": 0.004,
            "vout_sd_v": 0.0005, "n_readings": 8.0}


@pytest.fixture(scope="module")
def run(tmp_path_factory):
    root = tmp_path_factory.mktemp("report-u")
    store = Store.open(root / "bench.db")
    proc = load_procedure("efficiency_map")
    params = proc.resolve_parameters(values={"vin_v": [36.0, 75.0], "load_pct": [0.0, 25.0, 50.0, 75.0, 100.0],
                                             "iout_rated_a": 5.0, "vout_nom_v": 5.0})
    run_id = store.begin_run(RunStart(procedure="efficiency_map", procedure_sha256=sha256_hex("p"),
                                      station_name="bench-7", station_text=STATION_TEXT,
                                      parameters=params.as_dict()))
    for vin in (36.0, 75.0):
        for iout in LOADS_A:
            if (vin, iout) == UNSETTLED:
                info = {"method": "exponential_fit", "verified": True, "reason": "no convergence within 5 s"}
                store.record_point(run_id, _point(vin, iout), tag="ascending", settled=False, settle_info=info)
            elif (vin, iout) == UNVERIFIED:
                info = {"method": "exponential_fit", "verified": False, "reason": "load current 0.61 A, set 1.25 A"}
                store.record_point(run_id, _point(vin, iout), tag="ascending", settled=False, settle_info=info)
            else:
                store.record_point(run_id, _point(vin, iout), tag="ascending",
                                   settle_info={"method": "exponential_fit", "verified": True, "reason": ""})
    store_results(store, run_id, proc, params)
    store.end_run(run_id, "completed")
    files = build_report(store, run_id, root / "out")
    yield store, run_id, files
    store.close()


def test_results_are_stored_with_standard_and_expanded_uncertainty(run):
    store, run_id, _ = run
    res = store.results(run_id)
    eff = res[res["name"] == "efficiency"]
    assert eff["uncertainty"].notna().all()
    # GUM 6.2.1: U = k u with k = 2.
    assert np.allclose(eff["expanded_uncertainty"].to_numpy(), 2 * eff["uncertainty"].to_numpy(), rtol=1e-12)
    for name in ("loss_w", "line_regulation_pct", "load_regulation_pct", "average_efficiency_4pt"):
        assert res[res["name"] == name]["expanded_uncertainty"].notna().any(), name


def test_summary_shows_plus_minus_and_counts_doubtful_points(run):
    store, run_id, _ = run
    points, results = store.points(run_id), store.results(run_id)
    buf = io.StringIO()
    con = Console(file=buf, width=220, color_system=None)
    con.print(summary.efficiency_grid(points, results))
    con.print(summary.results_table(results))
    text = buf.getvalue()
    assert "±" in text and "expanded uncertainty U (k = 2)" in text
    # The unsettled 36 V / 2.5 A cell is marked.
    row = next(line for line in text.splitlines() if line.strip().startswith("│") and " 2.5 " in line[:14])
    assert "*" in row
    lines = summary.quality_lines(points, results)
    assert lines[0].startswith("2 of 10 point(s) not trustworthy: 1 unsettled, 1 unverified")
    assert "0.61 A" in lines[0] and "no convergence" in lines[0]
    assert "flagged (unsettled, unverified)" in lines[1]


def test_plots_draw_error_bars_and_ring_doubtful_points(run):
    store, run_id, _ = run
    points, results = store.points(run_id), store.results(run_id)
    fig = plots.efficiency_vs_load(points, results=results, run_id=run_id)
    ax = fig.axes[0]
    bars = [c for c in ax.containers if isinstance(c, ErrorbarContainer)]
    assert bars, "no error bars"
    # The bar half-length is U in %-points: compare one with the stored U of the same point.
    res = results[(results["name"] == "efficiency")]
    u_pct = 100 * float(res["expanded_uncertainty"].iloc[0])
    half_lengths = [(seg[1][1] - seg[0][1]) / 2 for b in bars for seg in b.lines[2][0].get_segments()]
    assert min(abs(h - u_pct) for h in half_lengths) < 1e-9 * u_pct
    rings = [ln for ln in ax.lines if ln.get_color() == style.DOUBTFUL_INK]
    assert len(rings) == 1 and sorted(rings[0].get_xdata()) == [1.25, 2.5]  # 75 V / 1.25 A and 36 V / 2.5 A
    legend = [t.get_text() for t in ax.get_legend().get_texts()]
    assert "error bar: ±U (k = 2)" in legend and "unsettled or unverified (2)" in legend
    # Without results: no error bars, and the doubtful points are still ringed.
    bare = plots.loss_vs_load(points).axes[0]
    assert not [c for c in bare.containers if isinstance(c, ErrorbarContainer)]
    assert [t.get_text() for t in bare.get_legend().get_texts()][-1] == "unsettled or unverified (2)"


def test_html_report_has_a_data_quality_section_and_plus_minus(run):
    _, _, files = run
    page = files.html_path.read_text(encoding="utf-8")
    assert "<h2>Data quality</h2>" in page
    quality = page.split("<h2>Data quality</h2>")[1].split("<h2>")[0]
    assert "2 point(s) did not settle or had a setpoint off" in quality
    assert "unverified" in quality and "0.61 A" in quality
    assert "(2 unsettled or unverified)" in page  # in the facts
    results = page.split("<h2>Results</h2>")[1].split("<h2>")[0]
    assert "±" in results and "U ≤" in results
    assert "Error bars: expanded uncertainty U (k = 2" in page


def test_run_summary_and_check_table_print_plus_minus_and_the_new_verdicts(run, tmp_path, capsys):
    from benchctl.commands.check import check_run
    from benchctl.cli import EXIT_NOT_CHECKED

    store, run_id, _ = run
    summary.print_run_summary(store, run_id)
    out = capsys.readouterr().out
    assert "±" in out and "2 of 10 point(s) not trustworthy" in out
    res = store.results(run_id)
    eff = res[(res["name"] == "efficiency")]
    one = next(r for _, r in eff.iterrows() if r["scope"]["vin_set_v"] == 75.0 and r["scope"]["iout_set_a"] == 3.75)
    # A guarded minimum U/2 below a settled point's value: that value is borderline (ILAC-G8:09/2019
    # 4.2.3); a loose maximum on the loss passes every value except those of the two doubtful points: suspect.
    limits = tmp_path / "lim.toml"
    limits.write_text(
        f'[[limit]]\nname = "one efficiency"\nquantity = "efficiency"\n'
        f'min = {float(one["value"] - one["expanded_uncertainty"] / 2)!r}\n'
        'decision = "guarded"\nwhere.vin_set_v = 75.0\nwhere.iout_set_a = 3.75\n\n'
        '[[limit]]\nname = "loss"\nquantity = "loss_w"\nmax = 100.0\n', encoding="utf-8")
    report = check_run(store, run_id, limits, junit_path=tmp_path / "c.xml", record=False)
    out = capsys.readouterr().out
    assert [o.status for o in report.outcomes] == ["borderline", "suspect"]
    assert report.exit_code == EXIT_NOT_CHECKED
    assert "BORDERLINE" in out and "SUSPECT" in out and "(guarded)" in out and "±" in out
    xml = (tmp_path / "c.xml").read_text(encoding="utf-8")
    assert 'type="limit_borderline"' in xml and 'type="limit_suspect"' in xml and 'failures="0"' in xml
