"""Scope driver against the simulated scope over real sockets: IEEE 488.2 blocks and scaling."""

from __future__ import annotations

import socket

import numpy as np
import pytest

from benchctl.errors import ScpiError
from benchctl.drivers.oscilloscope import Oscilloscope
from benchctl.simulated_instruments.bench import SimulatedBench


@pytest.fixture
def scope_bench():
    bench = SimulatedBench("flyback-48v-5v", time_scale=50.0, seed=3).start()
    scope = Oscilloscope(bench.resources["scope"], timeout_s=10.0).open()
    yield bench, scope
    scope.close()
    bench.stop()


def _serve_hand_built(bench, payload: bytes, preamble: tuple) -> None:
    """Make the simulated scope answer channel 1 with a block built by the test."""
    inst = bench.instruments["scope"]
    inst._channel_record = lambda n: (payload, preamble)  # the SCPI front end formats it as a block


def _hand_block(payload: bytes) -> bytes:
    # IEEE 488.2-1992 §8.7.9 definite-length block, built by hand: '#', digit count, count, bytes
    count = str(len(payload)).encode()
    return b"#" + str(len(count)).encode() + count + payload


@pytest.mark.parametrize("fast_path", [True, False])
def test_int16_block_with_newline_bytes_is_scaled_by_the_preamble(scope_bench, monkeypatch, fast_path):
    bench, scope = scope_bench
    scope.single(5.0)
    if not fast_path:  # the generic read_bytes path with termination cleared
        scope.session.disable_fast_path()
        assert not scope.session.fast_path
    codes = np.array([0x0A0A, -32768, 32767, 10, 0, -1, 2570, 0x0D0A], dtype="<i2")  # 0x0A = newline byte
    payload = codes.tobytes()
    assert payload.count(b"\n") >= 4
    y_inc, y_org, y_ref, x_inc, x_org = 2.5e-4, 1.25, 3.0, 2e-9, -4e-9
    _serve_hand_built(bench, payload, (16, codes.size, x_inc, x_org, 0.0, y_inc, y_org, y_ref, 0, "V"))
    assert scope.read_block("TRAC? 1") == payload
    wf = scope.fetch_waveform(1)
    # v = y_origin + (code - y_reference) * y_increment; t = x_origin + i * x_increment (common practice)
    assert np.array_equal(wf.values, y_org + (codes.astype(float) - y_ref) * y_inc)
    assert np.allclose(wf.t_s, x_org + np.arange(codes.size) * x_inc, rtol=0, atol=1e-21)
    assert wf.clipped_samples == 2  # the two codes at the ends of the int16 range
    assert wf.unit == "V"


def test_big_endian_int8_and_float32_blocks(scope_bench):
    bench, scope = scope_bench
    scope.single(5.0)
    b8 = np.array([10, -128, 127, 0], dtype="i1")
    _serve_hand_built(bench, b8.tobytes(), (8, 4, 1e-6, 0.0, 0.0, 0.1, 0.0, 0.0, 1, "A"))
    wf = scope.fetch_waveform(1)
    assert np.allclose(wf.values, b8 * 0.1) and wf.unit == "A" and wf.clipped_samples == 2
    f32 = np.array([1.5, -2.25, np.float32(np.frombuffer(b"\n\n\n\n", ">f4")[0])], dtype=">f4")
    _serve_hand_built(bench, f32.tobytes(), (32, 3, 1e-6, 0.0, 0.0, 1.0, 0.0, 0.0, 1, "V"))
    assert np.array_equal(scope.fetch_waveform(1).values, f32.astype(float))


def test_server_sends_exactly_the_hand_built_block(scope_bench):
    bench, scope = scope_bench
    payload = bytes(range(256)) * 3
    _serve_hand_built(bench, payload, (8, len(payload), 1e-9, 0.0, 0.0, 1.0, 0.0, 0.0, 0, "V"))
    with socket.create_connection(("127.0.0.1", bench.servers["scope"].port), timeout=5) as sock:
        sock.sendall(b"TRAC? 1\n")
        expected = _hand_block(payload) + b"\n"
        got = b""
        while len(got) < len(expected):
            chunk = sock.recv(65536)
            assert chunk
            got += chunk
    assert got == expected


def test_100k_point_acquisition_survives_newline_bytes(scope_bench):
    bench, scope = scope_bench
    scope.set_record(1e-4, 100_000)
    scope.set_data_format("float32")
    scope.single(10.0)
    wf = scope.fetch_waveform(2)  # drain voltage: float32 data holds many 0x0A bytes
    raw = scope.read_block("TRAC? 2")
    assert raw.count(b"\n") > 50
    assert wf.values.size == 100_000
    assert np.array_equal(wf.values, np.frombuffer(raw, dtype=wf.preamble.dtype if not wf.preamble.msb_first
                                                   else ">f4").astype(float))
    assert wf.sample_interval_s == pytest.approx(1e-9, rel=1e-12)
    # the record starts at the trigger (no pre-trigger offset was set) and spans 100 us
    assert wf.t_s[0] == pytest.approx(-0.0 + (-5e-5 + 5e-5), abs=1e-15)
    assert wf.t_s[-1] == pytest.approx(1e-4 - 1e-9, rel=1e-9)
    # the session still reads text answers after the binary transfer
    assert scope.identify().model == "sim oscilloscope"


def test_reading_before_an_acquisition_is_refused(scope_bench):
    from benchctl.errors import InstrumentStateError

    bench, scope = scope_bench
    with pytest.raises(InstrumentStateError, match="single"):
        scope.fetch_waveform(1)
    # the instrument itself refuses too: -221 settings conflict (SCPI-1999 standard error list)
    bench.instruments["scope"].handle_message("TRAC? 1")
    assert bench.instruments["scope"].handle_message("SYST:ERR?").startswith("-221")


def test_settings_read_back(scope_bench):
    _, scope = scope_bench
    scope.set_scale(1, 0.02)
    assert scope.scale(1) == pytest.approx(0.02)
    scope.set_bandwidth_limit(1, 20e6)
    assert scope.bandwidth_limit_hz(1) == pytest.approx(20e6)
    scope.set_bandwidth_limit(1, None)
    assert scope.bandwidth_limit_hz(1) is None
    scope.set_record(2e-3, 20000, pre_trigger_s=2e-4)
    assert scope.sample_interval_s() == pytest.approx(1e-7)
    with pytest.raises(ScpiError):  # 10 GS/s is the simulated scope's limit
        scope.set_record(1e-6, 100_000)


def test_command_table_overrides_are_checked():
    from benchctl.errors import StationFileError

    table = Oscilloscope.command_table({"arm": "DIG"})
    assert table["arm"] == "DIG"
    with pytest.raises(StationFileError, match="no command named"):
        Oscilloscope.command_table({"no_such_command": "X"})


def test_a_scope_without_compound_messages_fetches_preamble_and_block_apart():
    """error_check = separate (what `benchctl probe` proposes for it): no `;` in any message, and the
    same hand-built block scaled by its preamble as over the combined fast path."""
    bench = SimulatedBench("flyback-48v-5v", time_scale=50.0, seed=3, quirks={"scope": ["no_compound"]}).start()
    scope = Oscilloscope(bench.resources["scope"], timeout_s=10.0, options={"error_check": "separate"}).open()
    try:
        scope.single(5.0)
        codes = np.array([100, -200, 300, 0], dtype="<i2")
        _serve_hand_built(bench, codes.tobytes(), (16, codes.size, 1e-6, 0.0, 0.0, 1e-3, 0.5, 0.0, 0, "V"))
        wf = scope.fetch_waveform(1)
        # v = y_origin + (code - y_reference) * y_increment (common practice)
        assert np.array_equal(wf.values, 0.5 + codes.astype(float) * 1e-3)
        # the quirky scope queues -103 for the rest of any message of several units: none was sent
        assert scope.read_errors() == []
    finally:
        scope.close()
        bench.stop()
