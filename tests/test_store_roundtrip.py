"""Round trip through the store: provenance, points (wide and long), units, events, results.

Every test taking ``store_url`` (tests/conftest.py) runs on SQLite and on PostgreSQL.
"""

from __future__ import annotations

import hashlib
import math
from datetime import datetime, timedelta, timezone

import numpy as np
import pandas as pd
import pytest

from benchctl.errors import StoreError
from benchctl.store import InstrumentInfo, RunStart, Store, sha256_hex

EPOCH = datetime(1970, 1, 1, tzinfo=timezone.utc)

FLYBACK_STATION = """\
[station]
name = "sim-flyback"
description = "36-75 V telecom-input flyback, 5 V out"
[roles.source]
driver = "dc_source"
resource = "TCPIP::127.0.0.1::5025::SOCKET"
"""


class FakeClock:
    """Deterministic UTC clock: starts at a fixed epoch second and steps 0.25 s per call."""

    def __init__(self, start_s: float = 1_700_000_000.0, step_s: float = 0.25) -> None:
        self.t = start_s
        self.step = step_s

    def __call__(self) -> float:
        self.t += self.step
        return self.t


def flyback_start(**overrides: object) -> RunStart:
    fields: dict[str, object] = dict(
        procedure="efficiency_map",
        procedure_sha256=hashlib.sha256(b"def run(bench): ...\n").hexdigest(),
        parameters={"vin_v": [36.0, 48.0, 75.0], "iout_a": [0.5, 1.0, 2.0], "settle_s": 0.2},
        station_name="sim-flyback",
        station_description="36-75 V telecom-input flyback",
        station_text=FLYBACK_STATION,
        instruments=[
            InstrumentInfo("source", "dc_source", "TCPIP::127.0.0.1::5025::SOCKET", "SIM,sim dc source,0001,1.0"),
            InstrumentInfo("load", "electronic_load", "TCPIP::127.0.0.1::5026::SOCKET", "SIM,EL-150,0002,1.0"),
        ],
        dut_part="FB-48-5",
        dut_revision="B",
        dut_serial="0007",
        operator="night-shift",
        host="bench-pc-3",
        pid=4242,
        benchctl_version="0.1.0",
        job_id=17,
    )
    fields.update(overrides)
    return RunStart(**fields)  # type: ignore[arg-type]


@pytest.fixture()
def store(store_url):
    with Store.open(store_url, clock=FakeClock(), recover=False) as s:
        yield s


def test_sha256_helper_matches_published_vector():
    # FIPS 180-2, Appendix B.1: SHA-256("abc")
    assert sha256_hex("abc") == "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad"


def test_provenance_round_trip(store_url):
    clock = FakeClock(start_s=1_700_000_000.0, step_s=0.25)
    store = Store.open(store_url, clock=clock, recover=False)
    start = flyback_start()
    clock.t = 1_700_000_000.0  # the run's start is the next tick
    run_id = store.begin_run(start)
    info = store.run(run_id)
    assert info.run_id == run_id and isinstance(run_id, int)
    assert info.procedure == "efficiency_map"
    assert info.procedure_sha256 == start.procedure_sha256
    assert dict(info.parameters) == start.parameters  # JSON round trip (RFC 8259 numbers, arrays)
    assert info.station_name == "sim-flyback"
    assert info.station_description == "36-75 V telecom-input flyback"
    assert info.station_text == FLYBACK_STATION
    # hashlib (Python stdlib, FIPS 180-4 SHA-256) computed independently of the store
    assert info.station_sha256 == hashlib.sha256(FLYBACK_STATION.encode()).hexdigest()
    assert info.instruments == tuple(start.instruments)
    assert (info.dut_part, info.dut_revision, info.dut_serial) == ("FB-48-5", "B", "0007")
    assert (info.operator, info.host, info.pid) == ("night-shift", "bench-pc-3", 4242)
    assert info.benchctl_version == "0.1.0"
    assert info.job_id == 17
    assert info.status == "running" and info.ended_utc is None and info.message == ""
    # First clock tick 1_700_000_000.25 s after the Unix epoch, in UTC (POSIX time, common practice)
    assert info.started_utc == EPOCH + timedelta(seconds=1_700_000_000.25)
    assert info.n_points == 0

    store.end_run(run_id, "completed", message="all 9 points measured")
    done = store.run(run_id)
    assert done.status == "completed" and done.message == "all 9 points measured"
    assert done.ended_utc is not None and done.ended_utc > done.started_utc
    store.close()


def test_station_and_dut_rows_are_shared_between_runs(store):
    a = store.begin_run(flyback_start())
    b = store.begin_run(flyback_start(dut_serial="0008"))
    c = store.begin_run(flyback_start(station_text=FLYBACK_STATION + "# edited\n"))
    ia, ib, ic = store.run(a), store.run(b), store.run(c)
    assert ia.dut_serial == "0007" and ib.dut_serial == "0008"
    assert ia.station_sha256 == ib.station_sha256 != ic.station_sha256


def test_begin_run_rejects_bad_provenance(store):
    with pytest.raises(StoreError, match="procedure_sha256"):
        store.begin_run(flyback_start(procedure_sha256="abc"))
    with pytest.raises(StoreError, match="does not match"):
        store.begin_run(flyback_start(station_sha256="0" * 64))
    with pytest.raises(StoreError, match="roles repeat"):
        store.begin_run(
            flyback_start(instruments=[InstrumentInfo("load", "a", "r1"), InstrumentInfo("load", "b", "r2")])
        )
    with pytest.raises(StoreError, match="JSON"):
        store.begin_run(flyback_start(parameters={"bad": object()}))


def _efficiency_points():
    """Flyback line x load grid; η = Pout/Pin with an invented, plausible loss model."""
    rows = []
    for tag, vins in (("ascending", (36.0, 48.0, 75.0)), ("descending", (75.0, 48.0, 36.0))):
        for vin in vins:
            iout = 2.0
            vout = 5.0 - 0.004 * iout
            pout = vout * iout
            pin = pout + 0.4 + 0.002 * vin
            rows.append((tag, {"vin_v": vin, "iin_a": pin / vin, "vout_v": vout, "iout_a": iout,
                               "pin_w": pin, "pout_w": pout}))
    return rows


def test_points_wide_matches_pandas_pivot_of_long_form(store):
    run_id = store.begin_run(flyback_start())
    expected = _efficiency_points()
    for i, (tag, values) in enumerate(expected):
        seq = store.record_point(run_id, values, tag=tag, settled=i != 2, settle_time_s=0.1 * (i + 1))
        assert seq == i + 1
    # a later point with a quantity the others lack, and one missing value (NaN stored as missing)
    store.record_point(run_id, {"vin_v": 48.0, "vout_v": float("nan"), "temp_c": 41.5}, units={"temp_c": "degC"})

    wide = store.points(run_id)
    long = store.points_long(run_id)
    assert list(wide.columns[:7]) == ["seq", "t_utc", "tag", "settled", "settle_time_s", "settle_info",
                                      "settle_reason"]
    assert list(wide.columns[7:]) == ["vin_v", "iin_a", "vout_v", "iout_a", "pin_w", "pout_w", "temp_c"]
    assert wide["seq"].tolist() == list(range(1, len(expected) + 2))
    assert wide["tag"].tolist() == [t for t, _ in expected] + [""]
    assert wide["settled"].tolist() == [i != 2 for i in range(len(expected))] + [True]
    assert wide["settle_time_s"].iloc[:-1].tolist() == pytest.approx([0.1 * (i + 1) for i in range(len(expected))])
    assert math.isnan(wide["settle_time_s"].iloc[-1])

    # Reference: pandas.DataFrame.pivot (library) applied to the long form must give the same table.
    ref = long.pivot(index="seq", columns="quantity", values="value").reindex(columns=list(wide.columns[7:]))
    got = wide.set_index("seq")[list(wide.columns[7:])]
    ref.columns.name = None
    pd.testing.assert_frame_equal(got, ref, check_dtype=False, check_names=False)

    # Values round-trip exactly (IEEE 754 binary64 stored as REAL, SQLite docs "Datatypes" §2)
    for i, (_, values) in enumerate(expected):
        for name, value in values.items():
            assert wide.loc[i, name] == value
    last = wide.iloc[-1]
    assert last["vin_v"] == 48.0 and last["temp_c"] == 41.5
    assert math.isnan(last["vout_v"]) and math.isnan(last["iout_a"])
    # efficiency recomputed from stored columns equals the definition η = Pout/Pin (common practice)
    eff = (wide["vout_v"] * wide["iout_a"] / wide["pin_w"]).iloc[:-1]
    assert eff.tolist() == pytest.approx([v["pout_w"] / v["pin_w"] for _, v in expected])

    # long form: one row per stored value (the NaN is kept as a row with a missing value)
    assert len(long) == sum(len(v) for _, v in expected) + 3
    assert set(long.columns) >= {"seq", "t_utc", "tag", "settled", "quantity", "value", "unit"}


def test_units_given_inferred_and_conflicting(store):
    run_id = store.begin_run(flyback_start())
    store.record_point(run_id, {"vin_v": 48.0, "iout_a": 1.0, "eff_pct": 88.0, "gain_db": -3.0,
                                "phase_deg": -120.0, "fsw_hz": 1.0e5, "duty": 0.4, "tj": 55.0},
                       units={"tj": "degC"})
    # inferred from the project's unit-suffix naming convention (vin_v -> V ...); plain SI symbols
    assert store.quantity_units(run_id) == {
        "vin_v": "V", "iout_a": "A", "eff_pct": "%", "gain_db": "dB", "phase_deg": "deg",
        "fsw_hz": "Hz", "duty": "", "tj": "degC",
    }
    with pytest.raises(StoreError, match="recorded in 'V'"):
        store.record_point(run_id, {"vin_v": 48000.0}, units={"vin_v": "mV"})
    # the refused point left nothing behind, and the next one gets the next number
    assert store.last_point(run_id) == 1
    assert store.record_point(run_id, {"vin_v": 36.0}, units={"vin_v": "V"}) == 2


def test_point_values_must_be_numbers_and_names_not_reserved(store):
    run_id = store.begin_run(flyback_start())
    with pytest.raises(StoreError, match="not a number|text"):
        store.record_point(run_id, {"mode": "CCM"})
    with pytest.raises(StoreError, match="cannot name a quantity"):
        store.record_point(run_id, {"seq": 1.0})
    with pytest.raises(StoreError, match="at least one value"):
        store.record_point(run_id, {})
    # numpy scalars and ints are accepted and stored as float
    store.record_point(run_id, {"vin_v": np.float32(48.0), "n_cycles": 3, "ok": True})
    wide = store.points(run_id)
    assert wide[["vin_v", "n_cycles", "ok"]].iloc[0].tolist() == [48.0, 3.0, 1.0]


def test_sequence_numbers_of_two_runs_are_independent(store):
    # common practice: a per-run counter, starting at 1, unaffected by other runs
    flyback = store.begin_run(flyback_start())
    buck = store.begin_run(flyback_start(procedure="load_regulation", station_name="sim-pol-buck",
                                         dut_part="POL-12-1V2", dut_revision="A", dut_serial="0001"))
    seqs: dict[int, list[int]] = {flyback: [], buck: []}
    for k in range(5):
        seqs[flyback].append(store.record_point(flyback, {"vin_v": 48.0, "iout_a": 0.5 * k}))
        seqs[buck].append(store.record_point(buck, {"vin_v": 12.0, "vout_v": 1.2, "iout_a": 2.0 * k}))
        if k % 2:
            seqs[buck].append(store.record_point(buck, {"vin_v": 12.0, "vout_v": 1.2, "iout_a": 2.0 * k + 1}))
    assert seqs[flyback] == [1, 2, 3, 4, 5]
    assert seqs[buck] == list(range(1, 8))
    assert store.last_point(flyback) == 5 and store.last_point(buck) == 7
    assert store.points(buck)["iout_a"].tolist() == [0.0, 2.0, 3.0, 4.0, 6.0, 7.0, 8.0]


def test_a_reopened_store_continues_the_sequence(store_url):
    path = store_url
    with Store.open(path, recover=False) as s:
        run_id = s.begin_run(flyback_start())
        s.record_point(run_id, {"vin_v": 36.0})
        s.record_point(run_id, {"vin_v": 48.0})
    with Store.open(path, recover=False) as s:
        assert s.last_point(run_id) == 2
        assert s.record_point(run_id, {"vin_v": 75.0, "vout_v": 5.0}) == 3
        assert s.points(run_id)["vin_v"].tolist() == [36.0, 48.0, 75.0]


def test_ended_run_takes_no_more_points_and_cannot_end_twice(store):
    run_id = store.begin_run(flyback_start())
    store.record_point(run_id, {"vin_v": 48.0})
    store.end_run(run_id, "tripped", message="vout 6.3 V above limit 6.0 V")
    with pytest.raises(StoreError, match="tripped"):
        store.record_point(run_id, {"vin_v": 48.0})
    with pytest.raises(StoreError, match="already ended"):
        store.end_run(run_id, "completed")
    with pytest.raises(StoreError, match="status"):
        store.end_run(store.begin_run(flyback_start()), "finished")
    with pytest.raises(StoreError, match="no run 999"):
        store.record_point(999, {"vin_v": 1.0})
    # results may still be added after the run ended (analysis done later)
    store.record_result(run_id, "efficiency_pct", 87.5, unit="%")
    assert store.results(run_id)["value"].tolist() == [87.5]


def test_events_and_results_round_trip(store):
    run_id = store.begin_run(flyback_start())
    store.record_point(run_id, {"vin_v": 75.0, "vout_v": 6.3})
    trip_id = store.record_event(
        run_id, "interlock_trip", "output voltage 6.3 V above limit 6.0 V",
        {"limit": "vout_v_max", "value": 6.3, "limit_value": 6.0, "instrument": "dmm"}, point_seq=1,
    )
    store.record_event(run_id, "gap", "no point between 48 V and 75 V", {"missing_vin_v": [60.0]})
    store.record_result(run_id, "line_regulation_pct", 0.031, unit="%", details={"vin_v": [36, 75]},
                        scope={"iout_a": 5.0})
    store.record_result(run_id, "phase_margin_deg", None, unit="deg",
                        details={"reason": "no gain crossover in 10 Hz - 100 kHz"}, scope={"vin_v": 36.0})
    store.record_result(run_id, "mode", float("nan"), details="DCM below 0.4 A")

    events = store.events(run_id)
    assert events["kind"].tolist() == ["interlock_trip", "gap"]
    assert events["event_id"].iloc[0] == trip_id
    assert events["details"].iloc[0] == {"limit": "vout_v_max", "value": 6.3, "limit_value": 6.0, "instrument": "dmm"}
    assert events["point_seq"].iloc[0] == 1 and pd.isna(events["point_seq"].iloc[1])
    assert events["message"].iloc[0] == "output voltage 6.3 V above limit 6.0 V"

    results = store.results(run_id)
    assert results["name"].tolist() == ["line_regulation_pct", "phase_margin_deg", "mode"]
    assert results["value"].iloc[0] == 0.031
    assert math.isnan(results["value"].iloc[1]) and math.isnan(results["value"].iloc[2])
    assert results["unit"].tolist() == ["%", "deg", ""]
    assert results["scope"].tolist() == [{"iout_a": 5.0}, {"vin_v": 36.0}, {}]
    assert results["details"].iloc[1] == {"reason": "no gain crossover in 10 Hz - 100 kHz"}
    assert results["details"].iloc[2] == "DCM below 0.4 A"


def test_runs_listing_filters_and_latest(store_url):
    clock = FakeClock(step_s=60.0)
    with Store.open(store_url, clock=clock, recover=False) as store:
        with pytest.raises(StoreError, match="no runs"):
            store.resolve_run("latest")
        a = store.begin_run(flyback_start())
        store.record_point(a, {"vin_v": 36.0})
        store.end_run(a, "completed")
        cutoff = EPOCH + timedelta(seconds=clock.t + 1.0)
        b = store.begin_run(flyback_start(procedure="loop_gain", dut_part="POL-12-1V2",
                                          station_name="sim-pol-buck"))
        store.end_run(b, "failed", message="analyzer timeout")
        c = store.begin_run(flyback_start())

        all_runs = store.runs()
        assert all_runs["run_id"].tolist() == [c, b, a]  # newest first
        assert all_runs["n_points"].tolist() == [0, 0, 1]
        assert store.runs(status="completed")["run_id"].tolist() == [a]
        assert store.runs(station="sim-pol-buck")["run_id"].tolist() == [b]
        assert store.runs(procedure="efficiency_map")["run_id"].tolist() == [c, a]
        assert store.runs(dut_part="FB-48-5", limit=1)["run_id"].tolist() == [c]
        assert store.runs(since=cutoff)["run_id"].tolist() == [c, b]
        assert store.runs(status="failed")["message"].tolist() == ["analyzer timeout"]
        assert str(all_runs["started_utc"].dt.tz) == "UTC"
        with pytest.raises(StoreError, match="time zone"):
            store.runs(since=datetime(2024, 1, 1))
        with pytest.raises(StoreError, match="unknown run status"):
            store.runs(status="done")

        assert store.resolve_run("latest") == c
        assert store.resolve_run(str(a)) == a and store.resolve_run(b) == b
        with pytest.raises(StoreError, match="no run 99"):
            store.resolve_run(99)
        with pytest.raises(StoreError, match="neither"):
            store.resolve_run("newest")


def test_close_twice_and_use_after_close(store_url):
    store = Store.open(store_url)
    store.close()
    store.close()  # safe twice
    assert store.closed
    with pytest.raises(StoreError, match="closed"):
        store.runs()
    with Store.open(store_url) as again:
        assert again.runs().empty
    assert again.closed


def test_in_memory_sqlite_url(tmp_path):
    with Store.open("sqlite://") as store:
        run_id = store.begin_run(flyback_start())
        store.record_point(run_id, {"vin_v": 12.0, "vout_v": 1.2})
        assert store.points(run_id)["vout_v"].tolist() == [1.2]


def test_second_writer_of_the_same_run_is_refused_whole(store_url):
    # Documented limit: one writer per run. The refused point must leave nothing behind
    # (a transaction is atomic: SQLite docs, "Atomic Commit In SQLite").
    path = store_url
    with Store.open(path, recover=False) as a, Store.open(path, recover=False) as b:
        run_id = a.begin_run(flyback_start())
        assert a.record_point(run_id, {"vin_v": 36.0, "iout_a": 1.0}) == 1
        assert b.record_point(run_id, {"vin_v": 48.0, "iout_a": 1.0}) == 2  # b reads the run's state
        with pytest.raises(StoreError, match="nothing of it was written"):
            a.record_point(run_id, {"vin_v": 75.0, "iout_a": 1.0})  # a still believes seq 2 is next
        long = b.points_long(run_id)
        assert long["seq"].tolist() == [1, 1, 2, 2]
        assert long["value"].tolist() == [36.0, 1.0, 48.0, 1.0]
        # the failed transaction was rolled back: the connection writes again
        assert b.record_point(run_id, {"vin_v": 60.0}) == 3
        assert a.last_point(run_id) == 3


def test_settle_info_and_result_uncertainty_round_trip(store):
    run_id = store.begin_run(flyback_start())
    info = {"method": "exponential_fit", "quantity": "pin_w", "window_s": 0.06, "tau_s": 0.021,
            "predicted_residual": 1.2e-4, "verified": False, "reason": "load current 0.41 A, setpoint 0.5 A"}
    store.record_point(run_id, {"pin_w": 3.1}, settled=False, settle_info=info)
    store.record_point(run_id, {"pin_w": 3.2})
    points = store.points(run_id)
    assert points["settle_info"].tolist() == [info, {}]
    assert points["settle_reason"].tolist() == ["load current 0.41 A, setpoint 0.5 A", ""]
    store.record_results(run_id, [{"name": "efficiency", "value": 0.9, "uncertainty": 0.001,
                                   "expanded_uncertainty": 0.002}, {"name": "loss_w", "value": 0.3}])
    results = store.results(run_id)
    assert results["uncertainty"].iloc[0] == 0.001 and results["expanded_uncertainty"].iloc[0] == 0.002
    assert math.isnan(results["uncertainty"].iloc[1])


def test_job_ids_come_from_the_database(store):
    first = store.begin_job("nightly", "bench-3")
    second = store.begin_job("nightly", "bench-4")
    assert second > first
