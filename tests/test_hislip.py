"""The HiSLIP server against pyvisa-py's own HiSLIP client (an implementation outside the project).

Protocol checks use pyvisa-py's message functions (``pyvisa_py.protocols.hislip``: its header
layout, message types and transactions, written to IVI-6.1) as the counterpart; the driver
and run checks go through pyvisa with ``TCPIP::127.0.0.1::hislip0,<port>::INSTR``.
"""

from __future__ import annotations

import socket
import struct
import threading

import numpy as np
import pytest
import pyvisa
from pyvisa_py.protocols import hislip as client

from benchctl.drivers.dc_source import DcSource
from benchctl.drivers.electronic_load import ElectronicLoad
from benchctl.drivers.oscilloscope import Oscilloscope
from benchctl.drivers.power_meter import PowerMeter
from benchctl.procedure import load_procedure
from benchctl.runner import execute
from benchctl.simulated_instruments.bench import SimulatedBench
from benchctl.pytest_plugin import FAST_READING_TIME_S
from benchctl.simulated_instruments.scpi import HislipServer, Identity, Numeric, ScpiInstrument, parse_quirks

TIMEOUT_S = 10.0  # generous on a loaded 2-core machine; nothing here asserts a duration


@pytest.fixture
def box():
    inst = ScpiInstrument(Identity("benchctl-sim", "sim hislip box", "H1", "1.0"))
    inst.add_command("TEST:TEXT", getter=lambda n: "x" * int(n), params=[Numeric(minimum=0, maximum=1e6, integer=True)])
    server = HislipServer(inst).start()
    yield inst, server
    server.stop()


def _instrument(server: HislipServer) -> client.Instrument:
    return client.Instrument("127.0.0.1", timeout=TIMEOUT_S, port=server.port, sub_address="hislip0")


def _ask(inst: client.Instrument, text: str, max_len: int = 1 << 22) -> bytes:
    inst.send(text.encode() + b"\n")
    return bytes(inst.receive(max_len))


def test_initialize_version_session_and_message_size(box):
    _, server = box
    sync = socket.create_connection(("127.0.0.1", server.port), timeout=TIMEOUT_S)
    # Initialize: client version 1.0, vendor "xx", sub-address payload (IVI-6.1 Initialize, via pyvisa-py's layout)
    sync.sendall(struct.pack("!2sBBBB2sQ", b"HS", client.MESSAGETYPE["Initialize"], 0, 1, 0, b"xx", 7) + b"hislip0")
    init = client.InitializeResponse(sync)
    assert init.version == 0x0100  # the lesser of the client's 1.0 and the server's 2.0
    assert init.overlap is False  # synchronized mode
    asyn = socket.create_connection(("127.0.0.1", server.port), timeout=TIMEOUT_S)
    client.send_msg(asyn, "AsyncInitialize", 0, init.session_id)
    client.AsyncInitializeResponse(asyn)
    client.send_msg(asyn, "AsyncMaxMsgSize", 0, 0, struct.pack("!Q", 4096))
    assert client.AsyncMaxMsgSizeResponse(asyn).max_msg_size == 1 << 20
    assert server.connection_count == 1
    sync.close()
    asyn.close()


def test_a_long_answer_comes_in_pieces_within_the_clients_maximum(box):
    _, server = box
    inst = _instrument(server)
    try:
        inst.max_msg_size = 256  # AsyncMaximumMessageSize: the client takes at most 256 bytes per message
        inst.send(b"TEST:TEXT? 1000\n")
        headers, data = [], b""
        while True:
            header = client.RxHeader(inst._sync)
            headers.append(header)
            data += client.receive_exact(inst._sync, header.payload_length)
            if header.msg_type == "DataEnd":
                break
        assert data == b"x" * 1000 + b"\n"
        assert all(h.msg_type == "Data" for h in headers[:-1]) and len(headers) == -(-1001 // (256 - 16))
        assert all(client.HEADER_SIZE + h.payload_length <= 256 for h in headers)
        # every piece carries the MessageID of the client's DataEnd (IVI-6.1 message IDs)
        assert {h.message_parameter for h in headers} == {inst.last_message_id}
    finally:
        inst.close()


def test_query_then_device_clear_discards_what_came_between(box):
    inst_model, server = box
    inst = _instrument(server)
    try:
        assert _ask(inst, "*IDN?") == b"benchctl-sim,sim hislip box,H1,1.0\n"
        feature = inst.async_device_clear()
        assert feature == 0  # synchronized mode preferred
        inst.send(b"*ESE 7\n")  # sent between AsyncDeviceClear and DeviceClearComplete: discarded
        assert inst.device_clear_complete(feature) == 0
        inst._message_id = 0xFFFF_FF00
        assert _ask(inst, "*ESE?") == b"0\n"
        assert "*ESE 7" not in inst_model.audit.commands()
        assert any(e.value.startswith("hislip device clear") for e in inst_model.audit.states("device_clear"))
    finally:
        inst.close()


def test_interrupted_query_is_410_and_the_next_answer_comes(box):
    inst_model, server = box
    inst = _instrument(server)
    try:
        # Two queries in one write: the first answer is never read before the second message.
        inst._sync.sendall(
            struct.pack(client.HEADER_FORMAT, b"HS", client.MESSAGETYPE["DataEnd"], 0, 0xFFFF_FF00, 6) + b"*IDN?\n"
            + struct.pack(client.HEADER_FORMAT, b"HS", client.MESSAGETYPE["DataEnd"], 0, 0xFFFF_FF02, 6) + b"*ESE?\n")
        first = client.RxHeader(inst._sync)
        assert first.msg_type == "Interrupted" and first.message_parameter == 0xFFFF_FF00
        second = client.RxHeader(inst._sync)
        assert second.msg_type == "DataEnd" and second.message_parameter == 0xFFFF_FF02
        assert client.receive_exact(inst._sync, second.payload_length) == b"0\n"
        inst._message_id = 0xFFFF_FF04
        # -410 Query INTERRUPTED (IEEE 488.2-1992 §6.3.2.3, from memory)
        assert _ask(inst, "SYST:ERR?").startswith(b"-410,")
    finally:
        inst.close()


def test_status_query_lock_and_remote_local(box):
    inst_model, server = box
    a, b = _instrument(server), _instrument(server)
    try:
        inst_model.handle_message("BOGUS:HEADER")  # queues -113
        # Status byte bit 2: error/event queue not empty (SCPI-1999 Vol. 1 §9.1, from memory)
        assert a.async_status_query() & 0x04
        assert a.async_lock_request(timeout=1.0) == "success"
        assert b.async_lock_request(timeout=0.05) == "failure"
        assert b.async_lock_info() == 1
        answer: list[bytes] = []
        waiting = threading.Thread(target=lambda: answer.append(_ask(b, "*IDN?")), daemon=True)
        waiting.start()
        waiting.join(0.3)  # b's message waits while a holds the exclusive lock
        assert answer == [] and "*IDN?" not in inst_model.audit.commands()
        assert a.async_lock_release() == "success"
        waiting.join(TIMEOUT_S)
        assert answer == [b"benchctl-sim,sim hislip box,H1,1.0\n"]
        assert a.async_lock_release() == "error"  # nothing held
        # shared locks with one key are granted to both
        assert a.async_lock_request(timeout=1.0, lock_string="bench") == "success"
        assert b.async_lock_request(timeout=1.0, lock_string="bench") == "success"
        assert a.async_lock_release() == "success shared"
        assert b.async_lock_release() == "success shared"
        a.async_remote_local_control("enableRemote")
        assert inst_model.audit.states("remote_local")[-1].value == client.REMOTELOCALCONTROLCODE["enableRemote"]
    finally:
        a.close()
        b.close()


@pytest.mark.parametrize("opening, code", [
    (b"XX" + bytes(14), 1),  # a header not starting with "HS": poorly formed (FatalError 1)
    (struct.pack(client.HEADER_FORMAT, b"HS", client.MESSAGETYPE["DataEnd"], 0, 0, 0), 3),  # not Initialize
    (struct.pack("!2sBBBB2sQ", b"HS", 0, 0, 1, 0, b"xx", 7) + b"hislip9", 3),  # unknown sub-address
])
def test_fatal_errors(box, opening, code):
    _, server = box
    sock = socket.create_connection(("127.0.0.1", server.port), timeout=TIMEOUT_S)
    with sock:
        sock.sendall(opening)
        fatal = client.FatalError(sock)
        assert fatal.control_code == code and fatal.error_message


def test_unknown_async_message_is_an_error(box):
    _, server = box
    inst = _instrument(server)
    try:
        client.send_msg(inst._async, "GetDescriptors", 0, 0)
        error = client.Error(inst._async)
        assert error.control_code == 1  # unrecognized message type
        assert inst.async_status_query() == 0  # the channel still works
    finally:
        inst.close()


def test_quirks_over_hislip(box):
    inst_model, server = box
    inst_model.quirks = parse_quirks(["crlf", "opc_plus_one"])
    inst = _instrument(server)
    try:
        assert _ask(inst, "*OPC?") == b"+1\r\n"
    finally:
        inst.close()


# ------------------------------------------------------------------------- drivers and runs
def test_standard_drivers_over_hislip_with_a_device_clear():
    bench = SimulatedBench("flyback-48v-5v", time_scale=50.0, protocol="hislip").start()
    try:
        res = bench.resources
        assert all(r.startswith("TCPIP::127.0.0.1::hislip0,") and r.endswith("::INSTR") for r in res.values())
        assert all(f'resource = "{r}"' in bench.station_toml() for r in res.values())
        with DcSource(res["source"], name="source") as src, ElectronicLoad(res["load"], name="load") as load, \
                PowerMeter(res["output_meter"], name="output_meter") as meter, \
                Oscilloscope(res["scope"], name="scope") as scope:
            assert src.identity.model == "sim dc source" and scope.identity.model == "sim oscilloscope"
            src.reset()
            load.reset()
            src.set_current_limit(2.0)
            src.set_voltage(48.0)
            assert src.voltage_setpoint() == pytest.approx(48.0)
            src.session.visa_resource.clear()  # pyvisa viClear -> HiSLIP device clear
            src.set_output(True)
            assert src.output_enabled() is True
            load.set_current(0.5)
            load.set_input(True)
            truth = bench.model.steady_state(48.0, "CC", 0.5, was_running=True)
            deadline = threading.Event()
            for _ in range(200):  # the output rises with the model's time constant (bounded wait)
                if abs(meter.measure_voltage() - truth.vout_v) < 0.05:
                    break
                deadline.wait(0.02)
            # The output meter reads the model's own output voltage within 0.05 V (its noise is far smaller).
            assert meter.measure_voltage() == pytest.approx(truth.vout_v, abs=0.05)
            load.set_input(False)
            src.set_output(False)
        assert bench.instruments["source"].audit.states("output")[-1].value is False
        assert any(e.value.startswith("hislip device clear")
                   for e in bench.instruments["source"].audit.states("device_clear"))
    finally:
        bench.stop()


EFFICIENCY_TOL = 0.0015  # 0.15 %-points, as tests/test_efficiency_truth.py asks of every loaded point


def test_efficiency_map_over_a_hislip_bench_matches_the_model(station_for, benchctl_store):
    """One run through HiSLIP at time scale 50; each point's efficiency is compared with the
    model's steady state at the moment the point was committed (same tolerance and reasoning as
    tests/test_efficiency_truth.py)."""
    bench = SimulatedBench("flyback-48v-5v", time_scale=50.0, protocol="hislip",
                           reading_time_s=FAST_READING_TIME_S).start()
    try:
        emap = load_procedure("efficiency_map")
        station = station_for(bench)
        d = bench.design
        truths = {}

        def progress(done, total, last):
            if last and "plan_index" in last and int(last["plan_index"]) not in truths:
                vin_true = bench.model.terminals().input_v
                truths[int(last["plan_index"])] = bench.model.steady_state(vin_true, "CC", last["iout_set_a"],
                                                                           was_running=True)

        params = emap.resolve_parameters(values={**bench.procedure_parameters(), "vin_v": [d.vin_nom_v],
                                                 "load_pct": [0, 25, 100]})
        outcome = execute(emap, params, station, benchctl_store, progress=progress)
        assert outcome.status == "completed", outcome.message
        points = benchctl_store.points(outcome.run_id)
        assert len(points) == 3
        for _, row in points.iterrows():
            truth = truths[int(row["plan_index"])]
            assert row["settled"], row["settle_reason"]
            if row["iout_set_a"] >= 0.1 * d.iout_rated_a:
                err = row["pout_w"] / row["pin_w"] - truth.pout_w / truth.pin_w
                assert abs(err) <= EFFICIENCY_TOL, f"{row['iout_set_a']} A: efficiency off by {err * 100:+.3f} %-pt"
        assert np.isfinite(points["pin_w"]).all()
        assert bench.instruments["source"].audit.states("output")[-1].value is False
        assert all(e.source.startswith("hislip ") for e in bench.instruments["source"].audit.entries()
                   if e.kind == "command")
    finally:
        bench.stop()
