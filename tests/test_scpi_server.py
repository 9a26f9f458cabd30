"""The SCPI core behind a real loopback TCP socket.

Sources (from memory): raw-socket SCPI, newline-terminated (LXI "Ports, Protocols
and Services", port 5025 convention); IEEE 488.2-1992 §7.5 (LF terminator, CR as
white space), §7.7.6.2 (an LF inside a definite-length block is data), §6.3.2.3
(Query INTERRUPTED), SCPI-1999 Vol. 2 §21.8 (-363 Input buffer overrun).
"""

from __future__ import annotations

import logging
import socket
import struct
import threading

import pytest

from benchctl.simulated_instruments.scpi import GARBLED_RESPONSE, ScpiServer
from benchctl.simulated_instruments.scpi.demo import DemoSource


class Client:
    """A bare socket client that reads LF-terminated responses and blocks."""

    def __init__(self, port: int, timeout_s: float = 3.0) -> None:
        self.sock = socket.create_connection(("127.0.0.1", port), timeout=timeout_s)
        self.buf = b""

    def send(self, data: bytes | str) -> None:
        self.sock.sendall(data.encode() if isinstance(data, str) else data)

    def _fill(self) -> None:
        chunk = self.sock.recv(65536)
        if not chunk:
            raise EOFError("server closed the connection")
        self.buf += chunk

    def readline(self) -> bytes:
        while b"\n" not in self.buf:
            self._fill()
        line, _, self.buf = self.buf.partition(b"\n")
        return line

    def read_exactly(self, n: int) -> bytes:
        while len(self.buf) < n:
            self._fill()
        data, self.buf = self.buf[:n], self.buf[n:]
        return data

    def query(self, text: str) -> str:
        self.send(text + "\n")
        return self.readline().decode("ascii")

    def close(self) -> None:
        self.sock.close()


@pytest.fixture()
def inst() -> DemoSource:
    return DemoSource()


@pytest.fixture()
def server(inst: DemoSource):
    with ScpiServer(inst) as srv:
        yield srv


@pytest.fixture()
def client(server: ScpiServer):
    c = Client(server.port)
    yield c
    c.close()


def _scpi_threads(port: int) -> list[threading.Thread]:
    return [t for t in threading.enumerate() if t.name.startswith(f"scpi-{port}-") and t.is_alive()]


# ---------------------------------------------------------------- binding
@pytest.mark.parametrize("host", ["0.0.0.0", "localhost", "192.168.1.10", "::1", ""])
def test_only_loopback_is_accepted(inst: DemoSource, host: str) -> None:
    with pytest.raises(ValueError, match="binds only to 127.0.0.1"):
        ScpiServer(inst, host=host)


def test_start_logs_listens_and_is_idempotent(inst: DemoSource, caplog: pytest.LogCaptureFixture) -> None:
    srv = ScpiServer(inst)
    with pytest.raises(RuntimeError, match="start"):
        _ = srv.port
    with caplog.at_level(logging.INFO, logger="benchctl.simulated_instruments.scpi.server"):
        srv.start()
    try:
        port = srv.port
        assert f"listening on 127.0.0.1:{port} (loopback only)" in caplog.text
        assert srv.resource == f"TCPIP::127.0.0.1::{port}::SOCKET"
        assert srv.start() is srv and srv.port == port  # idempotent
        c = Client(port)
        assert c.sock.getpeername() == ("127.0.0.1", port)
        assert c.query("*IDN?") == "benchctl-sim,sim demo supply,SN0001,0.1"
        c.close()
    finally:
        srv.stop()
        srv.stop()  # idempotent


def test_restart_after_stop(inst: DemoSource) -> None:
    srv = ScpiServer(inst)
    srv.start()
    srv.stop()
    with srv:
        c = Client(srv.port)
        assert c.query("*TST?") == "0"
        c.close()


# ------------------------------------------------------------ message traffic
def test_lf_and_crlf_terminators(client: Client) -> None:
    assert client.query("VOLT 5;OUTP ON;:MEAS:VOLT?") == "+5.000000000E+00"
    client.send(b"VOLT? MAX\r\n")
    assert client.readline() == b"+8.000000000E+01"  # CR is white space (488.2 §7.4.1.2)
    client.send(b"VOLT 3\nVOLT 4\r\n")  # two messages in one segment, neither answers
    assert client.query("VOLT?") == "+4.000000000E+00"


def test_blocks_with_newlines_travel_both_ways(client: Client, inst: DemoSource) -> None:
    data = bytes(range(256)) * 4 + b"\n\n"
    header = f"#{len(str(len(data)))}{len(data)}".encode()
    client.send(b"LIST:VOLT " + header + data + b"\n")
    client.send(b"LIST:VOLT?\n")
    assert client.read_exactly(len(header)) == header
    assert client.read_exactly(len(data)) == data
    assert client.read_exactly(1) == b"\n"  # the terminator follows the block
    assert inst.list_data == data
    assert client.query("SYST:ERR?") == '0,"No error"'


def test_exchanges_are_logged_at_debug(client: Client, caplog: pytest.LogCaptureFixture) -> None:
    with caplog.at_level(logging.DEBUG, logger="benchctl.simulated_instruments.scpi"):
        client.query("CURR 0.25;CURR?")
    assert "CURR 0.25;CURR?" in caplog.text and "+2.500000000E-01" in caplog.text


def test_audit_source_names_the_connection(client: Client, inst: DemoSource) -> None:
    client.query("*OPC?")
    local = client.sock.getsockname()
    assert inst.audit.entries()[-1].source == f"{local[0]}:{local[1]}"


def test_several_clients_at_once_see_atomic_messages(server: ScpiServer, inst: DemoSource) -> None:
    # each message runs under the instrument lock, so "VOLT k;VOLT?" always answers k
    failures: list[str] = []

    def worker(k: int) -> None:
        c = Client(server.port)
        try:
            for i in range(40):
                value = (k * 40 + i) * 0.01
                answer = float(c.query(f"VOLT {value};VOLT?"))
                if answer != pytest.approx(value, rel=1e-9):
                    failures.append(f"client {k}: sent {value}, read {answer}")
        finally:
            c.close()

    threads = [threading.Thread(target=worker, args=(k,)) for k in range(4)]
    for t in threads:
        t.start()
    for t in threads:
        t.join(20)
    assert failures == []
    assert len([u for u in inst.audit.commands() if u.startswith("VOLT ")]) == 160


# ----------------------------------------------------------------- bad input
def test_bad_bytes_do_not_kill_the_server(client: Client) -> None:
    client.send(b"\xff\xfe\x00\x80garbage\n")
    client.send(b"DISP:TEXT '\xc3\x28'\n")  # invalid UTF-8 inside a string
    client.send(b"VOLT \x81\n;;;,,,\n#\n'\n")
    assert client.query("*IDN?") == "benchctl-sim,sim demo supply,SN0001,0.1"
    codes = [int(client.query("SYST:ERR?").split(",")[0]) for _ in range(7)]
    # bytes above 0x7E are -101 Invalid character; stray separators and quotes -102 Syntax error
    assert codes == [-101, -101, -101, -102, -102, -102, 0]


def test_long_line_is_363_and_the_server_goes_on(inst: DemoSource) -> None:
    with ScpiServer(inst, max_message_bytes=4096) as srv:
        c = Client(srv.port)
        c.send(b"VOLT " + b"1" * 10000)  # no terminator yet: cut at 4096 bytes
        c.send(b"\n")
        assert c.query("SYST:ERR?") == ('-363,"Input buffer overrun;a message of more than 4096 bytes was '
                                        'discarded; send at most 4096 bytes per message"')
        assert c.query("VOLT 2;VOLT?") == "+2.000000000E+00"
        c.close()


def test_default_limit_is_one_mebibyte(server: ScpiServer) -> None:
    c = Client(server.port)
    c.send(b"DISP:TEXT '" + b"x" * (1 << 20) + b"'\n")
    assert c.query("SYST:ERR?").startswith("-363,")
    c.send(b"DISP:TEXT '" + b"y" * 1000 + b"'\n")
    assert c.query("SYST:ERR?") == '0,"No error"'
    c.close()


def test_abrupt_disconnect_mid_message(server: ScpiServer) -> None:
    c1 = Client(server.port)
    c1.send(b"VOLT 5;OUTP")
    c1.sock.setsockopt(socket.SOL_SOCKET, socket.SO_LINGER, struct.pack("ii", 1, 0))  # reset, not FIN
    c1.close()
    c2 = Client(server.port)
    assert c2.query("*TST?") == "0"
    c2.close()


def test_query_interrupted_by_a_new_message(inst: DemoSource, server: ScpiServer, client: Client) -> None:
    # IEEE 488.2-1992 §6.3.2.3 (from memory), socket form: a new message arrives before the
    # response is sent -> the response is discarded and -410 queued
    started, release = threading.Event(), threading.Event()

    def slow() -> float:
        started.set()
        release.wait(5)
        return 1.0

    inst.add_command("TEST:SLOW", getter=slow)
    client.send("TEST:SLOW?\n")
    assert started.wait(5)
    client.send("VOLT?\n")
    release.set()
    assert client.readline() == b"+0.000000000E+00"  # only the second query is answered
    assert client.query("SYST:ERR?") == ('-410,"Query INTERRUPTED;a new message arrived before the response '
                                         'was read; read each response before sending the next message"')
    assert client.query("SYST:ERR?") == '0,"No error"'


# ------------------------------------------------------------------ stopping
def test_stop_closes_connections_and_joins_threads(inst: DemoSource) -> None:
    srv = ScpiServer(inst).start()
    port = srv.port
    clients = [Client(port) for _ in range(3)]
    clients[0].send(b"VOLT 5")  # half a message pending
    assert clients[1].query("*OPC?") == "1"
    srv.stop()
    assert _scpi_threads(port) == []
    for c in clients:
        with pytest.raises((EOFError, ConnectionResetError)):
            c.readline()
        c.close()
    with pytest.raises(OSError):
        Client(port, timeout_s=0.5)
    srv.stop()


# -------------------------------------------------------------------- faults
def test_fault_unresponsive_then_recovered(server: ScpiServer, client: Client, inst: DemoSource) -> None:
    assert client.query("*OPC?") == "1"
    server.set_fault("unresponsive")
    inst.audit.clear()
    client.sock.settimeout(0.3)
    client.send("*IDN?\n")
    with pytest.raises(TimeoutError):
        client.readline()
    assert inst.audit.commands() == []  # nothing was processed
    client.sock.settimeout(3)
    server.set_fault("none")
    assert client.readline() == b"benchctl-sim,sim demo supply,SN0001,0.1"  # the held message runs now


def test_fault_drop_closes_and_refuses_until_cleared(server: ScpiServer, client: Client) -> None:
    assert client.query("*OPC?") == "1"
    server.set_fault("drop")
    with pytest.raises((EOFError, ConnectionResetError)):
        client.readline()

    def try_new_connection() -> None:
        refused = Client(server.port)  # the reset may already arrive during connect()
        try:
            refused.query("*IDN?")
        finally:
            refused.close()

    with pytest.raises((EOFError, ConnectionResetError, BrokenPipeError)):
        try_new_connection()
    server.set_fault("none")
    again = Client(server.port)
    assert again.query("*TST?") == "0"
    again.close()


def test_fault_garble_corrupts_exactly_the_next_response(server: ScpiServer, client: Client) -> None:
    server.set_fault("garble")
    client.send("VOLT 1\n")  # no response, nothing garbled
    garbled = client.query("VOLT?")
    assert garbled.encode() == GARBLED_RESPONSE
    with pytest.raises(ValueError):
        float(garbled)
    assert server.fault == "none"
    assert client.query("VOLT?") == "+1.000000000E+00"


def test_unknown_fault_is_refused(server: ScpiServer) -> None:
    with pytest.raises(ValueError, match="unresponsive"):
        server.set_fault("explode")  # type: ignore[arg-type]
