"""A night over three units end to end on the simulated bench: `benchctl job` with three serials,
then the statistics across the units (capability checked against a hand calculation on the same
stored numbers), the revision summary, and the web view of that night."""

from __future__ import annotations

import math
from pathlib import Path

import junitparser
import pytest

from benchctl.cli import EXIT_OK, main
from benchctl.procedure import procedures_dir
from benchctl.store import Store
from benchctl.unit_statistics import revision_statistics

SERIALS = ["N001", "N002", "N003"]


@pytest.fixture(scope="module")
def night(tmp_path_factory):
    from benchctl.simulated_instruments.bench import SimulatedBench

    tmp = tmp_path_factory.mktemp("night")
    limits = procedures_dir() / "limits" / "flyback-48v-5v.toml"
    job = tmp / "night.toml"
    job.write_text(
        '[job]\nname = "night FB-48S05 rev B"\ndut_part = "FB-48S05"\ndut_revision = "B"\n'
        f'dut_serials = {SERIALS!r}\n'.replace("'", '"') + 'unit_change = "fixed"\n\n'
        f'[[step]]\nprocedure = "efficiency_map"\nlimits = "{limits}"\n'
        "[step.parameters]\nvin_v = [36.0, 48.0, 75.0]\nload_pct = [0.0, 25.0, 50.0, 75.0, 100.0]\n\n"
        f'[[step]]\nprocedure = "loop_gain"\nlimits = "{limits}"\n')
    bench = SimulatedBench("flyback-48v-5v", time_scale=50.0, seed=3, reading_time_s=1e-4).start()
    try:
        station = bench.write_station(tmp / "station.toml")
        db = tmp / "night.db"
        code = main(["job", str(job), "--station", str(station), "--db", str(db), "--junit", str(tmp / "night.xml")])
    finally:
        bench.stop()
    return {"dir": tmp, "db": str(db), "code": code, "limits": limits}


def test_the_night_ran_every_step_on_every_unit(night):
    assert night["code"] == EXIT_OK
    with Store.open(night["db"], read_only=True) as store:
        runs = store.runs().sort_values("run_id")
    assert runs["dut_serial"].tolist() == [s for s in SERIALS for _ in range(2)]
    assert runs["procedure"].tolist() == ["efficiency_map", "loop_gain"] * 3
    assert set(runs["status"]) == {"completed"} and runs["job_id"].nunique() == 1
    suites = list(junitparser.JUnitXml.fromfile(str(night["dir"] / "night.xml")))
    assert len(suites) == 6 and all(s.failures == 0 and s.errors == 0 for s in suites)


def _stored_results(store, procedure, name, scope_keys):
    """Per serial, in measurement order, the stored result ``name`` at ``scope_keys``."""
    out = []
    runs = store.runs(procedure=procedure).sort_values("run_id")
    for r in runs.itertuples(index=False):
        res = store.results(int(r.run_id))
        sel = [row for row in res.itertuples(index=False) if row.name == name
               and all(row.scope.get(k) == v for k, v in scope_keys.items())]
        assert len(sel) == 1
        out.append((r.dut_serial, float(sel[0].value)))
    return out


def test_capability_across_the_three_units_by_hand(night):
    with Store.open(night["db"], read_only=True) as store:
        stats = revision_statistics(store, "FB-48S05", "B", limits=[night["limits"]])
        # Same numbers, read independently: the load regulation at 48 V of each unit (limit -1 % ... +1 %)
        values = _stored_results(store, "efficiency_map", "load_regulation_pct", {"vin_set_v": 48.0})
        eff = _stored_results(store, "efficiency_map", "efficiency", {"vin_set_v": 48.0, "iout_set_a": 2.5})
    assert [s for s, _ in values] == SERIALS
    x = [v for _, v in values]
    # Hand calculation (ISO 22514-2 indices, normal model; from memory, see benchctl.analysis.capability):
    n = 3
    mean = (x[0] + x[1] + x[2]) / n
    s = math.sqrt(((x[0] - mean) ** 2 + (x[1] - mean) ** 2 + (x[2] - mean) ** 2) / (n - 1))
    mr_bar = (abs(x[1] - x[0]) + abs(x[2] - x[1])) / 2
    sigma_within = mr_bar / 1.128                                  # d2 for n = 2 (from memory)
    lsl, usl = -1.0, 1.0
    pp = (usl - lsl) / (6 * s)
    ppk = min(usl - mean, mean - lsl) / (3 * s)
    cp = (usl - lsl) / (6 * sigma_within)
    cpk = min(usl - mean, mean - lsl) / (3 * sigma_within)
    row = stats.table[(stats.table["limit"] == "load regulation within +/-1 %")
                      & (stats.table["point"] == "vin_set_v=48")].iloc[0]
    assert row["n"] == 3 and row["mean"] == pytest.approx(mean, rel=1e-12) and row["sd"] == pytest.approx(s, rel=1e-9)
    assert row["pp"] == pytest.approx(pp, rel=1e-9) and row["ppk"] == pytest.approx(ppk, rel=1e-9)
    # the table's d2 = 1.128 is 2/sqrt(pi) = 1.12838 rounded: 3.4e-4 apart
    assert row["cp"] == pytest.approx(cp, rel=5e-4) and row["cpk"] == pytest.approx(cpk, rel=5e-4)
    assert row["min"] == min(x) and row["max"] == max(x)
    # a one-sided limit: efficiency at 48 V half load and above (min 0.85): only Ppk = (x̄ − L) / 3 s
    e = [v for _, v in eff]
    e_mean = sum(e) / 3
    e_s = math.sqrt(sum((v - e_mean) ** 2 for v in e) / 2)
    erow = stats.table[(stats.table["limit"] == "efficiency at 48 V, half load and above")
                       & (stats.table["point"] == "iout_set_a=2.5 vin_set_v=48")].iloc[0]
    assert math.isnan(erow["pp"]) and erow["ppk"] == pytest.approx((e_mean - 0.85) / (3 * e_s), rel=1e-9)
    per = stats.per_serial[stats.per_serial["limit"] == "load regulation within +/-1 %"]
    assert set(per["serial"]) == set(SERIALS)
    assert not stats.runs.missing


def test_the_statistics_from_the_command_line(night, capsys):
    assert main(["stats", "FB-48S05", "B", "--limits", str(night["limits"]), "--db", night["db"], "--json"]) == 0
    import json

    data = json.loads(capsys.readouterr().out)
    assert data["serials"] == SERIALS and len(data["runs"]) == 6
    assert any(r["limit"] == "phase margin at every corner" for r in data["statistics"])


def test_the_revision_summary_of_the_night(night, capsys):
    out = night["dir"] / "summary"
    code = main(["revision", "FB-48S05", "B", "--limits", str(night["limits"]), "--db", night["db"],
                 "--out", str(out)])
    assert code == EXIT_OK, capsys.readouterr().out
    page = (out / "revision.html").read_text(encoding="utf-8")
    for text in SERIALS + ["Evidence matrix", "What is missing", "Spread across units", "Instruments",
                           "Provenance", "Every required limit passed on every unit"]:
        assert text in page
    pngs = sorted(out.glob("*.png"))
    assert len(pngs) >= 3 and all(p.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n" for p in pngs)
    assert "ripple: procedure ripple was not run on any unit" in page  # what the night did not measure


def test_the_web_view_of_the_night(night):
    pytest.importorskip("flask", reason="the web view needs the web extra")
    from benchctl.web.app import create_app

    with Store.open(night["db"], read_only=True) as store:
        client = create_app(store, limits=[night["limits"]]).test_client()
        jobs = client.get("/jobs").get_data(as_text=True)
        assert "night FB-48S05 rev B" in jobs and "passed" in jobs
        assert all(s in jobs for s in SERIALS)
        index = client.get("/").get_data(as_text=True)
        assert "FB-48S05" in index and "summary" in index
        rev = client.get("/revision?part=FB-48S05&rev=B")
        assert rev.status_code == 200 and "Every required limit passed" in rev.get_data(as_text=True)
        trend = client.get("/trend?part=FB-48S05&quantity=phase_margin_deg").get_data(as_text=True)
        assert all(s in trend for s in SERIALS)
