"""Instrument accuracy in station files: parsed, validated with every problem named by its key,
and re-read from a run's stored station text.

The format is the project's own (README, station files); the divisors are those of
JCGM 100:2008 (the GUM) 4.3.7 (rectangular, a/sqrt(3)) and 4.3.3 (a bound stated at k).
"""

from __future__ import annotations

import math

import pytest

from benchctl.errors import StationFileError
from benchctl.station import parse_station, station_accuracy_from_text

BASE = """
[station]
name = "bench-acc"

[limits]
source_voltage_max_v = 50.0
source_current_max_a = 3.0
dut_output_voltage_max_v = 6.0
load_current_max_a = 6.0
load_power_max_w = 35.0

[instruments.input_meter]
driver = "power_meter"
resource = "TCPIP::127.0.0.1::5031::SOCKET"

[instruments.output_meter]
driver = "power_meter"
resource = "TCPIP::127.0.0.1::5032::SOCKET"
"""

GOOD_ACCURACY = """
[instruments.input_meter.accuracy]
voltage = { pct_of_reading = 0.05, offset = 0.005 }
current = [ { range_max = 1.0, pct_of_reading = 0.1, offset = 0.0002 },
            { range_max = 10.0, pct_of_reading = 0.1, offset = 0.002 } ]
power   = { pct_of_reading = 0.1, offset = 0.002, distribution = "rectangular" }

[instruments.output_meter.accuracy]
voltage = { pct_of_reading = 0.02, offset = 0.001, distribution = "normal", coverage_factor = 2 }
"""


def test_accuracy_parses_per_quantity_and_range():
    station = parse_station(BASE + GOOD_ACCURACY)
    acc = station.accuracy
    assert set(acc) == {"input_meter", "output_meter"}
    assert acc["input_meter"].instrument == "TCPIP::127.0.0.1::5031::SOCKET"
    current = acc["input_meter"].quantities["current"]
    assert [t.range_max for t in current.terms] == [1.0, 10.0]
    # 2 A falls on the 10 A range: a = 0.1 % x 2 + 2 mA = 4 mA; rectangular u = a/sqrt(3) (GUM 4.3.7).
    k, term = current.term_for(2.0)
    assert k == 1 and term.standard(2.0) == pytest.approx(0.004 / math.sqrt(3.0))
    # A bound at k = 2 (GUM 4.3.3): 5 V -> a = 1 mV + 1 mV = 2 mV, u = 1 mV.
    vout = acc["output_meter"].quantities["voltage"].terms[0]
    assert vout.standard(5.0) == pytest.approx(0.001)


def test_a_station_without_accuracy_still_loads():
    station = parse_station(BASE)
    assert station.accuracy == {}


def test_every_accuracy_problem_is_reported_with_its_key():
    bad = BASE + """
[instruments.input_meter.accuracy]
voltage = { pct_of_reading = -0.05, offset = 0.005, colour = "red" }
current = [ { range_max = 10.0, pct_of_reading = 0.1, offset = 0.002 },
            { range_max = 1.0, pct_of_reading = 0.1, offset = 0.0002 } ]
power = { pct_of_reading = 0.1, distribution = "uniformish" }
temperature = { pct_of_reading = 1.0, offset = 0.1 }

[instruments.output_meter.accuracy]
voltage = [ { pct_of_reading = 0.02, offset = 0.001 } ]
current = { pct_of_reading = 0.0, offset = 0.0 }
power = { pct_of_reading = 0.1, offset = 0.01, coverage_factor = 2 }
"""
    with pytest.raises(StationFileError) as err:
        parse_station(bad)
    problems = err.value.problems
    expected = [
        "instruments.input_meter.accuracy.voltage.colour: unknown key",
        "instruments.input_meter.accuracy.voltage.pct_of_reading: -0.05 must be a finite number >= 0",
        "instruments.input_meter.accuracy.current: range_max must increase",
        "instruments.input_meter.accuracy.power.offset: required",
        "instruments.input_meter.accuracy.power.distribution: 'uniformish' must be one of",
        "instruments.input_meter.accuracy.temperature: unknown quantity of a power_meter; accuracy is given for "
        "voltage, current, power",
        "instruments.output_meter.accuracy.voltage[1].range_max: required when a quantity has several ranges",
        "instruments.output_meter.accuracy.current: pct_of_reading and offset are both 0",
        "instruments.output_meter.accuracy.power.coverage_factor: only meaningful with distribution",
    ]
    for text in expected:
        assert any(p.startswith(text) for p in problems), (text, problems)
    assert len(problems) == len(expected)


def test_stored_station_text_gives_the_accuracy_without_drivers():
    # A run's stored station may name a driver that is no longer installed: its accuracy is still read.
    text = (BASE + GOOD_ACCURACY).replace('driver = "power_meter"', 'driver = "retired_meter"')
    acc = station_accuracy_from_text(text)
    assert acc["output_meter"].quantities["voltage"].terms[0].distribution == "normal"
    assert station_accuracy_from_text(None) == {}
    assert station_accuracy_from_text(BASE) == {}
    with pytest.raises(StationFileError, match="instruments.input_meter.accuracy.voltage.offset"):
        station_accuracy_from_text(BASE + "[instruments.input_meter.accuracy]\nvoltage = { pct_of_reading = 1 }\n")


def test_the_readme_accuracy_example_is_valid():
    import re
    from pathlib import Path

    readme = (Path(__file__).resolve().parents[1] / "README.md").read_text(encoding="utf-8")
    block = next(b for b in re.findall(r"```toml\n(.*?)```", readme, flags=re.S)
                 if b.startswith("[instruments.input_meter.accuracy]"))
    meter = '[instruments.temp_meter]\ndriver = "temperature_meter"\nresource = "TCPIP::127.0.0.1::5030::SOCKET"\n'
    accuracy = parse_station(BASE + meter + block).accuracy
    acc = accuracy["input_meter"].quantities
    assert set(acc) == {"voltage", "current", "power"} and len(acc["current"].terms) == 2
    # ±0.5 °C per thermocouple, rectangular (GUM 4.3.7): u = 0.5/√3
    assert accuracy["temp_meter"].quantities["temperature"].terms[0].standard(85.0) == pytest.approx(0.5 / 3 ** 0.5)


def test_a_temperature_meter_takes_only_a_temperature_accuracy():
    meter = '[instruments.temp_meter]\ndriver = "temperature_meter"\nresource = "TCPIP::127.0.0.1::5030::SOCKET"\n'
    with pytest.raises(StationFileError) as err:
        parse_station(BASE + meter + "[instruments.temp_meter.accuracy]\nvoltage = { pct_of_reading = 0.1, offset = 0.01 }\n")
    assert err.value.problems == ["instruments.temp_meter.accuracy.voltage: unknown quantity of a temperature_meter; "
                                  "accuracy is given for temperature"]
