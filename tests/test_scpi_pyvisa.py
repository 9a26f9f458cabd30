"""The SCPI core reached through real pyvisa-py, the way drivers reach hardware.

Sources: pyvisa ResourceManager("@py") with a ``TCPIP::<host>::<port>::SOCKET``
resource (pyvisa-py docs); IEEE 488.2-1992 §8.7.9 definite-length block as read by
``query_binary_values`` / written by ``write_binary_values`` (pyvisa docs, "ieee"
header format); §10.14 *IDN?, §10.19 *OPC? (from memory).
"""

from __future__ import annotations

import pytest

from benchctl.simulated_instruments.scpi import ScpiServer
from benchctl.simulated_instruments.scpi.demo import DemoSource

pyvisa = pytest.importorskip("pyvisa")


@pytest.fixture()
def setup():
    inst = DemoSource()
    with ScpiServer(inst) as srv:
        rm = pyvisa.ResourceManager("@py")
        res = rm.open_resource(srv.resource, read_termination="\n", write_termination="\n", timeout=3000)
        try:
            yield inst, srv, res, rm
        finally:
            res.close()
            rm.close()


def test_identity_settings_and_measurement(setup) -> None:
    inst, srv, res, rm = setup
    assert res.query("*IDN?").split(",") == ["benchctl-sim", "sim demo supply", "SN0001", "0.1"]
    res.write("*RST;*CLS")
    res.write("SOUR:VOLT 12 V;CURR 500 mA")
    res.write("OUTP ON")
    assert float(res.query("MEAS:VOLT?")) == pytest.approx(12.0, rel=1e-9)
    assert res.query_ascii_values("VOLT?;CURR?", separator=";") == pytest.approx([12.0, 0.5], rel=1e-9)
    assert res.query("INIT:SWE 3;*OPC?") == "1"
    assert res.query("SYST:ERR?") == '0,"No error"'


def test_errors_are_reported_through_the_queue(setup) -> None:
    inst, srv, res, rm = setup
    res.write("VOLT 500")
    assert res.query("SYST:ERR?") == '-222,"Data out of range;VOLT 500 V exceeds the maximum 80 V"'
    assert inst.voltage_v == 0.0


def test_blocks_in_and_out(setup) -> None:
    inst, srv, res, rm = setup
    values = list(range(256))  # includes 10 (LF) and 13 (CR) inside the block
    res.write_binary_values("LIST:VOLT ", values, datatype="B")
    assert res.query("*OPC?") == "1"  # the write has been processed
    assert inst.list_data == bytes(values)
    assert res.query_binary_values("LIST:VOLT?", datatype="B") == values
    assert res.query("SYST:ERR?") == '0,"No error"'


def test_comma_list_response(setup) -> None:
    inst, srv, res, rm = setup
    inst.add_command("TEST:LIST", getter=lambda: [1.5, -2.25e-3, 48.0])
    assert res.query_ascii_values("TEST:LIST?") == pytest.approx([1.5, -2.25e-3, 48.0], rel=1e-9)


def test_two_sessions_share_one_instrument(setup) -> None:
    inst, srv, res, rm = setup
    other = rm.open_resource(srv.resource, read_termination="\n", write_termination="\n", timeout=3000)
    try:
        res.write("VOLT 3.3")
        assert res.query("*OPC?") == "1"  # processed before the other connection asks (no race)
        assert float(other.query("VOLT?")) == pytest.approx(3.3, rel=1e-9)
        other.write("VOLTA")
        assert other.query("*OPC?") == "1"  # VOLTA has been processed before the other session asks
        assert res.query("SYST:ERR?").startswith("-113,")
    finally:
        other.close()
