"""The electronic load's dynamic mode: levels, slew, single steps with trigger out, continuous
mode, what the scope sees of it, and the interlock on both levels."""

from __future__ import annotations

import numpy as np
import pytest

from benchctl.errors import ScpiError, SetpointRefused
from benchctl.guarded import guard
from benchctl.interlock import Interlock
from benchctl.drivers.dc_source import DcSource
from benchctl.drivers.electronic_load import ElectronicLoad
from benchctl.drivers.oscilloscope import Oscilloscope


@pytest.fixture
def rig(simulated_bench, station_for):
    bench = simulated_bench("flyback-48v-5v", time_scale=50.0)
    r = bench.resources
    src = DcSource(r["source"]).open()
    load = ElectronicLoad(r["load"]).open()
    scope = Oscilloscope(r["scope"], timeout_s=10.0).open()
    src.set_current_limit(1.3)
    src.set_voltage(48.0)
    src.set_output(True)
    load.set_mode("CC")
    load.set_current(1.0)
    load.set_input(True)
    yield bench, src, load, scope, station_for(bench)
    for d in (scope, load, src):
        d.close()


def test_single_steps_toggle_levels_and_the_model_follows(rig):
    bench, _, load, _, _ = rig
    load.set_transient(2.0, 4.0, slew_a_per_s=2e6, mode="single")
    load.set_transient_enabled(True)
    assert load.transient_level() == pytest.approx(2.0)
    assert bench.model.operating_point().iout_a == pytest.approx(2.0, rel=1e-6)
    load.trigger_step()
    assert load.transient_level() == pytest.approx(4.0)
    assert bench.model.operating_point().iout_a == pytest.approx(4.0, rel=1e-6)
    load.trigger_step()
    assert load.transient_level() == pytest.approx(2.0)
    steps = bench.instruments["load"].activity.steps_between(0.0, 1e9)
    assert [(s.from_a, s.to_a) for s in steps] == [(2.0, 4.0), (4.0, 2.0)]
    assert steps[0].ramp_s == pytest.approx(2.0 / 2e6)  # ramp time = step / slew
    load.set_transient_enabled(False)
    assert bench.model.operating_point().iout_a == pytest.approx(1.0, rel=1e-6)  # the static level again
    assert load.current_setpoint() == pytest.approx(1.0)  # existing commands still work


def test_scope_sees_the_step_the_load_makes(rig):
    bench, _, load, scope, _ = rig
    scope.set_record(100e-6, 10000, pre_trigger_s=20e-6)
    scope.set_scale(4, 0.5)
    scope.set_offset(4, 3.0)
    scope.set_trigger("external")
    load.set_transient(2.0, 4.0, slew_a_per_s=0.5e6, mode="single")  # 0.5 A/us -> 4 us ramp
    load.set_transient_enabled(True)
    scope.arm()
    load.trigger_step()
    scope.wait_acquired(10.0)
    i = scope.fetch_waveform(4)
    before, after = i.values[i.t_s < -1e-6], i.values[i.t_s > 10e-6]
    assert before.mean() == pytest.approx(2.0, abs=0.01) and after.mean() == pytest.approx(4.0, abs=0.01)
    # 10 %-90 % rise of a linear ramp lasts 80 % of the ramp time (common practice)
    t10 = i.t_s[np.argmax(i.values > 2.2)]
    t90 = i.t_s[np.argmax(i.values > 3.8)]
    assert t90 - t10 == pytest.approx(0.8 * 4e-6, rel=0.05)
    assert abs(t10 - 0.1 * 4e-6) < 0.2e-6  # the trigger is the start of the step


def test_trigger_needs_single_mode_and_input_on(rig):
    _, _, load, _, _ = rig
    with pytest.raises(ScpiError) as err:
        load.trigger_step()  # dynamic mode off
    assert err.value.code == -221
    load.set_transient(1.0, 2.0, slew_a_per_s=1e6, mode="continuous", frequency_hz=100.0)
    load.set_transient_enabled(True)
    with pytest.raises(ScpiError):
        load.trigger_step()
    with pytest.raises(ScpiError) as err:  # a level above the load's range: -222 data out of range (SCPI-1999)
        load.set_transient(1.0, 40.0, slew_a_per_s=1e6)
    assert err.value.code == -222


def test_continuous_mode_is_a_square_wave_at_the_repetition_rate(rig):
    bench, _, load, scope, _ = rig
    load.set_transient(1.0, 3.0, slew_a_per_s=1e6, mode="continuous", frequency_hz=1000.0)
    load.set_transient_enabled(True)
    assert load.transient_level() == pytest.approx(2.0)  # the mean of a 50 % square wave
    scope.set_record(4e-3, 8000)
    scope.set_scale(4, 0.5)
    scope.set_offset(4, 2.0)
    scope.set_trigger("immediate")
    scope.single(10.0)
    i = scope.fetch_waveform(4).values
    high = i > 2.0
    edges = np.count_nonzero(high[1:] != high[:-1])
    assert edges in (7, 8, 9)  # 4 ms of a 1 kHz square wave: two edges per period
    assert np.mean(high) == pytest.approx(0.5, abs=0.05)


def test_interlock_checks_both_dynamic_levels(rig):
    bench, _, load, _, station = rig
    lock = Interlock(station.limits)
    guarded = guard(load, lock)
    top = station.limits.load_current_max_a
    guarded.set_transient(0.5, top, slew_a_per_s=1e6)  # at the limit: allowed
    for lo, hi in ((0.5, top * 1.01), (top * 1.01, 0.5)):
        with pytest.raises(SetpointRefused) as err:
            guarded.set_transient(lo, hi, slew_a_per_s=1e6)
        assert err.value.limit == "load_current_max_a"
        assert "dynamic level" in str(err.value)
    assert bench.instruments["load"].level_b_a == pytest.approx(top)  # the refused levels were never sent
