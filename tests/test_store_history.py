"""Queries across stations: a DUT part over time, efficiency at an operating point per
revision. Runs are measured on three stations' own SQLite files, then imported into the
shared database (SQLite or PostgreSQL, ``store_url``) - the way the data gets there."""

from __future__ import annotations

import hashlib
import statistics

import pytest

from benchctl.errors import StoreError
from benchctl.store import RunStart, Store, summarize_by_revision


class Clock:
    def __init__(self, t: float) -> None:
        self.t = t

    def __call__(self) -> float:
        self.t += 1.0
        return self.t


def _loss_w(vin_v: float, iout_a: float, revision: str) -> float:
    """Invented flyback losses: fixed + conduction + switching; revision B is better."""
    k = {"A": 1.0, "B": 0.8, "C": 0.7}[revision]
    return k * (0.35 + 0.08 * iout_a**2 + 0.004 * vin_v)


def _measure(path, station: str, runs: list[tuple[str, str, str, float]]) -> None:
    """``runs``: (revision, serial, status, start time) measured on ``station``."""
    for revision, serial, status, t0 in runs:
        with Store.open(path, clock=Clock(t0), recover=False) as st:
            run_id = st.begin_run(RunStart(procedure="efficiency_map", procedure_sha256=hashlib.sha256(b"e").hexdigest(),
                                           station_name=station, dut_part="FB-48S05", dut_revision=revision,
                                           dut_serial=serial))
            for vin in (36.0, 48.0, 75.0):
                for iout in (1.0, 2.0):
                    pout = 5.0 * iout
                    st.record_point(run_id, {"vin_set_v": vin, "iout_set_a": iout, "vin_v": vin - 0.05,
                                             "pin_w": pout + _loss_w(vin, iout, revision), "pout_w": pout})
            st.end_run(run_id, status)


@pytest.fixture
def shared(tmp_path, store_url):
    day = 86_400.0
    plan = {
        "bench-1": [("A", "T1", "completed", 1.70e9), ("B", "T4", "completed", 1.70e9 + 10 * day)],
        "bench-2": [("A", "T2", "completed", 1.70e9 + day), ("B", "T5", "failed", 1.70e9 + 11 * day)],
        "bench-3": [("C", "T7", "completed", 1.70e9 + 20 * day), ("B", "T6", "completed", 1.70e9 + 12 * day)],
    }
    store = Store.open(store_url, recover=False)
    for station, runs in plan.items():
        path = tmp_path / f"{station}.db"
        _measure(path, station, runs)
        with Store.open(path, recover=False) as source:
            store.copy_runs_from(source)
    # another part on the same benches must not leak into the answers
    with Store.open(tmp_path / "bench-1.db", recover=False) as st:
        other = st.begin_run(RunStart(procedure="efficiency_map", procedure_sha256="0" * 64, station_name="bench-1",
                                      dut_part="POL-12-1V2", dut_revision="A"))
        st.record_point(other, {"vin_set_v": 48.0, "iout_set_a": 2.0, "pin_w": 11.0, "pout_w": 10.0})
        st.end_run(other, "completed")
        store.copy_runs_from(st)
    yield store
    store.close()


def test_runs_of_a_part_over_time_across_stations(shared):
    frame = shared.runs_of_part("FB-48S05")
    assert frame["dut_serial"].tolist() == ["T1", "T2", "T4", "T5", "T6", "T7"]  # by start time, not import order
    assert frame["station"].tolist() == ["bench-1", "bench-2", "bench-1", "bench-2", "bench-3", "bench-3"]
    assert frame["started_utc"].is_monotonic_increasing
    assert (frame["n_points"] == 6).all()
    assert shared.runs_of_part("FB-48S05", revision="B")["dut_serial"].tolist() == ["T4", "T5", "T6"]
    assert shared.runs_of_part("FB-48S05", status="failed")["dut_serial"].tolist() == ["T5"]
    assert shared.runs_of_part("NO-SUCH-PART").empty
    with pytest.raises(StoreError, match="part number"):
        shared.runs_of_part("")


def test_efficiency_at_an_operating_point_across_revisions(shared):
    points = shared.efficiency_at("FB-48S05", vin_v=48.0, iout_a=2.0)
    # failed run T5 left out; one point per completed run, oldest first
    assert points["dut_serial"].tolist() == ["T1", "T2", "T4", "T6", "T7"]
    for _, row in points.iterrows():
        # η = Pout / Pin (definition, common practice), from the invented loss model directly
        expected = 10.0 / (10.0 + _loss_w(48.0, 2.0, row["dut_revision"]))
        assert row["efficiency"] == pytest.approx(expected, rel=1e-12)
        assert (row["vin_v"], row["iout_a"]) == (48.0, 2.0)
    summary = summarize_by_revision(points)
    assert summary["dut_revision"].tolist() == ["A", "B", "C"]  # in order of first measurement
    assert summary["n_runs"].tolist() == [2, 2, 1]  # B: T4 and T6 (T5 failed)
    eff_a = 10.0 / (10.0 + _loss_w(48.0, 2.0, "A"))
    assert summary["efficiency_mean"].iloc[0] == pytest.approx(statistics.fmean([eff_a, eff_a]), rel=1e-12)
    assert summary["efficiency_mean"].tolist() == sorted(summary["efficiency_mean"])  # lower losses each revision

    # any status: the failed run joins revision B
    assert len(shared.efficiency_at("FB-48S05", vin_v=48.0, iout_a=2.0, status=None)) == 6
    # matching on the measured input voltage instead, with a tolerance (vin_v was stored 50 mV low)
    near = shared.efficiency_at("FB-48S05", vin_v=48.0, iout_a=2.0, vin_name="vin_v", vin_tol_v=0.1)
    assert len(near) == 5 and near["vin_v"].tolist() == [47.95] * 5
    assert shared.efficiency_at("FB-48S05", vin_v=48.0, iout_a=2.0, vin_name="vin_v").empty  # outside 1 µV
    assert shared.efficiency_at("FB-48S05", vin_v=60.0, iout_a=2.0).empty
    assert summarize_by_revision(shared.efficiency_at("FB-48S05", vin_v=60.0, iout_a=2.0)).empty
    with pytest.raises(StoreError, match="finite"):
        shared.efficiency_at("FB-48S05", vin_v=float("nan"), iout_a=2.0)
