"""Station options and visa_library checked when the file loads, before anything is opened.

Every problem is reported with its key (``instruments.ROLE.options.KEY``) in one error, and
no connection is attempted: VISA opens are watched through the session layer.
"""

from __future__ import annotations

import pytest

from benchctl.drivers import session as session_module
from benchctl.errors import StationFileError
from benchctl.station import load_station, parse_station

HEAD = """
[station]
name = "t"
{station}
[limits]
source_voltage_max_v = 15.0
source_current_max_a = 2.0
dut_output_voltage_max_v = 6.0
load_current_max_a = 3.0
load_power_max_w = 20.0
"""


def _station(instruments: str, station: str = "") -> str:
    return HEAD.format(station=station) + instruments


@pytest.fixture
def no_opens(monkeypatch):
    """Every way to open a VISA resource or library, recorded (and refused)."""
    opened: list[str] = []

    def refuse(*args, **kwargs):
        opened.append(repr(args))
        raise AssertionError("a station load opened something")

    monkeypatch.setattr(session_module.VisaSession, "open", classmethod(lambda cls, *a, **k: refuse(*a, **k)))
    monkeypatch.setattr(session_module, "resource_manager", refuse)
    return opened


def test_a_bad_option_of_the_second_role_is_reported_before_anything_is_opened(tmp_path, no_opens):
    path = tmp_path / "bench.toml"
    path.write_text(_station("""
[instruments.source]
driver = "dc_source"
resource = "TCPIP::192.0.2.10::5025::SOCKET"
[instruments.load]
driver = "electronic_load"
resource = "TCPIP::192.0.2.11::5025::SOCKET"
options = { termination = "\\r\\n", parity = "sometimes" }
"""))
    with pytest.raises(StationFileError) as info:
        load_station(path)
    problems = info.value.problems
    unknown = next(p for p in problems if "options.termination" in p)
    assert unknown.startswith("instruments.load.options.termination: unknown option")
    assert "read_termination" in unknown and "write_termination" in unknown  # the known ones are listed
    assert any(p.startswith("instruments.load.options.parity") and '"odd"' in p for p in problems)
    assert no_opens == []


def test_every_problem_of_every_role_in_one_report(no_opens):
    text = _station("""
[instruments.source]
driver = "dc_source"
resource = "TCPIP::192.0.2.10::5025::SOCKET"
options = { baud_rate = 9600 }
[instruments.input_meter]
driver = "power_meter"
resource = "ASRL/dev/ttyUSB0::INSTR"
options = { stop_bits = 3, error_check = "maybe", completion = "hope" }
visa_library = "/nowhere/libvisa.so"
""", station='visa_library = "@nosuchbackend"')
    with pytest.raises(StationFileError) as info:
        parse_station(text)
    problems = info.value.problems
    keys = sorted(p.split(":")[0].split(" ")[0] for p in problems)
    assert keys == ["instruments.input_meter.options.completion", "instruments.input_meter.options.error_check",
                    "instruments.input_meter.options.stop_bits", "instruments.input_meter.visa_library",
                    "instruments.source.options.baud_rate", "station.visa_library"]
    baud = next(p for p in problems if "baud_rate" in p)
    assert "serial (ASRL)" in baud  # on a LAN resource a baud rate is a mistake, not a no-op
    assert no_opens == []


def test_terminations_in_basic_and_literal_strings_mean_the_same():
    text = _station("""
[instruments.source]
driver = "dc_source"
resource = "ASRL/dev/ttyUSB0::INSTR"
[instruments.source.options]
read_termination = "\\r\\n"   # a TOML basic string: its escapes are CR LF
write_termination = '\\r\\n'  # a literal string: backslash, r, backslash, n, taken for CR LF
baud_rate = 9600
parity = "none"
stop_bits = 1
flow_control = "rts_cts"
data_bits = 8
query_delay_s = 0.02
chunk_size = 4096
""")
    station = parse_station(text)
    driver = station.instruments["source"].create()
    t = driver.transport
    assert (t.read_termination, t.write_termination) == ("\r\n", "\r\n")
    assert (t.baud_rate, t.parity, t.stop_bits, t.flow_control, t.data_bits) == (9600, "none", 1, "rts_cts", 8)
    assert (t.query_delay_s, t.chunk_size, t.visa_library) == (0.02, 4096, "@py")


def test_a_termination_that_is_not_one_is_refused():
    text = _station("""
[instruments.source]
driver = "dc_source"
resource = "TCPIP::192.0.2.10::5025::SOCKET"
options = { read_termination = ";" }
""")
    with pytest.raises(StationFileError, match=r'read_termination = ";" must be one of "\\n", "\\r\\n"'):
        parse_station(text)


def test_visa_library_of_the_station_and_of_one_instrument(tmp_path):
    vendor = tmp_path / "libvendorvisa.so"
    vendor.write_bytes(b"")  # the load checks the path; the library is loaded only when opened
    text = _station(f"""
[instruments.source]
driver = "dc_source"
resource = "GPIB0::5::INSTR"
[instruments.load]
driver = "electronic_load"
resource = "TCPIP::192.0.2.11::5025::SOCKET"
visa_library = "@py"
""", station=f'visa_library = "{vendor}"')
    station = parse_station(text)
    assert station.visa_library == str(vendor)
    assert station.instruments["source"].visa_library == str(vendor)
    assert station.instruments["load"].visa_library == "@py"
    assert station.instruments["source"].create().transport.visa_library == str(vendor)


def test_defaults_are_today_s_behaviour():
    station = parse_station(_station("""
[instruments.source]
driver = "dc_source"
resource = "TCPIP::192.0.2.10::5025::SOCKET"
"""))
    driver = station.instruments["source"].create()
    assert (driver.error_check, driver.completion) == ("compound", "opc_query")
    assert (driver.transport.read_termination, driver.transport.write_termination) == ("\n", "\n")
    assert driver.transport.visa_library == "@py" and driver.transport.query_delay_s == 0.0
