"""A TCP server that puts one :class:`ScpiInstrument` on a loopback port.

Raw-socket SCPI: newline-terminated messages over TCP, as reached by VISA with
``TCPIP::127.0.0.1::<port>::SOCKET`` (LXI "Ports, Protocols and Services" names
port 5025 for it; any free port is used here, 0 = ephemeral). Only 127.0.0.1 is
ever bound. One thread per connection; the instrument's lock makes messages from
several connections run one at a time.

-410 Query INTERRUPTED (IEEE 488.2-1992 §6.3.2.3, from memory, adapted to a
socket): when a message's response is ready and the same connection has already
sent (part of) a further program message, the response is discarded and -410 is
queued. A client that reads each response before it writes again never meets it.

Recovery: a raw socket has no device clear, so a new connection is one (see
:meth:`ScpiInstrument.device_clear`): a ``*OPC?`` wait left by a client that timed out
ends at once and the new connection's ``*IDN?`` is answered. The waiting connection's
unread input is discarded with it. A wait also ends when its own connection sends a
further message (queued -410) or closes.

Quirks (:mod:`.quirks`): the response terminator and an answer delay are applied here.

Fault hooks (:meth:`ScpiServer.set_fault`): ``"unresponsive"`` processes and
answers nothing (received bytes wait and are processed once cleared); ``"drop"``
closes every connection and resets new ones until cleared; ``"garble"`` replaces
the next response by :data:`GARBLED_RESPONSE`, then clears itself.
"""

from __future__ import annotations

import logging
import socket
import struct
import threading
import time
from collections import deque
from typing import Literal, get_args

from .framing import MessageFramer, Overrun
from .instrument import ABORT_CLOSED, ABORT_DEVICE_CLEAR, ABORT_NEW_INPUT, ScpiInstrument

logger = logging.getLogger(__name__)

FaultKind = Literal["none", "unresponsive", "drop", "garble"]
#: What a garbled response looks like: printable, but not a number, not a block.
GARBLED_RESPONSE = b"~?GARBLED%&~"
LOOPBACK = "127.0.0.1"
_ACCEPT_POLL_S = 0.05


class _Connection:
    def __init__(self, sock: socket.socket, peer: str) -> None:
        self.sock = sock
        self.peer = peer
        self.dropped = False
        self.thread: threading.Thread | None = None

    def shutdown(self) -> None:
        self.dropped = True
        try:
            self.sock.shutdown(socket.SHUT_RDWR)
        except OSError:
            pass


def _reset_close(sock: socket.socket) -> None:
    """Close with SO_LINGER 0 so the peer sees a reset rather than an orderly close."""
    try:
        sock.setsockopt(socket.SOL_SOCKET, socket.SO_LINGER, struct.pack("ii", 1, 0))
    except OSError:
        pass
    sock.close()


def listen_on_loopback(port: int, what: str) -> socket.socket:
    """A listening TCP socket on 127.0.0.1:``port`` (0: a free one) that polls for accepts; an
    address in use is an error naming ``what`` and the port."""
    listener = socket.socket(socket.AF_INET, socket.SOCK_STREAM)
    listener.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
    try:
        listener.bind((LOOPBACK, port))
    except OSError as exc:
        listener.close()
        raise OSError(f"cannot listen on {LOOPBACK}:{port} for {what}: {exc}; choose another port or 0 for a free one"
                      ) from exc
    listener.listen(16)
    listener.settimeout(_ACCEPT_POLL_S)
    return listener


class ScpiServer:
    """Serve ``instrument`` on ``127.0.0.1:port``; a context manager.

    ``max_message_bytes`` bounds one program message (-363 beyond it).
    """

    def __init__(self, instrument: ScpiInstrument, *, port: int = 0, host: str = LOOPBACK,
                 max_message_bytes: int = 1 << 20) -> None:
        if host != LOOPBACK:
            raise ValueError(
                f"ScpiServer binds only to {LOOPBACK} (loopback); got host {host!r}. Simulated "
                f"instruments must not be reachable from the network: pass host='{LOOPBACK}' or leave it out."
            )
        if not 0 <= port <= 65535:
            raise ValueError(f"ScpiServer port must be 0 (ephemeral) or 1-65535; got {port}")
        self.instrument = instrument
        self.max_message_bytes = max_message_bytes
        self._requested_port = port
        self._port: int | None = None
        self._lock = threading.Lock()
        self._fault_changed = threading.Condition(self._lock)
        self._fault: FaultKind = "none"
        self._listener: socket.socket | None = None
        self._accept_thread: threading.Thread | None = None
        self._connections: set[_Connection] = set()
        self._stopping = threading.Event()
        self._running = False
        self._serial = 0

    # --------------------------------------------------------------- life cycle
    def start(self) -> ScpiServer:
        """Bind and listen; returns once connections are accepted. Idempotent."""
        with self._lock:
            if self._running:
                return self
            listener = listen_on_loopback(self._requested_port, self.instrument.identity.model)
            self._listener = listener
            self._port = listener.getsockname()[1]
            self._stopping.clear()
            self._running = True
            self._accept_thread = threading.Thread(target=self._accept_loop, name=f"scpi-{self._port}-accept",
                                                   daemon=True)
            self._accept_thread.start()
        logger.info("listening on %s:%d (loopback only)", LOOPBACK, self._port)
        return self

    def stop(self, timeout_s: float = 1.0) -> None:
        """Close the listener and every connection and join the threads. Idempotent."""
        with self._lock:
            if not self._running:
                return
            self._running = False
            self._stopping.set()
            connections = list(self._connections)
            listener, self._listener = self._listener, None
            self._fault_changed.notify_all()
        for conn in connections:
            conn.shutdown()
        deadline = time.monotonic() + timeout_s
        if self._accept_thread is not None:
            self._accept_thread.join(max(0.0, deadline - time.monotonic()))
        if listener is not None:
            listener.close()
        for conn in connections:
            if conn.thread is not None:
                conn.thread.join(max(0.0, deadline - time.monotonic()))
        stuck = [c.peer for c in connections if c.thread is not None and c.thread.is_alive()]
        if stuck:
            logger.warning("port %s: connection threads still busy after stop(): %s", self._port, stuck)
        logger.info("stopped %s:%s", LOOPBACK, self._port)

    def __enter__(self) -> ScpiServer:
        return self.start()

    def __exit__(self, *exc: object) -> None:
        self.stop()

    @property
    def port(self) -> int:
        """The TCP port; known once started (an ephemeral port is chosen at start)."""
        if self._port is None:
            if self._requested_port:
                return self._requested_port
            raise RuntimeError("ScpiServer.port: the ephemeral port is chosen by start(); call start() first")
        return self._port

    @property
    def resource(self) -> str:
        """The VISA resource string, ``TCPIP::127.0.0.1::<port>::SOCKET``."""
        return f"TCPIP::{LOOPBACK}::{self.port}::SOCKET"

    @property
    def connection_count(self) -> int:
        with self._lock:
            return len(self._connections)

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
            connections = list(self._connections) if kind == "drop" else []
            self._fault_changed.notify_all()
        logger.info("port %s: fault %s", self._port, kind)
        for conn in connections:
            conn.shutdown()

    # ------------------------------------------------------------------ threads
    def _accept_loop(self) -> None:
        listener = self._listener
        assert listener is not None
        while not self._stopping.is_set():
            try:
                sock, addr = listener.accept()
            except TimeoutError:
                continue
            except OSError:
                if not self._stopping.is_set():
                    logger.exception("port %s: accept failed", self._port)
                break
            peer = f"{addr[0]}:{addr[1]}"
            with self._lock:
                refuse = self._fault == "drop" or self._stopping.is_set()
                if not refuse:
                    sock.settimeout(None)
                    sock.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
                    conn = _Connection(sock, peer)
                    self._serial += 1
                    conn.thread = threading.Thread(target=self._serve, args=(conn,), daemon=True,
                                                   name=f"scpi-{self._port}-conn{self._serial}")
                    self._connections.add(conn)
            if refuse:
                logger.debug("port %s: refused %s (fault drop)", self._port, peer)
                _reset_close(sock)
                continue
            logger.debug("port %s: connection from %s", self._port, peer)
            conn.thread.start()

    def _serve(self, conn: _Connection) -> None:
        framer = MessageFramer(self.max_message_bytes)
        pending: deque[bytes | Overrun] = deque()
        try:
            self.instrument.device_clear(source=f"new connection {conn.peer}")
            while not (self._stopping.is_set() or conn.dropped):
                with self._lock:
                    if self._fault == "unresponsive":
                        self._fault_changed.wait(0.1)
                        continue
                if pending:
                    self._handle(conn, pending.popleft(), framer, pending)
                    continue
                data = conn.sock.recv(65536)
                if not data:
                    break
                pending.extend(framer.feed(data))
        except OSError as exc:
            if not (self._stopping.is_set() or conn.dropped):
                logger.debug("port %s: connection %s ended: %s", self._port, conn.peer, exc)
        finally:
            with self._lock:
                self._connections.discard(conn)
            if conn.dropped and not self._stopping.is_set():
                _reset_close(conn.sock)
            else:
                conn.sock.close()
            logger.debug("port %s: connection %s closed", self._port, conn.peer)

    def _handle(self, conn: _Connection, item: bytes | Overrun, framer: MessageFramer,
                pending: deque[bytes | Overrun]) -> None:
        if isinstance(item, Overrun):
            logger.warning("port %s: %s sent a message of more than %d bytes", self._port, conn.peer,
                           self.max_message_bytes)
            self.instrument.queue_error(
                -363, detail=f"a message of more than {self.max_message_bytes} bytes was discarded; "
                             f"send at most {self.max_message_bytes} bytes per message")
            return
        with self.instrument.interrupt_check(lambda: self._client_moved_on(conn)):
            response = self.instrument.process_message(item, source=conn.peer)
            aborted = self.instrument.last_abort()
        if aborted == ABORT_DEVICE_CLEAR:
            # a device clear (another connection arrived) ended this wait: drop what this client queued
            pending.clear()
            framer.reset()
            return
        if response is None:
            return
        if self._more_input(conn, framer, pending):
            self.instrument.queue_error(
                -410, detail="a new message arrived before the response was read; read each response "
                             "before sending the next message")
            return
        with self._lock:
            garble = self._fault == "garble"
            if garble:
                self._fault = "none"
        if garble:
            logger.info("port %s: garbling response %r", self._port, response[:60])
            response = GARBLED_RESPONSE
        quirks = self.instrument.quirks
        if quirks.answer_delay_s:
            self._stopping.wait(quirks.answer_delay_s)
        logger.debug("port %s: -> %s %r", self._port, conn.peer, response[:200])
        conn.sock.sendall(response + quirks.response_terminator)

    def _client_moved_on(self, conn: _Connection) -> str | None:
        """Whether the client sent more or closed while its message runs (peeked, nothing consumed)."""
        if conn.dropped or self._stopping.is_set():
            return ABORT_CLOSED
        try:
            data = conn.sock.recv(1, socket.MSG_PEEK | socket.MSG_DONTWAIT)
        except (BlockingIOError, InterruptedError):
            return None
        except OSError:
            return ABORT_CLOSED
        return ABORT_NEW_INPUT if data else ABORT_CLOSED

    @staticmethod
    def _more_input(conn: _Connection, framer: MessageFramer, pending: deque[bytes | Overrun]) -> bool:
        if pending:
            return True
        try:
            data = conn.sock.recv(65536, socket.MSG_DONTWAIT)
        except (BlockingIOError, InterruptedError):
            data = b""
        except OSError:
            return False
        if data:
            pending.extend(framer.feed(data))
        return bool(pending) or framer.has_partial()
