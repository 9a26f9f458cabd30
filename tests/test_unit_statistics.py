"""Statistics across a revision's units from the store: which run stands for each unit, what is
missing, and the per-point indices checked against a hand calculation."""

from __future__ import annotations

import math

import pytest

from benchctl.store import RunStart, Store
from benchctl.unit_statistics import revision_statistics

LIMITS = """
[[limit]]
name = "efficiency at 48 V"
quantity = "efficiency"
min = 0.85
max = 0.90
where.vin_set_v = 48.0
procedure = "efficiency_map"

[[limit]]
name = "phase margin"
quantity = "phase_margin_deg"
min = 45.0
procedure = "loop_gain"
"""

EFF = {"S1": 0.861, "S2": 0.864, "S3": 0.859, "S4": 0.866}


def _run(store, procedure, serial, status="completed", results=(), revision="B"):
    run_id = store.begin_run(RunStart(procedure=procedure, procedure_sha256="a" * 64, station_name="bench-1",
                                      dut_part="FB-48S05", dut_revision=revision, dut_serial=serial))
    store.record_point(run_id, {"vin_set_v": 48.0, "iout_set_a": 2.5, "vout_v": 5.0})
    store.record_results(run_id, list(results))
    store.end_run(run_id, status)
    return run_id


@pytest.fixture
def db(tmp_path):
    path = str(tmp_path / "rev.db")
    with Store.open(path) as store:
        for serial, eff in EFF.items():
            if serial == "S4":
                # S4: first a run that completed with a low value, then one that failed: the completed one stands
                _run(store, "efficiency_map", serial, results=[{"name": "efficiency", "value": eff,
                                                                "scope": {"vin_set_v": 48.0, "iout_set_a": 2.5},
                                                                "expanded_uncertainty": 0.0008}])
                _run(store, "efficiency_map", serial, status="failed")
                continue
            # an older run of the same unit with another value: only the latest completed one counts
            _run(store, "efficiency_map", serial, results=[{"name": "efficiency", "value": 0.5,
                                                            "scope": {"vin_set_v": 48.0, "iout_set_a": 2.5}}])
            _run(store, "efficiency_map", serial, results=[{"name": "efficiency", "value": eff,
                                                            "scope": {"vin_set_v": 48.0, "iout_set_a": 2.5},
                                                            "expanded_uncertainty": 0.0008}])
            _run(store, "loop_gain", serial, results=[{"name": "phase_margin_deg", "value": 60.0 + len(serial),
                                                       "scope": {"vin_set_v": 48.0, "iout_set_a": 2.5}}])
        _run(store, "efficiency_map", "OTHER", revision="A",
             results=[{"name": "efficiency", "value": 0.7, "scope": {"vin_set_v": 48.0, "iout_set_a": 2.5}}])
    (tmp_path / "limits.toml").write_text(LIMITS)
    return path, tmp_path / "limits.toml"


def test_latest_completed_run_per_unit_and_what_is_missing(db):
    path, limits = db
    with Store.open(path, read_only=True) as store:
        stats = revision_statistics(store, "FB-48S05", "B", limits=[limits])
    runs = stats.runs
    assert runs.serials == ("S1", "S2", "S3", "S4")
    emap = runs.latest[runs.latest["procedure"] == "efficiency_map"]
    assert len(emap) == 4
    kinds = {(m.serial, m.procedure, m.kind) for m in runs.missing}
    assert ("S4", "loop_gain", "never_run") in kinds
    assert ("S4", "efficiency_map", "later_not_completed") in kinds


def test_indices_per_operating_point_by_hand(db):
    path, limits = db
    with Store.open(path, read_only=True) as store:
        stats = revision_statistics(store, "FB-48S05", "B", limits=[limits])
    row = stats.table[stats.table["limit"] == "efficiency at 48 V"].iloc[0]
    assert row["point"] == "iout_set_a=2.5 vin_set_v=48" and row["n"] == 4
    # Hand calculation on the four units in measurement order 0.861, 0.864, 0.859, 0.866:
    x = [0.861, 0.864, 0.859, 0.866]
    mean = sum(x) / 4                                              # 0.8625
    s = math.sqrt(sum((v - mean) ** 2 for v in x) / 3)             # 0.0030551
    mr = (abs(0.864 - 0.861) + abs(0.859 - 0.864) + abs(0.866 - 0.859)) / 3  # 0.0050
    sw = mr / 1.1284                                               # d2 = 1.128 (n = 2)
    assert row["mean"] == pytest.approx(mean, rel=1e-12) and row["sd"] == pytest.approx(s, rel=1e-9)
    assert row["pp"] == pytest.approx((0.90 - 0.85) / (6 * s), rel=1e-9)           # 2.7277
    assert row["ppk"] == pytest.approx((mean - 0.85) / (3 * s), rel=1e-9)          # 1.3639
    assert row["cp"] == pytest.approx((0.90 - 0.85) / (6 * sw), rel=1e-4)          # 1.6807
    assert row["cpk"] == pytest.approx((mean - 0.85) / (3 * sw), rel=1e-4)         # 0.9403
    assert (row["min_serial"], row["max_serial"]) == ("S3", "S4")
    per = stats.per_serial[stats.per_serial["limit"] == "efficiency at 48 V"]
    assert per["serial"].tolist() == ["S1", "S2", "S3", "S4"]
    assert per["z"].tolist() == pytest.approx([(v - mean) / s for v in x], rel=1e-9)
    assert not per["outlier"].any()
    pm = stats.table[stats.table["limit"] == "phase margin"].iloc[0]
    assert pm["n"] == 3 and "one-sided" in pm["note"]
