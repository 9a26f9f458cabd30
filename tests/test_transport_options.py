"""The session layer's transport: VISA library per station, interfaces needing extras, VXI-11 and
HiSLIP failures in one line, terminations, serial settings, query delay, the SOCKET-only fast path.

Real pyvisa-py sessions over loopback where one can be had (a small socket server here that
answers with CR LF, as some instruments do); fakes of a pyvisa resource where only the calls
matter. No timing is asserted.
"""

from __future__ import annotations

import socket
import threading

import pytest

from benchctl.drivers import session as session_module
from benchctl.drivers.dc_source import DcSource
from benchctl.drivers.oscilloscope import Oscilloscope
from benchctl.drivers.session import (
    Transport,
    VisaLibraryError,
    VisaSession,
    _apply_settings,
    open_problem,
    resource_manager,
)
from benchctl.drivers.testing import ScriptedInstrument, scripted_driver
from benchctl.errors import InstrumentConnectionError, InstrumentTimeout


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


# -- the VISA library ---------------------------------------------------------------------------


def test_one_resource_manager_per_library_string():
    assert resource_manager("@py") is resource_manager("@py")
    assert resource_manager() is resource_manager("@py")  # the default is pyvisa-py


def test_a_library_that_cannot_be_loaded_is_one_line_naming_the_key_and_what_to_do(tmp_path):
    missing = str(tmp_path / "libvisa-not-here.so")
    with pytest.raises(VisaLibraryError) as info:
        resource_manager(missing)
    text = str(info.value)
    assert "\n" not in text and "visa_library" in text and missing in text
    assert "vendor VISA library" in text and "@py" in text
    with pytest.raises(VisaLibraryError, match="pyvisa-nosuchbackend"):
        resource_manager("@nosuchbackend")


def test_the_driver_opens_its_session_on_the_library_the_station_names(tmp_path):
    missing = str(tmp_path / "vendor.so")
    src = DcSource("TCPIP::127.0.0.1::5025::SOCKET", name="source", visa_library=missing)
    with pytest.raises(InstrumentConnectionError) as info:
        src.open()
    assert missing in str(info.value) and info.value.instrument == "source"
    assert src.transport.visa_library == missing


# -- interfaces that need an extra, and LAN protocols that fail -------------------------------------


@pytest.mark.parametrize("resource, extra, module", [
    ("GPIB0::5::INSTR", "gpib", "gpib"),
    ("USB0::0x1234::0x5678::SN1::INSTR", "usb", "usb"),
    ("ASRL/dev/ttyUSB0::INSTR", "serial", "serial"),
])
def test_an_interface_without_its_package_names_the_extra(resource, extra, module):
    from importlib.util import find_spec

    if find_spec(module) is not None:
        pytest.skip(f"{module} is installed here: pyvisa-py does not refuse {resource} for a missing package")
    with pytest.raises(InstrumentConnectionError) as info:
        VisaSession.open(resource, name="meter", timeout_s=0.5)
    text = str(info.value)
    assert "\n" not in text
    assert f'{resource} needs the {extra} extra: pip install "benchctl[{extra}]"' in text
    assert "vendor VISA" in text


def test_a_vxi11_resource_that_does_not_answer_is_one_line_saying_what_to_check():
    # nothing listens on the loopback port mapper (TCP 111) on a test machine
    with socket.socket() as probe:
        if probe.connect_ex(("127.0.0.1", 111)) == 0:
            pytest.skip("a port mapper runs here: a VXI-11 open would not be refused")
    with pytest.raises(InstrumentConnectionError) as info:
        VisaSession.open("TCPIP0::127.0.0.1::inst0::INSTR", name="meter", timeout_s=0.5)
    text = str(info.value)
    assert "\n" not in text and "VXI-11" in text and "port mapper" in text and "SOCKET" in text
    assert not isinstance(info.value.__cause__, InstrumentConnectionError)  # pyvisa's error, chained


def test_a_hislip_resource_that_does_not_answer_is_one_line_saying_what_to_check():
    port = _free_port()
    with pytest.raises(InstrumentConnectionError) as info:
        VisaSession.open(f"TCPIP0::127.0.0.1::hislip0,{port}::INSTR", name="scope", timeout_s=0.5)
    text = str(info.value)
    assert "\n" not in text and "HiSLIP" in text and "4880" in text


def test_open_problem_names_the_extra_only_for_a_missing_package():
    text = open_problem("GPIB0::5::INSTR", ValueError("Please install linux-gpib or gpib-ctypes"), timeout_s=1)
    assert 'pip install "benchctl[gpib]"' in text
    other = open_problem("TCPIP::192.0.2.1::5025::SOCKET", ConnectionRefusedError(111, "refused"), timeout_s=1)
    assert "nothing listens there" in other and "benchctl[" not in other


# -- interface settings ---------------------------------------------------------------------------


class _FakeVisa:
    """Stands in for a pyvisa resource: records what is set, written and read."""

    def __init__(self, answers: list[str] | None = None) -> None:
        self.calls: list[tuple[str, object]] = []
        self.answers = list(answers or [])
        self.timeout = 2000

    def __setattr__(self, key, value):
        if key not in ("calls", "answers", "timeout"):
            self.calls.append(("set " + key, value))
        object.__setattr__(self, key, value)

    def write(self, text):
        self.calls.append(("write", text))

    def read(self):
        self.calls.append(("read", None))
        return self.answers.pop(0)

    def query(self, text):
        self.calls.append(("query", text))
        return self.answers.pop(0)


def test_serial_settings_go_to_asrl_resources_as_pyvisa_constants():
    from pyvisa import constants

    transport = Transport(baud_rate=19200, data_bits=7, parity="even", stop_bits=1.5, flow_control="xon_xoff",
                          chunk_size=4096)
    visa = _FakeVisa()
    _apply_settings(visa, "ASRL/dev/ttyUSB0::INSTR", transport)
    assert dict(visa.calls) == {
        "set chunk_size": 4096, "set baud_rate": 19200, "set data_bits": 7,
        "set parity": constants.Parity.even, "set stop_bits": constants.StopBits.one_and_a_half,
        "set flow_control": constants.ControlFlow.xon_xoff}
    lan = _FakeVisa()
    _apply_settings(lan, "TCPIP::192.0.2.1::5025::SOCKET", transport)
    assert lan.calls == [("set chunk_size", 4096)]  # no serial attribute on a LAN resource


def test_a_query_delay_waits_between_write_and_read():
    visa = _FakeVisa(answers=["12.5"])
    session = VisaSession(visa, name="meter", resource_name="ASRL3::INSTR", transport=Transport(query_delay_s=0.001))
    assert session.query("MEAS:VOLT?") == "12.5"
    assert visa.calls == [("write", "MEAS:VOLT?"), ("read", None)]  # not one query() call: the wait sits between
    plain = _FakeVisa(answers=["1"])
    assert VisaSession(plain, name="meter", resource_name="ASRL3::INSTR").query("*OPC?") == "1"
    assert plain.calls == [("query", "*OPC?")]


def test_the_fast_path_is_taken_on_socket_resources_only():
    sock = socket.socket()
    try:
        class Backend:
            interface = sock
            _pending_buffer = bytearray()

        class Lib:
            sessions = {7: Backend()}

        class Visa:
            visalib = Lib()
            session = 7
            timeout = 2000

        assert VisaSession(Visa(), name="s", resource_name="TCPIP::127.0.0.1::5025::SOCKET").fast_path
        assert not VisaSession(Visa(), name="s", resource_name="TCPIP::127.0.0.1::inst0::INSTR").fast_path
        assert not VisaSession(Visa(), name="s", resource_name="TCPIP::127.0.0.1::hislip0::INSTR").fast_path
    finally:
        sock.close()


class _CrLfInstrument:
    """A raw-socket instrument that ends its answers with CR LF (reads its input by lines ending in LF)."""

    BLOCK = b"\x01\n\r\x02"  # payload bytes that look like terminators

    def __init__(self) -> None:
        self.server = socket.socket()
        self.server.bind(("127.0.0.1", 0))
        self.server.listen(1)
        self.port = self.server.getsockname()[1]
        self.received: list[bytes] = []
        threading.Thread(target=self._serve, daemon=True).start()

    def _serve(self) -> None:
        conn, _ = self.server.accept()
        buf = b""
        with conn:
            while True:
                data = conn.recv(4096)
                if not data:
                    return
                buf += data
                while b"\n" in buf:
                    line, buf = buf.split(b"\n", 1)
                    self.received.append(line + b"\n")
                    if line.rstrip(b"\r") == b"*IDN?":
                        conn.sendall(b"benchctl-test,crlf,1,1.0\r\n")
                    elif line.rstrip(b"\r") == b"TRAC? 1":
                        conn.sendall(b"#14" + self.BLOCK + b"\r\n")

    def close(self) -> None:
        self.server.close()


def test_crlf_terminations_over_a_real_socket_answers_and_blocks():
    inst = _CrLfInstrument()
    try:
        session = VisaSession.open(f"TCPIP::127.0.0.1::{inst.port}::SOCKET", name="scope", timeout_s=2.0,
                                   transport=Transport(read_termination="\r\n", write_termination="\r\n"))
        try:
            assert session.query("*IDN?") == "benchctl-test,crlf,1,1.0"
            assert session.read_block("TRAC? 1") == inst.BLOCK  # a block followed by CR LF, not LF
        finally:
            session.close()
    finally:
        inst.close()
    assert inst.received[0] == b"*IDN?\r\n"  # the write termination is CR LF too


# -- timeout messages state the timeout that applied ------------------------------------------------


def test_a_capture_poll_that_times_out_names_the_exchange_timeout_and_the_wait():
    inst = ScriptedInstrument()
    scope = scripted_driver(Oscilloscope, inst, timeout_s=2.0, options={"retries": 0, "retry_delay_s": 0})
    inst.fail("INIT:DONE?", "timeout")
    with pytest.raises(InstrumentTimeout) as info:
        scope.wait_triggered(5.0)
    text = str(info.value)
    # the issue: "no answer within 2 s" while the wait was 5 s; both are stated now
    assert "no answer within 2 s" in text and "up to 5 s for the capture" in text


def test_the_session_states_the_timeout_of_the_wait_not_the_instruments():
    inst = ScriptedInstrument()
    src = scripted_driver(DcSource, inst, timeout_s=2.0, options={"retry_delay_s": 0})
    inst.fail("*OPC?", "timeout")
    with pytest.raises(InstrumentTimeout, match="within 5 s"):
        src.wait_complete(timeout_s=5.0)


def test_module_exposes_the_extras_it_names():
    assert session_module.INTERFACE_EXTRAS["GPIB"] == ("gpib", "gpib-ctypes")
