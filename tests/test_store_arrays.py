"""Arrays (Bode sweeps, waveforms) stored as raw little-endian bytes come back bit-exact."""

from __future__ import annotations

import hashlib
import struct

import numpy as np
import pytest
import scipy.signal
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from hypothesis.extra import numpy as hnp

from benchctl.errors import StoreError
from benchctl.store import RunStart, Store


def pol_buck_start() -> RunStart:
    return RunStart(
        procedure="loop_gain",
        procedure_sha256=hashlib.sha256(b"loop gain procedure").hexdigest(),
        station_name="sim-pol-buck",
        station_description="12 V -> 1.2 V point-of-load buck",
        dut_part="POL-12-1V2",
        dut_revision="A",
        dut_serial="0001",
    )


@pytest.fixture(scope="module")
def store(module_store_url):  # SQLite and PostgreSQL (tests/conftest.py)
    with Store.open(module_store_url, recover=False) as s:
        yield s


@pytest.fixture(scope="module")
def run_id(store):
    return store.begin_run(pol_buck_start())


def _bits(a: np.ndarray) -> bytes:
    return np.ascontiguousarray(a).tobytes()


def test_bode_sweep_of_a_buck_plant_round_trips_bit_exact(store, run_id):
    # Reference response: buck control-to-output Gvd = Vg(1 + s rc C)/(1 + s(L/R + rc C) + s^2 L C (1 + rc/R))
    # [Erickson & Maksimovic, Fundamentals of Power Electronics, 2nd ed., ch. 8 (from memory)]
    # evaluated with scipy.signal.freqs (library) for 12 V -> 1.2 V, L 1 uH, C 200 uF, rc 2 mOhm, R 0.12 Ohm.
    vg, l_h, c_f, rc, r = 12.0, 1e-6, 200e-6, 2e-3, 0.12
    b = [vg * rc * c_f, vg]
    a = [l_h * c_f * (1 + rc / r), l_h / r + rc * c_f, 1.0]
    freq_hz = np.logspace(1, 6, 401)
    _, h = scipy.signal.freqs(b, a, worN=2 * np.pi * freq_hz)
    columns = {
        "freq_hz": freq_hz,
        "gain_db": 20 * np.log10(np.abs(h)),
        "phase_deg": np.degrees(np.unwrap(np.angle(h))),
        "t_complex": h,  # complex128 kept as complex, not split
    }
    store.record_point(run_id, {"vin_v": 12.0, "iout_a": 10.0})
    seq = store.last_point(run_id)
    store.record_array(run_id, "plant_bode", columns, units={"t_complex": "V/V"}, point_seq=seq,
                       meta={"injection_v": 0.01, "bandwidth_hz": 10.0})
    got = store.array(run_id, "plant_bode", point_seq=seq)
    assert list(got) == list(columns)
    for name, original in columns.items():
        assert got[name].dtype == original.dtype
        assert _bits(got[name]) == _bits(original), name
    assert got["t_complex"].dtype == np.complex128
    assert got.units == {"freq_hz": "Hz", "gain_db": "dB", "phase_deg": "deg", "t_complex": "V/V"}
    assert got.meta == {"injection_v": 0.01, "bandwidth_hz": 10.0}
    assert got.point_seq == seq
    # a plain dict of arrays, as the analysis layer expects
    assert set(dict(got)) == set(columns)
    got["gain_db"][0] = 0.0  # returned arrays are writable copies


def test_ieee754_special_values_survive(store, run_id):
    # IEEE 754-2019 binary64 encodings (from memory): -0.0 = 0x8000000000000000, quiet NaN with a
    # payload 0x7FF8000000000123, signalling-pattern NaN 0x7FF0000000000001, smallest subnormal 0x1.
    patterns = [0x8000000000000000, 0x7FF8000000000123, 0x7FF0000000000001, 0x0000000000000001,
                0x7FF0000000000000, 0xFFF0000000000000, 0x3FF0000000000000]
    raw = struct.pack("<7Q", *patterns)
    special = np.frombuffer(raw, dtype="<f8").copy()
    cplx = np.empty(special.shape, dtype=np.complex128)  # set parts directly: keeps every bit pattern
    cplx.real, cplx.imag = special, special[::-1]
    store.record_array(run_id, "specials", {"x": special, "z": cplx})
    got = store.array(run_id, "specials")
    assert got["x"].tobytes() == raw
    assert _bits(got["z"]) == _bits(cplx)
    assert got["z"].imag.tobytes() == special[::-1].tobytes()


def test_big_endian_input_is_stored_little_endian_with_equal_values(store, run_id):
    # numpy dtype byte-order semantics (numpy docs, "Byte-swapping"): '>f8' and '<f8' hold the same values.
    big = np.array([1.5, -2.25, 1e-300], dtype=">f8")
    store.record_array(run_id, "big_endian", {"v": big, "i": np.array([1, -2, 3], dtype=">i4")})
    got = store.array(run_id, "big_endian")
    assert got["v"].dtype.str == "<f8" and got["i"].dtype.str == "<i4"
    assert np.array_equal(got["v"], big) and np.array_equal(got["i"], [1, -2, 3])
    assert _bits(got["v"]) == _bits(big.astype("<f8"))


def test_waveform_with_two_dimensional_and_boolean_columns(store, run_id):
    # scope capture: time base plus a 2-channel block and a trigger mask
    t_s = np.arange(2048) * 2e-9
    ch = np.vstack([1.2 + 0.01 * np.sin(2 * np.pi * 500e3 * t_s), 10.0 + 0.3 * np.sign(np.sin(2 * np.pi * 500e3 * t_s))])
    mask = ch[1] > 10.0
    store.record_array(run_id, "ripple_capture", {"t_s": t_s, "channels_v": ch, "high": mask},
                       units={"channels_v": "V"}, meta={"channels": ["vout", "sw"], "bw_limit_hz": 20e6})
    got = store.array(run_id, "ripple_capture")
    assert got["channels_v"].shape == (2, 2048)
    assert _bits(got["channels_v"]) == _bits(ch)
    assert got["high"].dtype == np.bool_ and np.array_equal(got["high"], mask)
    assert got.units["t_s"] == "s"


@settings(max_examples=25, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(
    data=hnp.arrays(
        dtype=st.sampled_from([np.float64, np.complex128, np.float32, np.int64, np.uint16]),
        shape=hnp.array_shapes(min_dims=0, max_dims=3, min_side=0, max_side=6),
        elements=None,
    )
)
def test_any_numeric_array_round_trips_bit_exact(store, run_id, data):
    # hypothesis.extra.numpy generates arbitrary values including NaN, inf, -0.0 and empty shapes.
    name = f"h{hashlib.sha256(data.tobytes() + str(data.shape).encode() + data.dtype.str.encode()).hexdigest()[:16]}"
    if name in set(store.arrays(run_id)["name"]):
        return  # hypothesis repeated an identical example
    store.record_array(run_id, name, {"a": data})
    got = store.array(run_id, name)["a"]
    assert got.shape == data.shape
    assert got.dtype == data.dtype.newbyteorder("<")
    assert got.tobytes() == data.astype(data.dtype.newbyteorder("<")).tobytes()


def test_listing_and_lookup_errors(store_url):
    with Store.open(store_url) as store:
        run_id = store.begin_run(pol_buck_start())
        store.record_point(run_id, {"vin_v": 12.0})
        store.record_array(run_id, "bode", {"freq_hz": np.array([1e3, 1e4]), "gain_db": np.array([20.0, 0.0])},
                           point_seq=1)
        store.record_array(run_id, "bode", {"freq_hz": np.array([1e3])})
        listing = store.arrays(run_id)
        assert listing["name"].tolist() == ["bode", "bode"]
        assert listing["point_seq"].iloc[0] == 1
        assert listing["columns"].iloc[0] == ("freq_hz", "gain_db")
        assert listing["dtypes"].iloc[0] == {"freq_hz": "<f8", "gain_db": "<f8"}
        assert listing["shapes"].iloc[0] == {"freq_hz": (2,), "gain_db": (2,)}

        with pytest.raises(StoreError, match="already holds"):
            store.record_array(run_id, "bode", {"freq_hz": np.array([1.0])}, point_seq=1)
        with pytest.raises(StoreError, match="no point 5"):
            store.record_array(run_id, "bode", {"freq_hz": np.array([1.0])}, point_seq=5)
        with pytest.raises(StoreError, match="no array 'bode' for point 2"):
            store.array(run_id, "bode", point_seq=2)
        with pytest.raises(StoreError, match="cannot keep"):
            store.record_array(run_id, "labels", {"x": np.array(["a", "b"])})
        with pytest.raises(StoreError, match="not among its columns"):
            store.record_array(run_id, "u", {"x": np.zeros(2)}, units={"y": "V"})
