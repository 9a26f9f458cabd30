"""A HiSLIP server that puts one :class:`ScpiInstrument` on a loopback port.

HiSLIP (IVI-6.1, High-Speed LAN Instrument Protocol; message layout and transactions
as in revision 2.0, from memory) carries SCPI over two TCP connections of one
session: the *synchronous* channel (the program and response messages, ``Data`` /
``DataEnd``) and the *asynchronous* channel (device clear, locks, status, message
size). VISA reaches it as ``TCPIP::127.0.0.1::hislip0,<port>::INSTR``. Only
127.0.0.1 is ever bound.

Every message has a 16-byte header: prologue ``HS``, message type (1 byte), control
code (1 byte), message parameter (4 bytes), payload length (8 bytes), network order.

What is served (synchronized mode only; overlapped mode is not offered):

* ``Initialize`` / ``InitializeResponse`` on the synchronous channel (protocol version
  the lesser of the client's and 2.0; session id), then ``AsyncInitialize`` /
  ``AsyncInitializeResponse`` on the second connection. A message before both channels
  stand is FatalError 2; a first message that is neither is FatalError 3; a sub-address
  other than ``hislip0`` is FatalError 3; a header without ``HS`` is FatalError 1.
* ``Data`` / ``DataEnd``: the payloads of a message are joined until ``DataEnd`` and run
  as one program message. The response goes back as ``Data`` ... ``DataEnd`` carrying the
  MessageID of the client's ``DataEnd``, in pieces no larger than the client's maximum
  message size (``AsyncMaximumMessageSize``, answered with this server's own maximum).
  A response ends with the instrument's terminator (LF; CR LF with the ``crlf`` quirk)
  and END, which the ``DataEnd`` means.
* A query interrupted by the next message (the client sent again before the response
  went out) is -410 and ``Interrupted`` on the synchronous channel (``AsyncInterrupted``
  is not sent: pyvisa-py's client reads the asynchronous channel only for the answer
  to its own request, and would take it for that answer).
* ``AsyncDeviceClear`` -> the instrument's :meth:`~ScpiInstrument.device_clear` (a pending
  ``*OPC?`` wait ends, its answer is never sent), every synchronous message is discarded
  until ``DeviceClearComplete``, which is answered ``DeviceClearAcknowledge``.
* ``AsyncLock`` (exclusive with an empty lock string, shared with a key; release),
  ``AsyncLockInfo``: while another session holds a lock, this session's messages wait.
* ``AsyncStatusQuery`` -> ``AsyncStatusResponse`` with the status byte, answered even
  while a message runs. ``AsyncRemoteLocalControl`` is acknowledged (and audited).
* ``Trigger`` is audited and otherwise ignored (no simulated instrument has a bus trigger).
* Anything else is ``Error`` 1 (unrecognized message type) on its channel.

The server faults of :class:`~.server.ScpiServer` (``unresponsive``, ``drop``,
``garble``) work here too, on the synchronous channel.
"""

from __future__ import annotations

import logging
import socket
import struct
import threading
import time
from dataclasses import dataclass, field
from enum import IntEnum
from typing import get_args

from .instrument import ABORT_CLOSED, ABORT_DEVICE_CLEAR, ABORT_NEW_INPUT, ScpiInstrument
from .server import GARBLED_RESPONSE, LOOPBACK, FaultKind, _reset_close, listen_on_loopback

logger = logging.getLogger(__name__)

HEADER = struct.Struct("!2sBBIQ")
PROLOGUE = b"HS"
#: The protocol version this server offers, (major, minor).
SERVER_VERSION = (2, 0)
#: This server's vendor id in AsyncInitializeResponse (two ASCII letters, our own).
VENDOR_ID = b"SB"
SUB_ADDRESS = "hislip0"
#: The largest message this server takes (its answer to AsyncMaximumMessageSize).
SERVER_MAX_MESSAGE_BYTES = 1 << 20
#: The client's maximum until it says otherwise.
DEFAULT_CLIENT_MAX_MESSAGE_BYTES = 1 << 20
_INIT_TIMEOUT_S = 5.0


class Msg(IntEnum):
    """HiSLIP message types (IVI-6.1 table of message types, from memory)."""

    INITIALIZE = 0
    INITIALIZE_RESPONSE = 1
    FATAL_ERROR = 2
    ERROR = 3
    ASYNC_LOCK = 4
    ASYNC_LOCK_RESPONSE = 5
    DATA = 6
    DATA_END = 7
    DEVICE_CLEAR_COMPLETE = 8
    DEVICE_CLEAR_ACKNOWLEDGE = 9
    ASYNC_REMOTE_LOCAL_CONTROL = 10
    ASYNC_REMOTE_LOCAL_RESPONSE = 11
    TRIGGER = 12
    INTERRUPTED = 13
    ASYNC_INTERRUPTED = 14
    ASYNC_MAX_MSG_SIZE = 15
    ASYNC_MAX_MSG_SIZE_RESPONSE = 16
    ASYNC_INITIALIZE = 17
    ASYNC_INITIALIZE_RESPONSE = 18
    ASYNC_DEVICE_CLEAR = 19
    ASYNC_SERVICE_REQUEST = 20
    ASYNC_STATUS_QUERY = 21
    ASYNC_STATUS_RESPONSE = 22
    ASYNC_DEVICE_CLEAR_ACKNOWLEDGE = 23
    ASYNC_LOCK_INFO = 24
    ASYNC_LOCK_INFO_RESPONSE = 25


# FatalError codes
FATAL_UNIDENTIFIED = 0
FATAL_BAD_HEADER = 1
FATAL_CHANNELS_NOT_ESTABLISHED = 2
FATAL_BAD_INITIALIZATION = 3
# Error codes
ERROR_UNRECOGNIZED_MESSAGE_TYPE = 1
ERROR_MESSAGE_TOO_LARGE = 4
# AsyncLockResponse control codes
LOCK_FAILURE, LOCK_SUCCESS, LOCK_SUCCESS_SHARED, LOCK_ERROR = 0, 1, 2, 3


class _Closed(Exception):
    """The peer closed the connection (or the server is stopping)."""


class _Fatal(Exception):
    def __init__(self, code: int, text: str) -> None:
        super().__init__(text)
        self.code = code


@dataclass(frozen=True)
class Header:
    kind: int
    control: int
    parameter: int
    length: int


def pack(kind: int, control: int = 0, parameter: int = 0, payload: bytes = b"") -> bytes:
    """One HiSLIP message: the 16-byte header and its payload."""
    return HEADER.pack(PROLOGUE, int(kind), control & 0xFF, parameter & 0xFFFF_FFFF, len(payload)) + payload


def _recv_exact(sock: socket.socket, n: int) -> bytes:
    chunks = bytearray()
    while len(chunks) < n:
        data = sock.recv(min(n - len(chunks), 1 << 20))
        if not data:
            raise _Closed()
        chunks += data
    return bytes(chunks)


def read_header(sock: socket.socket) -> Header:
    raw = _recv_exact(sock, HEADER.size)
    prologue, kind, control, parameter, length = HEADER.unpack(raw)
    if prologue != PROLOGUE:
        raise _Fatal(FATAL_BAD_HEADER, f"a message header must begin with 'HS'; got {prologue!r}")
    return Header(kind, control, parameter, length)


@dataclass(eq=False)
class _Session:
    id: int
    peer: str
    sync: socket.socket
    version: int
    async_sock: socket.socket | None = None
    async_ready: threading.Event = field(default_factory=threading.Event)
    clearing: threading.Event = field(default_factory=threading.Event)
    send_lock: threading.Lock = field(default_factory=threading.Lock)
    client_max_bytes: int = DEFAULT_CLIENT_MAX_MESSAGE_BYTES
    lock_key: str | None = None  # "" exclusive, a key shared, None no lock
    dropped: bool = False

    def shutdown(self) -> None:
        self.dropped = True
        for sock in (self.sync, self.async_sock):
            if sock is None:
                continue
            try:
                sock.shutdown(socket.SHUT_RDWR)
            except OSError:
                pass


class HislipServer:
    """Serve ``instrument`` over HiSLIP on ``127.0.0.1:port``; a context manager.

    Same surface as :class:`~.server.ScpiServer` (``start``, ``stop``, ``port``,
    ``resource``, ``set_fault``). ``max_message_bytes`` bounds one program message
    across its ``Data`` messages (-363 beyond it).
    """

    def __init__(self, instrument: ScpiInstrument, *, port: int = 0, host: str = LOOPBACK,
                 max_message_bytes: int = 1 << 20) -> None:
        if host != LOOPBACK:
            raise ValueError(
                f"HislipServer binds only to {LOOPBACK} (loopback); got host {host!r}. Simulated "
                f"instruments must not be reachable from the network: pass host='{LOOPBACK}' or leave it out."
            )
        if not 0 <= port <= 65535:
            raise ValueError(f"HislipServer port must be 0 (ephemeral) or 1-65535; got {port}")
        self.instrument = instrument
        self.max_message_bytes = max_message_bytes
        self._requested_port = port
        self._port: int | None = None
        self._lock = threading.Lock()
        self._changed = threading.Condition(self._lock)  # faults and locks
        self._fault: FaultKind = "none"
        self._listener: socket.socket | None = None
        self._accept_thread: threading.Thread | None = None
        self._sessions: dict[int, _Session] = {}
        self._loose: set[socket.socket] = set()  # accepted, not yet initialized
        self._threads: list[threading.Thread] = []
        self._stopping = threading.Event()
        self._running = False
        self._next_session = 0

    # --------------------------------------------------------------- life cycle
    def start(self) -> HislipServer:
        """Bind and listen; returns once connections are accepted. Idempotent."""
        with self._lock:
            if self._running:
                return self
            listener = listen_on_loopback(self._requested_port, f"{self.instrument.identity.model} (HiSLIP)")
            self._listener = listener
            self._port = listener.getsockname()[1]
            self._stopping.clear()
            self._running = True
            self._accept_thread = threading.Thread(target=self._accept_loop, name=f"hislip-{self._port}-accept",
                                                   daemon=True)
            self._accept_thread.start()
        logger.info("HiSLIP listening on %s:%d (loopback only)", LOOPBACK, self._port)
        return self

    def stop(self, timeout_s: float = 1.0) -> None:
        """Close the listener and every session and join the threads. Idempotent."""
        with self._lock:
            if not self._running:
                return
            self._running = False
            self._stopping.set()
            sessions = list(self._sessions.values())
            loose = list(self._loose)
            threads = list(self._threads)
            listener, self._listener = self._listener, None
            self._changed.notify_all()
        for session in sessions:
            session.shutdown()
        for sock in loose:
            try:
                sock.shutdown(socket.SHUT_RDWR)
            except OSError:
                pass
        deadline = time.monotonic() + timeout_s
        if self._accept_thread is not None:
            self._accept_thread.join(max(0.0, deadline - time.monotonic()))
        if listener is not None:
            listener.close()
        for thread in threads:
            thread.join(max(0.0, deadline - time.monotonic()))
        stuck = [t.name for t in threads if t.is_alive()]
        if stuck:
            logger.warning("HiSLIP port %s: threads still busy after stop(): %s", self._port, stuck)

    def __enter__(self) -> HislipServer:
        return self.start()

    def __exit__(self, *exc: object) -> None:
        self.stop()

    @property
    def port(self) -> int:
        if self._port is None:
            if self._requested_port:
                return self._requested_port
            raise RuntimeError("HislipServer.port: the ephemeral port is chosen by start(); call start() first")
        return self._port

    @property
    def resource(self) -> str:
        """The VISA resource string, ``TCPIP::127.0.0.1::hislip0,<port>::INSTR``."""
        return f"TCPIP::{LOOPBACK}::{SUB_ADDRESS},{self.port}::INSTR"

    @property
    def connection_count(self) -> int:
        """Sessions open (each is two TCP connections)."""
        with self._lock:
            return len(self._sessions)

    # ------------------------------------------------------------------- faults
    @property
    def fault(self) -> FaultKind:
        return self._fault

    def set_fault(self, kind: FaultKind) -> None:
        """Switch a fault on (``"unresponsive"``, ``"drop"``, ``"garble"``) or off (``"none"``)."""
        if kind not in get_args(FaultKind):
            raise ValueError(f"unknown fault {kind!r}; choose one of {', '.join(get_args(FaultKind))}")
        with self._lock:
            self._fault = kind
            sessions = list(self._sessions.values()) if kind == "drop" else []
            self._changed.notify_all()
        for session in sessions:
            session.shutdown()

    # ------------------------------------------------------------------ threads
    def _spawn(self, target, *args, name: str) -> threading.Thread:  # type: ignore[no-untyped-def]
        thread = threading.Thread(target=target, args=args, name=name, daemon=True)
        with self._lock:
            self._threads = [t for t in self._threads if t.is_alive()]
            self._threads.append(thread)
        thread.start()
        return thread

    def _accept_loop(self) -> None:
        listener = self._listener
        assert listener is not None
        serial = 0
        while not self._stopping.is_set():
            try:
                sock, addr = listener.accept()
            except TimeoutError:
                continue
            except OSError:
                if not self._stopping.is_set():
                    logger.exception("HiSLIP port %s: accept failed", self._port)
                break
            with self._lock:
                refuse = self._fault == "drop" or self._stopping.is_set()
                if not refuse:
                    self._loose.add(sock)
            if refuse:
                _reset_close(sock)
                continue
            serial += 1
            sock.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
            self._spawn(self._first_message, sock, f"{addr[0]}:{addr[1]}", name=f"hislip-{self._port}-c{serial}")

    def _first_message(self, sock: socket.socket, peer: str) -> None:
        """Initialize (this becomes the synchronous channel) or AsyncInitialize (the asynchronous one)."""
        try:
            sock.settimeout(_INIT_TIMEOUT_S)
            header = read_header(sock)
            payload = _recv_exact(sock, header.length) if header.length else b""
            sock.settimeout(None)
            if header.kind == Msg.INITIALIZE:
                session = self._initialize(sock, peer, header, payload)
                self._serve_sync(session)
                return
            if header.kind == Msg.ASYNC_INITIALIZE:
                session = self._async_initialize(sock, header)
                self._serve_async(session)
                return
            raise _Fatal(FATAL_BAD_INITIALIZATION,
                         f"the first message of a connection must be Initialize or AsyncInitialize, "
                         f"not type {header.kind}")
        except _Fatal as fatal:
            logger.info("HiSLIP port %s: fatal error to %s: %s", self._port, peer, fatal)
            try:
                sock.sendall(pack(Msg.FATAL_ERROR, fatal.code, 0, str(fatal).encode("ascii", "replace")))
            except OSError:
                pass
            sock.close()
        except (_Closed, OSError, TimeoutError) as exc:
            logger.debug("HiSLIP port %s: connection %s ended before initialization: %s", self._port, peer, exc)
            sock.close()
        finally:
            with self._lock:
                self._loose.discard(sock)

    def _initialize(self, sock: socket.socket, peer: str, header: Header, payload: bytes) -> _Session:
        sub_address = payload.decode("ascii", "replace")
        if sub_address.lower() != SUB_ADDRESS:
            raise _Fatal(FATAL_BAD_INITIALIZATION,
                         f"unknown sub-address {sub_address!r}; this server has only {SUB_ADDRESS!r}")
        client_version = header.parameter >> 16
        version = min(client_version, (SERVER_VERSION[0] << 8) | SERVER_VERSION[1])
        with self._lock:
            self._next_session = self._next_session % 0xFFFF + 1
            while self._next_session in self._sessions:
                self._next_session = self._next_session % 0xFFFF + 1
            session = _Session(self._next_session, peer, sock, version)
            self._sessions[session.id] = session
            self._loose.discard(sock)
        sock.sendall(pack(Msg.INITIALIZE_RESPONSE, 0, (version << 16) | session.id))  # control 0: synchronized
        logger.debug("HiSLIP port %s: session %d from %s (version %d.%d)", self._port, session.id, peer,
                     version >> 8, version & 0xFF)
        return session

    def _async_initialize(self, sock: socket.socket, header: Header) -> _Session:
        with self._lock:
            session = self._sessions.get(header.parameter & 0xFFFF)
            if session is None or session.async_sock is not None:
                raise _Fatal(FATAL_BAD_INITIALIZATION,
                             f"AsyncInitialize names session {header.parameter}, which is not waiting for its "
                             f"asynchronous channel")
            session.async_sock = sock
            self._loose.discard(sock)
        sock.sendall(pack(Msg.ASYNC_INITIALIZE_RESPONSE, 0, int.from_bytes(VENDOR_ID.rjust(4, b"\0"), "big")))
        session.async_ready.set()
        return session

    # ------------------------------------------------------ synchronous channel
    def _serve_sync(self, session: _Session) -> None:
        sock = session.sync
        buffer = bytearray()
        overrun = False
        try:
            if not session.async_ready.wait(_INIT_TIMEOUT_S):
                raise _Fatal(FATAL_CHANNELS_NOT_ESTABLISHED,
                             "the asynchronous channel was not opened (AsyncInitialize) within "
                             f"{_INIT_TIMEOUT_S:g} s")
            self.instrument.device_clear(source=f"new HiSLIP session {session.id} {session.peer}")
            while not (self._stopping.is_set() or session.dropped):
                header = read_header(sock)
                if header.kind in (Msg.DATA, Msg.DATA_END):
                    payload = _recv_exact(sock, header.length) if header.length else b""
                    if session.clearing.is_set():
                        continue  # discarded until DeviceClearComplete
                    if header.length > SERVER_MAX_MESSAGE_BYTES:
                        self._send_sync(session, pack(Msg.ERROR, ERROR_MESSAGE_TOO_LARGE, 0,
                                                      f"at most {SERVER_MAX_MESSAGE_BYTES} bytes per message "
                                                      f"(AsyncMaximumMessageSize)".encode()))
                        continue
                    if len(buffer) + len(payload) > self.max_message_bytes:
                        overrun = True
                        buffer.clear()
                    else:
                        buffer += payload
                    if header.kind == Msg.DATA_END:
                        message, was_overrun = bytes(buffer), overrun
                        buffer.clear()
                        overrun = False
                        self._handle(session, message, header.parameter, was_overrun)
                elif header.kind == Msg.DEVICE_CLEAR_COMPLETE:
                    buffer.clear()
                    overrun = False
                    if header.length:
                        _recv_exact(sock, header.length)
                    with session.send_lock:
                        session.clearing.clear()
                        sock.sendall(pack(Msg.DEVICE_CLEAR_ACKNOWLEDGE, 0))  # feature bitmap: synchronized
                elif header.kind == Msg.TRIGGER:
                    self.instrument.audit_state("hislip_trigger", session.peer)
                    if header.length:
                        _recv_exact(sock, header.length)
                elif header.kind == Msg.FATAL_ERROR:
                    logger.info("HiSLIP port %s: client %s sent a fatal error", self._port, session.peer)
                    break
                else:
                    if header.length:
                        _recv_exact(sock, header.length)
                    if header.kind != Msg.ERROR:
                        self._send_sync(session, pack(Msg.ERROR, ERROR_UNRECOGNIZED_MESSAGE_TYPE, 0,
                                                      f"message type {header.kind} is not taken on the "
                                                      f"synchronous channel".encode()))
        except _Fatal as fatal:
            try:
                sock.sendall(pack(Msg.FATAL_ERROR, fatal.code, 0, str(fatal).encode("ascii", "replace")))
            except OSError:
                pass
        except (_Closed, OSError) as exc:
            if not (self._stopping.is_set() or session.dropped):
                logger.debug("HiSLIP port %s: session %d ended: %s", self._port, session.id, exc)
        finally:
            self._end_session(session)

    def _send_sync(self, session: _Session, data: bytes) -> None:
        with session.send_lock:
            session.sync.sendall(data)

    def _handle(self, session: _Session, message: bytes, message_id: int, overrun: bool) -> None:
        with self._lock:
            while self._fault == "unresponsive" and not (self._stopping.is_set() or session.dropped):
                self._changed.wait(0.1)
            while self._locked_out(session) and not (self._stopping.is_set() or session.dropped):
                self._changed.wait(0.1)
        if overrun:
            self.instrument.queue_error(
                -363, detail=f"a message of more than {self.max_message_bytes} bytes was discarded; "
                             f"send at most {self.max_message_bytes} bytes per message")
            return
        with self.instrument.interrupt_check(lambda: self._client_moved_on(session)):
            response = self.instrument.process_message(message, source=f"hislip {session.peer}")
            aborted = self.instrument.last_abort()
        if response is None or aborted == ABORT_DEVICE_CLEAR or session.clearing.is_set():
            return
        if self._has_input(session.sync):
            self.instrument.queue_error(
                -410, detail="a new message arrived before the response was read; read each response "
                             "before sending the next message")
            self._send_sync(session, pack(Msg.INTERRUPTED, 0, message_id))
            return
        with self._lock:
            garble = self._fault == "garble"
            if garble:
                self._fault = "none"
        if garble:
            response = GARBLED_RESPONSE
        quirks = self.instrument.quirks
        if quirks.answer_delay_s:
            self._stopping.wait(quirks.answer_delay_s)
        data = response + quirks.response_terminator
        piece = max(1, session.client_max_bytes - HEADER.size)
        with session.send_lock:
            if session.clearing.is_set():
                return  # a device clear came while the answer was being prepared
            out = bytearray()
            for start in range(0, len(data), piece):
                chunk = data[start:start + piece]
                kind = Msg.DATA_END if start + piece >= len(data) else Msg.DATA
                out += pack(kind, 0, message_id, chunk)
                if len(out) >= 1 << 20:
                    session.sync.sendall(out)
                    out.clear()
            session.sync.sendall(out)

    def _client_moved_on(self, session: _Session) -> str | None:
        """A running *OPC? ends when this session's client sends again, clears, or goes."""
        if session.dropped or self._stopping.is_set() or session.clearing.is_set():
            return ABORT_CLOSED
        try:
            data = session.sync.recv(1, socket.MSG_PEEK | socket.MSG_DONTWAIT)
        except (BlockingIOError, InterruptedError):
            return None
        except OSError:
            return ABORT_CLOSED
        return ABORT_NEW_INPUT if data else ABORT_CLOSED

    @staticmethod
    def _has_input(sock: socket.socket) -> bool:
        try:
            return bool(sock.recv(1, socket.MSG_PEEK | socket.MSG_DONTWAIT))
        except (BlockingIOError, InterruptedError, OSError):
            return False

    # ----------------------------------------------------- asynchronous channel
    def _serve_async(self, session: _Session) -> None:
        sock = session.async_sock
        assert sock is not None
        try:
            while not (self._stopping.is_set() or session.dropped):
                header = read_header(sock)
                payload = _recv_exact(sock, header.length) if header.length else b""
                reply = self._async_reply(session, header, payload)
                if reply:
                    sock.sendall(reply)
        except _Fatal as fatal:
            try:
                sock.sendall(pack(Msg.FATAL_ERROR, fatal.code, 0, str(fatal).encode("ascii", "replace")))
            except OSError:
                pass
            session.shutdown()
        except (_Closed, OSError) as exc:
            if not (self._stopping.is_set() or session.dropped):
                logger.debug("HiSLIP port %s: async channel of session %d ended: %s", self._port, session.id, exc)
            session.shutdown()

    def _async_reply(self, session: _Session, header: Header, payload: bytes) -> bytes:
        kind = header.kind
        if kind == Msg.ASYNC_MAX_MSG_SIZE:
            if len(payload) != 8:
                return pack(Msg.ERROR, 0, 0, b"AsyncMaximumMessageSize carries an 8-byte size")
            session.client_max_bytes = max(HEADER.size + 1, struct.unpack("!Q", payload)[0])
            return pack(Msg.ASYNC_MAX_MSG_SIZE_RESPONSE, 0, 0, struct.pack("!Q", SERVER_MAX_MESSAGE_BYTES))
        if kind == Msg.ASYNC_DEVICE_CLEAR:
            with session.send_lock:
                session.clearing.set()
            self.instrument.device_clear(source=f"hislip device clear {session.peer}")
            return pack(Msg.ASYNC_DEVICE_CLEAR_ACKNOWLEDGE, 0)  # feature preference: synchronized
        if kind == Msg.ASYNC_STATUS_QUERY:
            return pack(Msg.ASYNC_STATUS_RESPONSE, self.instrument.status_byte())
        if kind == Msg.ASYNC_LOCK:
            return pack(Msg.ASYNC_LOCK_RESPONSE, self._lock_request(session, header, payload))
        if kind == Msg.ASYNC_LOCK_INFO:
            with self._lock:
                exclusive = any(s.lock_key == "" for s in self._sessions.values())
                holders = sum(1 for s in self._sessions.values() if s.lock_key is not None)
            return pack(Msg.ASYNC_LOCK_INFO_RESPONSE, int(exclusive), holders)
        if kind == Msg.ASYNC_REMOTE_LOCAL_CONTROL:
            self.instrument.audit_state("remote_local", header.control)
            return pack(Msg.ASYNC_REMOTE_LOCAL_RESPONSE, 0)
        if kind == Msg.FATAL_ERROR:
            raise _Closed()
        if kind == Msg.ERROR:
            return b""
        return pack(Msg.ERROR, ERROR_UNRECOGNIZED_MESSAGE_TYPE, 0,
                    f"message type {kind} is not taken on the asynchronous channel".encode())

    # -------------------------------------------------------------------- locks
    def _locked_out(self, session: _Session) -> bool:
        """Whether another session's lock keeps this one waiting (call with ``self._lock``)."""
        if session.lock_key is not None:
            return False
        return any(s.lock_key is not None for s in self._sessions.values() if s is not session)

    def _lock_request(self, session: _Session, header: Header, payload: bytes) -> int:
        if header.control == 0:  # release
            with self._lock:
                held, session.lock_key = session.lock_key, None
                self._changed.notify_all()
            if held is None:
                return LOCK_ERROR
            return LOCK_SUCCESS if held == "" else LOCK_SUCCESS_SHARED
        key = payload.decode("ascii", "replace")
        deadline = time.monotonic() + header.parameter / 1000.0
        with self._lock:
            while True:
                others = [s.lock_key for s in self._sessions.values() if s is not session and s.lock_key is not None]
                if session.lock_key is not None:
                    return LOCK_ERROR  # already holds a lock
                if not others or (key and all(k == key for k in others)):
                    session.lock_key = key
                    return LOCK_SUCCESS
                left = deadline - time.monotonic()
                if left <= 0 or self._stopping.is_set():
                    return LOCK_FAILURE
                self._changed.wait(min(left, 0.1))

    def _end_session(self, session: _Session) -> None:
        session.shutdown()
        with self._lock:
            self._sessions.pop(session.id, None)
            self._changed.notify_all()  # its lock, if any, is released
        for sock in (session.sync, session.async_sock):
            if sock is not None:
                if session.dropped and self._fault == "drop":
                    _reset_close(sock)
                else:
                    sock.close()
        logger.debug("HiSLIP port %s: session %d closed", self._port, session.id)
