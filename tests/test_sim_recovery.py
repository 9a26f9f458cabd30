"""A simulated instrument answers again after a device clear or a reconnect, whatever its last operation did.

The original failure: a scope capture armed on a trigger that never comes, ``*OPC?`` sent,
the client timed out; the scope then answered nothing, not even ``*IDN?``, because the
``*OPC?`` wait (up to 60 s on the scope, an hour on the loop analyzer) held the instrument
lock and the abandoned connection's queued messages waited behind it. Device clear puts
the instrument in the Operation Complete Query Idle State (IEEE 488.2-1992 §5.8, §12.5.3,
from memory): the wait ends, no answer is sent, settings and the armed operation stay.

Client read timeouts here (10 s) are far below the instruments' own wait bounds (60 s,
3600 s), so each test fails if the wait is not ended; no test asserts a duration.
"""

from __future__ import annotations

import socket
import threading

import pyvisa
import pytest

from benchctl.simulated_instruments.bench import SimulatedBench
from benchctl.simulated_instruments.scpi import Identity, ScpiInstrument
from benchctl.simulated_instruments.scpi.instrument import ABORT_DEVICE_CLEAR

ANSWER_TIMEOUT_S = 10.0  # generous for a loaded 2-core machine; far below the 60 s / 3600 s waits
GIVE_UP_S = 0.3  # the client's short timeout that abandons *OPC?


def _connect(port: int, timeout_s: float = ANSWER_TIMEOUT_S) -> socket.socket:
    sock = socket.create_connection(("127.0.0.1", port), timeout=timeout_s)
    sock.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
    return sock


def _readline(sock: socket.socket) -> str:
    data = b""
    while not data.endswith(b"\n"):
        chunk = sock.recv(4096)
        if not chunk:
            raise ConnectionError("closed")
        data += chunk
    return data.decode().strip()


def _ask(sock: socket.socket, text: str) -> str:
    sock.sendall(text.encode() + b"\n")
    return _readline(sock)


# A trigger on CH1 (the output voltage, about 5 V) at 1 kV never comes in NORMal mode.
NEVER_TRIGGERS = "TRIG:SOUR CH1;:TRIG:MODE NORM;:TRIG:LEV 1000;:INIT"


def _abandon_opc(port: int, arm: str) -> socket.socket:
    """Arm an operation that does not finish, send *OPC? and give up waiting (the socket stays open)."""
    sock = _connect(port)
    sock.sendall(arm.encode() + b"\n")
    sock.settimeout(GIVE_UP_S)
    sock.sendall(b"*OPC?\n")
    with pytest.raises(TimeoutError):
        sock.recv(100)
    return sock


@pytest.fixture
def bench():
    b = SimulatedBench("flyback-48v-5v", time_scale=50.0).start()
    yield b
    b.stop()


@pytest.fixture
def slow_bench():
    b = SimulatedBench("flyback-48v-5v", time_scale=1.0).start()  # a sweep lasts its real model time
    yield b
    b.stop()


def _states(inst, name: str) -> list:
    return inst.audit.states(name)


def test_reconnect_after_a_capture_timed_out_answers_idn(bench):
    scope = bench.instruments["scope"]
    stale = _abandon_opc(bench.servers["scope"].port, NEVER_TRIGGERS)
    try:
        with _connect(bench.servers["scope"].port) as fresh:
            assert _ask(fresh, "*IDN?").startswith("benchctl-sim,sim oscilloscope,")
            # Device clear queues no error and keeps the armed capture (488.2 §5.8, from memory).
            assert _ask(fresh, "SYST:ERR?") == '0,"No error"'
            assert _ask(fresh, "INIT:DONE?") == "0"
            assert float(_ask(fresh, "TRIG:LEV?")) == 1000.0
        aborted = _states(scope, "opc_wait_aborted")
        assert [e.value for e in aborted] == [ABORT_DEVICE_CLEAR]
        clears = [e for e in _states(scope, "device_clear") if e.value.startswith("new connection")]
        assert clears  # the new connection was the device clear
    finally:
        stale.close()


def test_the_same_connection_answers_after_its_client_gave_up(bench):
    """A further message on the waiting connection ends the wait (its answer would be discarded: -410)."""
    scope = bench.instruments["scope"]
    sock = _abandon_opc(bench.servers["scope"].port, NEVER_TRIGGERS)
    with sock:
        sock.settimeout(ANSWER_TIMEOUT_S)
        assert _ask(sock, "*IDN?").startswith("benchctl-sim,sim oscilloscope,")
        # -410 Query INTERRUPTED (IEEE 488.2-1992 §6.3.2.3, SCPI-1999 error list, from memory)
        assert _ask(sock, "SYST:ERR?").startswith("-410,")
        assert _ask(sock, "SYST:ERR?") == '0,"No error"'
    assert [e.value for e in _states(scope, "opc_wait_aborted")] == ["query interrupted"]


def test_messages_queued_behind_the_wait_are_discarded_on_reconnect(bench):
    """The abandoned client's later messages are not run after the clear (the input buffer is emptied)."""
    scope = bench.instruments["scope"]
    port = bench.servers["scope"].port
    stale = _connect(port)
    stale.sendall((NEVER_TRIGGERS + "\n*OPC?\nTRIG:LEV 2\n").encode())  # the last one waits behind *OPC?
    # Wait (bounded) until the *OPC? is running, then reconnect.
    deadline = threading.Event()
    for _ in range(int(ANSWER_TIMEOUT_S / 0.01)):
        if "*OPC?" in scope.audit.commands():
            break
        deadline.wait(0.01)
    with _connect(port) as fresh:
        assert _ask(fresh, "*IDN?").startswith("benchctl-sim,")
        assert float(_ask(fresh, "TRIG:LEV?")) == 1000.0
    assert "TRIG:LEV 2" not in scope.audit.commands()
    stale.close()


def test_a_closed_client_ends_the_wait(bench):
    scope = bench.instruments["scope"]
    stale = _abandon_opc(bench.servers["scope"].port, NEVER_TRIGGERS)
    stale.close()
    for _ in range(int(ANSWER_TIMEOUT_S / 0.01)):
        if _states(scope, "opc_wait_aborted"):
            break
        threading.Event().wait(0.01)
    # Either the close (seen first) or the next connection's clear ends it; no -410 either way.
    assert [e.value for e in _states(scope, "opc_wait_aborted")][0] in ("connection closed", ABORT_DEVICE_CLEAR)
    with _connect(bench.servers["scope"].port) as fresh:
        assert _ask(fresh, "*IDN?").startswith("benchctl-sim,")
        assert _ask(fresh, "SYST:ERR?") == '0,"No error"'


def test_loop_analyzer_sweep_wait_ends_on_reconnect(slow_bench):
    """The analyzer's *OPC? may wait an hour for a slow sweep; a reconnect ends it, the sweep goes on."""
    analyzer = slow_bench.instruments["analyzer"]
    port = slow_bench.servers["analyzer"].port
    with _connect(slow_bench.servers["source"].port) as source:  # the converter must run to have a loop
        source.sendall(b"VOLT 48;:CURR 2;:OUTP ON\n")
        assert _ask(source, "OUTP?") == "1"
    threading.Event().wait(0.3)  # let the model start (bounded, model time at scale 1)
    with _connect(port) as setup:
        setup.sendall(b"FREQ:STAR 1;STOP 100000;:SWE:POIN 800\n")
        sweep_s = float(_ask(setup, "SWE:TIME?"))
    assert sweep_s > 60.0, "the sweep must outlast the client timeouts by far for this test to mean anything"
    stale = _abandon_opc(port, "INIT")
    with _connect(port) as fresh:
        assert _ask(fresh, "*IDN?").startswith("benchctl-sim,")
        # STATus:OPERation:CONDition? still says "measuring": the sweep itself was not aborted.
        assert int(float(_ask(fresh, "STAT:OPER:COND?"))) != 0
        assert _ask(fresh, "SYST:ERR?") == '0,"No error"'
    assert [e.value for e in _states(analyzer, "opc_wait_aborted")] == [ABORT_DEVICE_CLEAR]
    stale.close()


@pytest.mark.parametrize("role", ["source", "load", "input_meter", "output_meter", "analyzer", "scope"])
def test_every_instrument_answers_a_new_connection_after_a_broken_one(bench, role):
    """A client that died mid-message (no terminator, an open quote) leaves nothing behind."""
    inst = bench.instruments[role]
    port = bench.servers[role].port
    stale = _connect(port)
    stale.sendall(b'*CLS;SYST:ERR?;*ESE 12;:ABC "unterminated')
    with _connect(port) as fresh:
        assert _ask(fresh, "*IDN?").startswith("benchctl-sim,")
        assert _ask(fresh, "*ESE?") == "0"  # the half message never ran
    stale.close()
    assert not any(text.startswith("*ESE 12") for text in inst.audit.commands())


# ------------------------------------------------------------------------------------ HiSLIP
def test_hislip_device_clear_after_a_capture_timed_out():
    bench = SimulatedBench("flyback-48v-5v", time_scale=50.0, protocol={"scope": "hislip"}).start()
    rm = pyvisa.ResourceManager("@py")
    try:
        scope = bench.instruments["scope"]
        assert bench.resources["scope"].endswith("::INSTR") and "hislip0," in bench.resources["scope"]
        res = rm.open_resource(bench.resources["scope"], timeout=int(ANSWER_TIMEOUT_S * 1000),
                               read_termination="\n", write_termination="\n")
        res.write(NEVER_TRIGGERS)
        res.timeout = int(GIVE_UP_S * 1000)
        with pytest.raises(pyvisa.VisaIOError) as info:
            res.query("*OPC?")
        assert info.value.error_code == pyvisa.constants.StatusCode.error_timeout
        res.clear()  # HiSLIP AsyncDeviceClear ... DeviceClearComplete
        res.timeout = int(ANSWER_TIMEOUT_S * 1000)
        assert res.query("*IDN?").startswith("benchctl-sim,sim oscilloscope,")
        assert res.query("SYST:ERR?") == '0,"No error"'
        assert res.query("INIT:DONE?") == "0"
        assert [e.value for e in scope.audit.states("opc_wait_aborted")] == [ABORT_DEVICE_CLEAR]
        assert any(e.value.startswith("hislip device clear") for e in scope.audit.states("device_clear"))
        res.close()
        # A new session recovers too: arm again, give up, open a second session.
        first = rm.open_resource(bench.resources["scope"], timeout=int(GIVE_UP_S * 1000), read_termination="\n")
        first.write("INIT")
        with pytest.raises(pyvisa.VisaIOError):
            first.query("*OPC?")
        second = rm.open_resource(bench.resources["scope"], timeout=int(ANSWER_TIMEOUT_S * 1000),
                                  read_termination="\n")
        assert second.query("*IDN?").startswith("benchctl-sim,sim oscilloscope,")
        second.close()
        first.close()
    finally:
        rm.close()
        bench.stop()


# ------------------------------------------------------------------------- without sockets
class _NeverDone(ScpiInstrument):
    def __init__(self) -> None:
        super().__init__(Identity("benchctl-sim", "sim stuck box", "X1", "1.0"), opc_timeout_s=3600.0)

    def pending_done(self) -> bool:
        return False


def test_device_clear_from_another_thread_ends_a_wait_and_discards_the_rest():
    inst = _NeverDone()
    result: list[object] = []
    worker = threading.Thread(target=lambda: result.append(inst.handle_message("*OPC?;*IDN?")), daemon=True)
    worker.start()
    for _ in range(int(ANSWER_TIMEOUT_S / 0.005)):
        if "*OPC?" in inst.audit.commands():
            break
        threading.Event().wait(0.005)
    inst.device_clear(source="test")
    worker.join(ANSWER_TIMEOUT_S)
    assert not worker.is_alive()
    assert result == [None]  # no answer: the output queue is cleared
    assert "*IDN?" not in inst.audit.commands()  # the rest of the message was discarded
    assert inst.queued_errors() == ()  # a device clear queues no error
    assert inst.handle_message("*IDN?").startswith("benchctl-sim,sim stuck box")


def test_device_clear_between_messages_does_not_abort_the_next_wait():
    """A clear counts only for the message it met; a later wait still runs to its bound."""
    inst = ScpiInstrument(Identity("benchctl-sim", "sim idle box", "X2", "1.0"), opc_timeout_s=0.01)
    inst.device_clear()
    assert inst.handle_message("*OPC?") == "1"
    assert inst.audit.states("opc_wait_aborted") == []
