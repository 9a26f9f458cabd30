"""Station files: complete validation with every problem named by its key."""

import pytest

from benchctl.errors import StationFileError
from benchctl.station import HAZARDOUS_DC_VOLTAGE_V, load_station, parse_station

GOOD = """
[station]
name = "bench-1"
watch_period_s = 0.1

[limits]
source_voltage_max_v = 15.0
source_current_max_a = 3.0
dut_output_voltage_max_v = 1.5
load_current_max_a = 11.0
load_power_max_w = 16.0

[instruments.source]
driver = "dc_source"
resource = "TCPIP::127.0.0.1::5025::SOCKET"

[instruments.load]
driver = "electronic_load"
resource = "TCPIP::127.0.0.1::5026::SOCKET"
timeout_s = 1.5
[instruments.load.commands]
set_current = "SOUR:CURR:LEV {value:.4f}"
"""


def test_good_station_parses():
    station = parse_station(GOOD)
    assert station.name == "bench-1"
    assert station.limits.load_current_max_a == 11.0
    assert station.instruments["load"].timeout_s == 1.5
    assert station.instruments["load"].commands["set_current"].startswith("SOUR:CURR")
    driver = station.instruments["load"].create()
    assert driver.command("set_current", value=2.5) == "SOUR:CURR:LEV 2.5000"


def test_every_problem_is_reported_with_its_key():
    bad = """
[station]
watch_period_s = -1
colour = "blue"

[limits]
source_voltage_max_v = "high"
load_power_max_w = 10

[instruments.source]
driver = "no_such_driver"
resource = "not a resource"

[instruments.load]
driver = "dc_source"
resource = "TCPIP::127.0.0.1::5026::SOCKET"

[instruments.wavemeter]
driver = "dc_source"
"""
    with pytest.raises(StationFileError) as info:
        parse_station(bad)
    text = str(info.value)
    for key in ("station.name", "station.watch_period_s", "station.colour", "limits.source_voltage_max_v",
                "limits.source_current_max_a", "instruments.source.driver", "instruments.source.resource",
                "instruments.load.driver", "instruments.wavemeter"):
        assert key in text, key
    assert len(info.value.problems) >= 9


def test_not_toml_names_the_line():
    with pytest.raises(StationFileError, match="line 2"):
        parse_station("[station]\nname = \n")


def test_unknown_command_override_is_refused():
    text = GOOD.replace('set_current = "SOUR:CURR:LEV {value:.4f}"', 'set_currnet = "X"')
    with pytest.raises(StationFileError, match="set_currnet"):
        parse_station(text)


def test_above_60_v_needs_acknowledgement():
    # SELV / ES1 boundary 60 V DC: IEC 62368-1 Table 4 (from memory)
    assert HAZARDOUS_DC_VOLTAGE_V == 60.0
    text = GOOD.replace("source_voltage_max_v = 15.0", "source_voltage_max_v = 80.0")
    with pytest.raises(StationFileError, match="hazardous_voltage_acknowledged"):
        parse_station(text)
    acked = text.replace("watch_period_s = 0.1", "watch_period_s = 0.1\nhazardous_voltage_acknowledged = true")
    assert parse_station(acked).limits.hazardous
    at_boundary = GOOD.replace("source_voltage_max_v = 15.0", "source_voltage_max_v = 60.0")
    assert not parse_station(at_boundary).limits.hazardous


def test_missing_file_is_a_clear_error(tmp_path):
    with pytest.raises(StationFileError, match="does not exist"):
        load_station(tmp_path / "nope.toml")


def test_role_missing_for_procedure():
    station = parse_station(GOOD)
    with pytest.raises(StationFileError, match="output_meter"):
        station.require_roles(("source", "output_meter"), needed_by="procedure efficiency_map")


def test_station_values_are_data_not_code():
    # Nothing in a station file is evaluated: a Python expression is just a (bad) string.
    text = GOOD.replace('resource = "TCPIP::127.0.0.1::5025::SOCKET"', 'resource = "__import__(\'os\').system(\'true\')"')
    with pytest.raises(StationFileError, match="instruments.source.resource"):
        parse_station(text)
