"""Readings of the simulated meter, source and load: integration over an aperture, errors inside the spec.

References: the SCPI-1999 measurement model (MEASure = INITiate + FETCh, from memory); data-sheet accuracy
±(% of reading + offset) per range (common practice); the mean over an interval checked with
scipy.integrate.quad; station-file accuracy tables read back with Python's tomllib.
"""

from __future__ import annotations

import math
import tomllib

import numpy as np
import pytest
import scipy.integrate

from benchctl.simulated_instruments.bench import SimulatedBench
from benchctl.simulated_instruments.converter import FLYBACK_48V_5V, ConverterModel, ManualClock
from benchctl.simulated_instruments.instruments import SimulatedDcSource, SimulatedElectronicLoad, SimulatedPowerMeter
from benchctl.simulated_instruments.instruments.accuracy import FIXED_FRACTION, InstrumentErrors
from benchctl.simulated_instruments.instruments.aperture import DEFAULT_APERTURE_S


def _bench_in_process(seed: int = 3):
    """Model on a manual clock; every instrument's wait advances that clock (deterministic)."""
    clock = ManualClock()
    model = ConverterModel(FLYBACK_48V_5V, clock=clock)
    sleep = clock.advance
    src = SimulatedDcSource(model, seed=seed, sleep=sleep)
    load = SimulatedElectronicLoad(model, seed=seed, sleep=sleep)
    meter = SimulatedPowerMeter(model, "input", seed=seed, sleep=sleep)
    out_meter = SimulatedPowerMeter(model, "output", seed=seed, sleep=sleep)
    for cmd in ("CURR 1.3", "VOLT 48", "OUTP ON"):
        src.handle_message(cmd)
    for cmd in ("FUNC CURR", "CURR 1.0", "INP ON"):
        load.handle_message(cmd)
    clock.advance(2.0)
    return clock, model, src, load, meter, out_meter


def test_default_aperture_is_one_line_cycle_and_settable() -> None:
    clock, model, src, load, meter, _ = _bench_in_process()
    assert DEFAULT_APERTURE_S == 0.02
    for inst in (src, load, meter):
        assert float(inst.handle_message("APER?")) == pytest.approx(0.02)
        inst.handle_message("SENS:APER 5e-3")
        assert float(inst.handle_message("APER?")) == pytest.approx(5e-3)
        inst.handle_message("*RST")
        assert float(inst.handle_message("APER?")) == pytest.approx(0.02)
        assert inst.handle_message("SYST:ERR?").startswith("0,")
    meter.handle_message("APER 1e-7")
    assert meter.handle_message("SYST:ERR?").startswith("-222")


def test_a_reading_is_the_mean_over_its_aperture() -> None:
    # A load step at the start of the aperture: the reading is the mean of the moving value, inside the spec.
    clock, model, src, load, meter, _ = _bench_in_process()
    load.handle_message("CURR 4.0")
    t0 = clock.now_s()
    reading = float(meter.handle_message("MEAS:CURR?"))
    assert clock.now_s() == pytest.approx(t0 + 0.02)             # the reading took its aperture
    mean = scipy.integrate.quad(lambda t: model.terminals_at(t).input_a, t0, t0 + 0.02, limit=200)[0] / 0.02
    start, end = model.terminals_at(t0).input_a, model.terminals_at(t0 + 0.02).input_a
    assert abs(mean - start) > 0.1 * abs(end - start) and abs(mean - end) > 0.1 * abs(end - start)
    assert abs(reading - mean) <= meter.errors.limit("current", mean) * 0.6 + 1e-12


def test_init_then_fetch_reads_voltage_current_and_power_of_one_interval() -> None:
    clock, model, src, load, meter, _ = _bench_in_process()
    load.handle_message("CURR 4.5")
    t0 = clock.now_s()
    meter.handle_message("INIT")
    assert meter.handle_message("*OPC?") == "1"                 # waits for the integration (model time)
    assert t0 + 0.02 <= clock.now_s() <= t0 + 0.022
    v, i, p = (float(x) for x in meter.handle_message("FETC:VOLT?;CURR?;POW?").split(";"))
    assert float(meter.handle_message("FETC:POW?")) == p            # the same stored reading
    m = model.mean_terminals(t0, t0 + 0.02)
    assert abs(v - m.input_v) <= 0.6 * meter.errors.limit("voltage", m.input_v)
    assert abs(i - m.input_a) <= 0.6 * meter.errors.limit("current", m.input_a)
    assert abs(p - m.input_w) <= 0.6 * meter.errors.limit("power", m.input_w)
    # the power is the mean of v·i, not the product of the means, on a moving interval
    assert m.input_w != pytest.approx(m.input_v * m.input_a, rel=1e-6)
    meter.handle_message("*RST")
    assert meter.handle_message("FETC:VOLT?") is None
    assert meter.handle_message("SYST:ERR?").startswith("-230")


def test_averaging_takes_n_apertures_and_shrinks_the_noise() -> None:
    clock, model, src, load, meter, out_meter = _bench_in_process()
    clock.advance(1.0)
    singles = [float(out_meter.handle_message("MEAS:VOLT?")) for _ in range(200)]
    out_meter.handle_message("AVER:COUN 16")
    t0 = clock.now_s()
    averaged = [float(out_meter.handle_message("MEAS:VOLT?")) for _ in range(200)]
    assert clock.now_s() == pytest.approx(t0 + 200 * 16 * 0.02)
    # noise / √N (independent readings, common practice); the fixed error stays
    ratio = np.std(averaged) / np.std(singles)
    assert 0.15 < ratio < 0.4
    assert np.mean(averaged) == pytest.approx(np.mean(singles), abs=4 * np.std(singles) / math.sqrt(200))


@pytest.mark.parametrize("cls,side", [(SimulatedPowerMeter, "input"), (SimulatedDcSource, None),
                                      (SimulatedElectronicLoad, None)])
def test_errors_stay_inside_the_documented_accuracy(cls, side) -> None:
    table = cls.ACCURACY
    rng = np.random.default_rng(7)
    for seed in range(6):
        errors = InstrumentErrors(table, [seed, 9])
        for name, qa in table.items():
            fixed_seen = []
            for r in qa.ranges:
                values = np.concatenate([rng.uniform(0.0, r.range_max, 300), [r.range_max, -0.5 * r.range_max]])
                for x in values:
                    e = errors.read(name, float(x)) - x
                    assert abs(e) <= qa.limit(x), (name, x, e)
                fixed_seen.append(errors.fixed_error(name, r.range_max))
                assert abs(errors.fixed_error(name, r.range_max)) <= FIXED_FRACTION * qa.limit(r.range_max) + 1e-15
            assert any(f != 0.0 for f in fixed_seen)
    # different instruments (seeds) err differently
    a, b = InstrumentErrors(table, [1, 9]), InstrumentErrors(table, [2, 9])
    name = next(iter(table))
    assert a.fixed_error(name, 1.0) != b.fixed_error(name, 1.0)


def test_range_is_the_smallest_that_holds_the_reading() -> None:
    qa = SimulatedPowerMeter.ACCURACY["current"]
    assert qa.limit(0.005) == pytest.approx(0.02e-2 * 0.005 + 1e-6)
    assert qa.limit(0.5) == pytest.approx(0.02e-2 * 0.5 + 0.1e-3)
    assert qa.limit(1.0) == pytest.approx(0.02e-2 * 1.0 + 0.1e-3)
    assert qa.limit(1.0001) == pytest.approx(0.02e-2 * 1.0001 + 1e-3)
    assert qa.limit(99.0) == pytest.approx(0.02e-2 * 99.0 + 3e-3)     # above the last range: its spec


def test_station_file_carries_each_instruments_accuracy() -> None:
    with SimulatedBench("flyback-48v-5v", reading_time_s=1e-4) as bench:
        station = tomllib.loads(bench.station_toml())
        assert bench.reading_time_s == 1e-4
        assert "accuracy" not in tomllib.loads(bench.station_toml(accuracy=False))["instruments"]["source"]
    for role in ("source", "load", "input_meter", "output_meter"):
        table = station["instruments"][role]["accuracy"]
        inst_table = bench.instruments[role].ACCURACY
        assert set(table) == set(inst_table) <= {"voltage", "current", "power"}
        for name, qa in inst_table.items():
            given = table[name]
            if len(qa.ranges) == 1:
                assert given == {"pct_of_reading": qa.ranges[0].pct_of_reading, "offset": qa.ranges[0].offset}
            else:
                assert given == [{"range_max": r.range_max, "pct_of_reading": r.pct_of_reading, "offset": r.offset}
                                 for r in qa.ranges]
    assert "accuracy" not in station["instruments"]["scope"]


def test_bench_defaults_are_realistic() -> None:
    bench = SimulatedBench("buck-12v-1v2")
    assert bench.reading_time_s == DEFAULT_APERTURE_S
    assert all(inst.aperture.seconds == DEFAULT_APERTURE_S for role, inst in bench.instruments.items()
               if role in ("source", "load", "input_meter", "output_meter"))
    assert not bench.model.thermal_drift
    assert SimulatedBench("buck-12v-1v2", thermal_drift=True).model.thermal_drift
    with pytest.raises(ValueError, match="reading_time_s"):
        SimulatedBench("buck-12v-1v2", reading_time_s=0.0)


def test_static_slew_of_the_load_reaches_the_model() -> None:
    clock, model, src, load, meter, _ = _bench_in_process()
    assert float(load.handle_message("CURR:SLEW?")) == pytest.approx(1e3)
    load.handle_message("CURR:SLEW 250")
    t0 = clock.now_s()
    load.handle_message("CURR 3.0")
    assert model.load_slew_a_per_s == 250.0
    assert model.terminals_at(t0 + 4e-3).load_a == pytest.approx(1.0 + 250.0 * 4e-3, rel=1e-9)
    # dynamic-mode edges use the transient slew, not the static one
    load.handle_message("CURR:TRAN:ALEV 3.0;BLEV 4.0;SLEW 1e6;MODE SING")
    load.handle_message("CURR:TRAN ON")
    clock.advance(1.0)
    t1 = clock.now_s()
    load.handle_message("TRIG")
    assert model.terminals_at(t1 + 0.5e-6).load_a == pytest.approx(3.5, rel=1e-6)
    load.handle_message("*RST")
    assert float(load.handle_message("CURR:SLEW?")) == pytest.approx(1e3)


def test_source_and_load_read_backs_integrate_too() -> None:
    clock, model, src, load, meter, _ = _bench_in_process()
    t0 = clock.now_s()
    v = float(src.handle_message("MEAS:VOLT?"))
    i = float(load.handle_message("MEAS:CURR?"))
    assert clock.now_s() == pytest.approx(t0 + 0.04)
    assert abs(v - 48.0) <= src.errors.limit("voltage", 48.0)
    assert abs(i - 1.0) <= load.errors.limit("current", 1.0)
