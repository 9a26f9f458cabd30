"""The simulated scope's single-shot trigger on a start: pre-trigger samples, the model's truth, a clean timeout."""

from __future__ import annotations

import time

import numpy as np
import pytest

from benchctl.analysis.inrush import inrush_metrics
from benchctl.analysis.turn_on import input_edge_s, turn_on_metrics
from benchctl.errors import InstrumentTimeout
from benchctl.drivers.dc_source import DcSource
from benchctl.drivers.electronic_load import ElectronicLoad
from benchctl.drivers.oscilloscope import Oscilloscope
from benchctl.simulated_instruments.bench import SimulatedBench


@pytest.fixture
def bench():
    with SimulatedBench("flyback-48v-5v", time_scale=1.0, seed=3) as b:
        r = b.resources
        scope = Oscilloscope(r["scope"], timeout_s=5.0).open()
        src = DcSource(r["source"], timeout_s=5.0).open()
        load = ElectronicLoad(r["load"], timeout_s=5.0).open()
        try:
            yield b, scope, src, load
        finally:
            src.set_output(False)
            for d in (scope, src, load):
                d.close()


def _setup(scope: Oscilloscope) -> None:
    for ch, sig, per_div, centre in ((1, "vout", 1.0, 2.5), (2, "vin", 10.0, 25.0), (3, "input_current", 0.5, 1.5)):
        scope.set_fixture_probe(ch, sig)
        scope.set_scale(ch, per_div)
        scope.set_offset(ch, centre)
    scope.set_channel_enabled(4, False)
    scope.set_record(0.03, 30000, pre_trigger_s=0.005)


def test_a_turn_on_triggers_the_scope_with_pre_trigger_and_the_models_timing(bench) -> None:
    b, scope, src, load = bench
    d = b.design
    load.set_mode("CR")
    load.set_resistance(1.0)
    load.set_input(True)
    src.set_voltage(48.0)
    src.set_current_limit(2.0)
    _setup(scope)
    scope.set_trigger(2, level=24.0, slope="rising")
    scope.arm()
    src.set_output(True)
    scope.wait_triggered(10.0)
    vout, vin, iin = (scope.fetch_waveform(ch) for ch in (1, 2, 3))
    assert vout.t_s[0] == pytest.approx(-0.005, rel=1e-9)          # pre-trigger samples
    assert np.median(vout.values[vout.t_s < -1e-3]) == pytest.approx(0.0, abs=0.02)
    truth = b.model.start_up_truth()
    assert truth is not None
    # the trigger (t = 0) is where the input crossed 24 V: C·ΔV/I after the source switched on
    t_trigger = truth.t0_s + d.start_up.input_capacitance_f * 24.0 / 2.0
    t_in = input_edge_s(vin.t_s, vin.values, 0.9 * 48.0)
    m = turn_on_metrics(vout.t_s, vout.values, t_input_s=t_in)
    # delay: UVLO crossing + start delay + 10 % of the soft start, from 90 % of the input (model design values);
    # tolerance: two samples (1 µs each) plus the scope's noise on the slope (5 mV over 0.6 V/ms)
    expect_delay = (truth.switching_start_s - t_trigger) - (t_in or 0.0) + 0.1 * d.start_up.soft_start_s
    assert m.delay_s == pytest.approx(expect_delay, abs=30e-6)
    assert m.rise_time_s == pytest.approx(0.8 * d.start_up.soft_start_s, rel=0.01)   # linear ramp: 0.8 T
    assert m.monotonic and m.overshoot_pct < 0.5
    inrush = inrush_metrics(iin.t_s, iin.values, source_limit_a=2.0)
    assert inrush.peak_a == pytest.approx(2.0, abs=0.02)       # the source's limit (+ scope noise)
    # I²t of a current-limited charge: I·C·V (to the limit's knee, V - I·R) within 3 % (window edges, noise)
    assert inrush.i2t_a2s == pytest.approx(2.0 * d.start_up.input_capacitance_f * 48.0, rel=0.03)


def test_a_trigger_on_the_output_edge_lands_where_the_models_output_crosses(bench) -> None:
    b, scope, src, load = bench
    d = b.design
    load.set_mode("CC")
    load.set_current(2.0)
    load.set_input(True)
    src.set_voltage(48.0)
    src.set_current_limit(1.2)
    _setup(scope)
    scope.set_record(0.03, 30000, pre_trigger_s=0.015)
    scope.set_trigger(1, level=2.5, slope="rising")
    scope.arm()
    src.set_output(True)
    scope.wait_triggered(10.0)
    vout, vin = scope.fetch_waveform(1), scope.fetch_waveform(2)
    truth = b.model.start_up_truth()
    v_final = b.model.operating_point().vout_v
    # the output follows the linear reference ramp: it crosses 2.5 V at t_on + (2.5/V)·T_ss (start_up.py)
    t_cross = truth.switching_start_s + 2.5 / v_final * d.start_up.soft_start_s
    t_in = input_edge_s(vin.t_s, vin.values, 24.0)
    # the input crossed 24 V at t0 + C·24 V/I (capacitor law); relative to the trigger:
    assert t_in == pytest.approx(truth.t0_s + d.start_up.input_capacitance_f * 24.0 / 1.2 - t_cross, abs=5e-6)
    k = int(np.searchsorted(vout.t_s, 0.0))
    assert vout.values[k - 50:k + 50].mean() == pytest.approx(2.5, abs=0.02)


def test_a_trigger_that_never_comes_times_out_cleanly(bench) -> None:
    b, scope, src, load = bench
    _setup(scope)
    scope.set_trigger(1, level=100.0, slope="rising")
    scope.arm()
    with pytest.raises(InstrumentTimeout, match="no trigger within 0.2 s"):
        scope.wait_triggered(0.2)
    assert scope.identify().serial == "O0003"                         # the scope still answers
    assert scope.query_bool("get_done")                                 # aborted: nothing pending
