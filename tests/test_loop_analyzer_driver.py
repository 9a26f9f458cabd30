"""The loop-analyzer driver against the simulated analyzer over real sockets."""

from __future__ import annotations

import numpy as np
import pytest

from benchctl.errors import InstrumentTimeout, SetpointRefused, StationFileError
from benchctl.guarded import GuardedAnalyzer
from benchctl.interlock import Interlock
from benchctl.station import StationLimits, parse_station, render_station
from benchctl.drivers.loop_analyzer import InjectionProfile, LoopAnalyzer


@pytest.fixture
def bench(simulated_bench):
    b = simulated_bench("flyback-48v-5v", time_scale=200.0)
    b.model.set_source(48.0, 5.0, True)
    b.model.set_load("CC", 2.5, True)
    return b


@pytest.fixture
def analyzer(bench):
    drv = LoopAnalyzer(bench.resources["analyzer"], name="analyzer", timeout_s=2.0).open()
    drv.reset()
    yield drv
    drv.close()


def test_real64_block_transfer_is_exact_and_matches_the_ascii_path(bench, analyzer):
    analyzer.set_sweep(10.0, 100e3, 121, "log")
    analyzer.set_injection(0.01)
    analyzer.set_data_format("real64", "big")
    big = analyzer.measure()
    analyzer.set_data_format("real64", "little")
    little = analyzer.fetch()
    analyzer.set_data_format("ascii")
    text = analyzer.fetch()

    # A log sweep has a constant ratio between neighbouring points (common practice;
    # numpy.geomspace is that definition).
    assert np.array_equal(big.freq_hz, np.geomspace(10.0, 100e3, 121))
    # Both byte orders carry the same float64 values bit for bit (SCPI FORMat:BORDer, from memory).
    assert np.array_equal(big.response, little.response)
    # ASCII NR3 with ten significant digits (IEEE 488.2 §8.7.4, from memory): rel. error <= 5e-10.
    np.testing.assert_allclose(text.freq_hz, big.freq_hz, rtol=6e-10, atol=0)
    np.testing.assert_allclose(text.response.real, big.response.real, rtol=6e-10, atol=1e-300)
    np.testing.assert_allclose(text.response.imag, big.response.imag, rtol=6e-10, atol=1e-300)
    # The data are the converter's loop gain (Middlebrook injection: T = -v_y/v_x) within the noise.
    truth = bench.model.loop_gain(big.freq_hz)
    assert np.median(np.abs(big.response / truth - 1.0)) < 0.02


def test_block_payload_with_newline_bytes_is_read_by_count(analyzer):
    analyzer.set_sweep(10.0, 100e3, 201, "log")
    analyzer.set_data_format("real64", "big")
    resp = analyzer.measure()
    payload = analyzer.read_block("TRAC? RESP")
    # IEEE 488.2 §8.7.9 definite-length block: a payload may hold 0x0A bytes; they must
    # not end the read. This payload does hold some, so the check is not vacuous.
    assert b"\n" in payload
    assert len(payload) == 16 * 201
    values = np.frombuffer(payload, dtype=">f8")
    np.testing.assert_array_equal(values[0::2] + 1j * values[1::2], resp.response)
    # The session is still in step: an ordinary query right after the block answers normally.
    assert analyzer.query_float("trace_points") == 201


def test_wait_timeout_is_scaled_to_the_sweep(bench):
    drv = LoopAnalyzer(bench.resources["analyzer"], name="analyzer", timeout_s=0.5).open()
    try:
        drv.reset()
        drv.set_sweep(10.0, 1000.0, 100, "log")
        drv.set_bandwidth(0.5)  # each point integrates max(5/f, 1/RBW) = 2 s of model time
        sweep_s = drv.sweep_time_s()
        f = np.geomspace(10.0, 1000.0, 100)
        assert sweep_s == pytest.approx(np.sum(np.maximum(5.0 / f, 2.0)), rel=1e-9)
        assert drv.sweep_timeout_s() == pytest.approx(1.5 * sweep_s + 0.5)
        # 200 model s at time scale 200 = 1 s real: longer than the 0.5 s I/O timeout.
        drv.start_sweep()
        drv.wait_sweep(method="opc")
        assert drv.fetch().freq_hz.size == 100
        drv.start_sweep()
        drv.wait_sweep(method="poll")
        assert drv.fetch().freq_hz.size == 100
        drv.start_sweep()
        with pytest.raises(InstrumentTimeout):
            drv.wait_sweep(method="poll", timeout_s=0.05)
    finally:
        drv.close()
    drv = LoopAnalyzer(bench.resources["analyzer"], name="analyzer", timeout_s=0.5).open()
    try:
        drv.set_sweep(10.0, 1000.0, 100, "log")
        drv.set_bandwidth(0.5)
        drv.start_sweep()
        with pytest.raises(InstrumentTimeout):
            drv.wait_sweep(method="opc", timeout_s=0.1)
    finally:
        drv.close()


def _analyzer_station(bench, commands: str) -> str:
    text = render_station(name="lg", description="analyzer only", limits=StationLimits(**bench.limits.__dict__),
                          instruments={"analyzer": ("loop_analyzer", bench.resources["analyzer"])},
                          hazardous_voltage_acknowledged=bench.hazardous)
    return text + "\n[instruments.analyzer.commands]\n" + commands + "\n"


def test_station_command_override_is_used(bench):
    station = parse_station(_analyzer_station(bench, 'set_start = "SENSE:FREQUENCY:START {value:.6g}"'))
    drv = station.instruments["analyzer"].create().open()
    try:
        drv.set_sweep(20.0, 20e3, 31)
    finally:
        drv.close()
    sim = bench.instruments["analyzer"]
    assert "SENSE:FREQUENCY:START 20" in sim.audit.commands()
    assert sim.start_hz == 20.0 and sim.stop_hz == 20e3 and sim.points == 31
    with pytest.raises(StationFileError, match="no command named"):
        parse_station(_analyzer_station(bench, 'set_begin = "SENS:FREQ:STAR {value}"'))


def test_guard_caps_the_injection_and_sends_nothing(bench, analyzer):
    limits = StationLimits(**bench.limits.__dict__)
    guarded = GuardedAnalyzer(analyzer, Interlock(limits))
    cap = 0.2 * limits.dut_output_voltage_max_v
    assert guarded.max_injection_v == pytest.approx(cap)
    sim = bench.instruments["analyzer"]
    sent_before = len(sim.audit.commands())
    with pytest.raises(SetpointRefused):
        guarded.set_injection(cap * 1.01)
    with pytest.raises(SetpointRefused):
        guarded.set_injection_profile(InjectionProfile((10.0, 1e3), (cap * 2, 0.01)))
    assert len(sim.audit.commands()) == sent_before
    guarded.set_injection_profile(InjectionProfile((10.0, 1e3), (0.1, 0.01)))
    assert sim.profile_on and sim.profile == ((10.0, 1e3), (0.1, 0.01))
    guarded.set_injection(0.02)
    assert sim.injection_v == pytest.approx(0.02) and not sim.profile_on
