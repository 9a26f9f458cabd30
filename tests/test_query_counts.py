"""`benchctl query efficiency` counts only the runs and points that have an efficiency there.

Five runs of one part pass through 48 V, 2.5 A; only one of them (the efficiency map)
recorded input and output power. The other four (loop gain, ripple ...) match the
setpoints but have no Pout/Pin: they are counted apart, not as runs with an efficiency.
"""

from __future__ import annotations

import json

import pytest

from benchctl.cli import main
from benchctl.store import RunStart, Store, summarize_by_revision


def _store(path) -> str:
    with Store.open(str(path)) as store:
        emap = store.begin_run(RunStart(procedure="efficiency_map", procedure_sha256="e" * 64, station_name="bench-1",
                                        dut_part="FB-48S05", dut_revision="B", dut_serial="0001"))
        store.record_point(emap, {"vin_set_v": 48.0, "iout_set_a": 2.5, "pin_w": 14.5, "pout_w": 12.5})
        store.end_run(emap, "completed")
        for procedure in ("loop_gain", "ripple", "load_transient", "switch_node"):
            other = store.begin_run(RunStart(procedure=procedure, procedure_sha256="f" * 64, station_name="bench-1",
                                             dut_part="FB-48S05", dut_revision="B", dut_serial="0001"))
            store.record_point(other, {"vin_set_v": 48.0, "iout_set_a": 2.5, "vout_v": 5.0})
            store.end_run(other, "completed")
    return str(path)


def test_summary_counts_only_points_with_an_efficiency(tmp_path):
    db = _store(tmp_path / "q.db")
    with Store.open(db) as store:
        points = store.efficiency_at("FB-48S05", vin_v=48.0, iout_a=2.5)
    assert len(points) == 5 and points["efficiency"].notna().sum() == 1
    summary = summarize_by_revision(points)
    row = summary.iloc[0]
    assert (row["n_runs"], row["n_points"], row["n_points_without_efficiency"]) == (1, 1, 4)
    # η = Pout/Pin (definition of converter efficiency): 12.5 W / 14.5 W
    assert row["efficiency_mean"] == pytest.approx(12.5 / 14.5, rel=1e-12)


def test_a_revision_without_any_efficiency_keeps_its_row_with_zero_counts(tmp_path):
    db = _store(tmp_path / "q.db")
    with Store.open(db) as store:
        points = store.efficiency_at("FB-48S05", vin_v=48.0, iout_a=2.5)
    summary = summarize_by_revision(points[points["efficiency"].isna()])
    assert summary["n_runs"].tolist() == [0] and summary["n_points_without_efficiency"].tolist() == [4]
    assert summary["efficiency_mean"].isna().all()


def test_the_command_prints_the_honest_counts(tmp_path, capsys):
    db = _store(tmp_path / "q.db")
    assert main(["query", "efficiency", "FB-48S05", "--vin", "48", "--iout", "2.5", "--db", db, "--json"]) == 0
    rows = json.loads(capsys.readouterr().out)
    assert [(r["n_runs"], r["n_points"], r["n_points_without_efficiency"]) for r in rows] == [(1, 1, 4)]
    assert main(["query", "efficiency", "FB-48S05", "--vin", "48", "--iout", "2.5", "--db", db]) == 0
    out = capsys.readouterr().out
    assert "4 more matching point(s) have no efficiency" in out
