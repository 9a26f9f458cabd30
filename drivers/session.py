"""The session layer: one message-based connection to one instrument, and nothing more.

A session opens, writes a program message, queries (one answer line), reads one IEEE 488.2
definite-length block answer, and closes. Every failure of pyvisa or of the socket
underneath becomes the project's own error here, once, in :meth:`VisaSession.translated`
(:class:`InstrumentTimeout` states the timeout that applied). Retries, error-queue checks,
read-back and reconnects are policy and live in :mod:`drivers.scpi_driver`; a session
never retries.

:class:`Session` is the interface the driver needs; :class:`VisaSession` implements it over
pyvisa (pyvisa-py backend, ``"@py"``, so no vendor VISA is needed); a test double with
scripted answers is in :mod:`drivers.testing`.

Tuning of pyvisa-py raw sockets (``TCPIP::host::port::SOCKET``), the documented fast path,
the only place any driver reaches into pyvisa-py internals (``visalib.sessions``, the
backend's ``interface`` socket and ``_pending_buffer``); other backends and interfaces
take the generic pyvisa path:

* TCP_NODELAY on the socket: without it a setting followed by ``SYST:ERR?`` waits for the
  instrument's delayed acknowledgement of the first packet — about 40 ms on Linux (Nagle's
  algorithm, RFC 896, meeting delayed ACKs, RFC 1122 §4.2.3.2). pyvisa-py does not expose
  the VISA attribute for it on SOCKET resources.
* Block payloads are received straight from the socket into one buffer (after what
  pyvisa-py had already buffered): a 100k-point float32 trace within about 2x of a bare
  socket read (``benchmarks/waveform_transfer.py``), where a read that stops at every newline
  byte inside binary data costs one VISA read per such byte.
* ``<text query>;<block query>`` answered as ``<text>;#<block>`` in one round trip
  (:meth:`VisaSession.query_text_and_block`); None on the generic path, where the caller
  asks twice.

Block form (IEEE 488.2-1992 §8.7.9, from memory): ``#<n><n digits: byte count><bytes>``
followed by the response terminator; parsed by :mod:`drivers.ieee488_block`.
"""

from __future__ import annotations

import logging
import select
import socket
import threading
import time
from contextlib import contextmanager
from typing import Any, Callable, Iterator, Protocol

from benchctl.errors import (
    BenchctlError,
    InstrumentConnectionError,
    InstrumentError,
    InstrumentResponseError,
    InstrumentTimeout,
)
from benchctl.drivers.ieee488_block import block_length, header_length

logger = logging.getLogger(__name__)

_resource_manager_lock = threading.Lock()
_resource_manager: Any = None


def resource_manager() -> Any:
    """The process-wide pyvisa ResourceManager on the pure-Python backend (``@py``).

    pyvisa shares one manager per backend in a process, so other code closing "its own"
    manager closes ours too; a closed one is replaced.
    """
    global _resource_manager
    import pyvisa

    with _resource_manager_lock:
        if _resource_manager is not None:
            try:
                _resource_manager.session  # raises InvalidSession once closed
            except pyvisa.errors.InvalidSession:
                _resource_manager = None
        if _resource_manager is None:
            _resource_manager = pyvisa.ResourceManager("@py")
        return _resource_manager


class Session(Protocol):
    """What a driver needs of a connection. Methods raise only :class:`InstrumentError` kinds."""

    #: The timeout of each exchange, seconds (settable).
    timeout_s: float

    def write(self, text: str) -> None: ...

    def query(self, text: str) -> str: ...

    def read_block(self, text: str) -> bytes: ...

    def query_text_and_block(self, text: str) -> tuple[str, bytes] | None: ...

    def close(self) -> None: ...


#: How a driver opens a session: ``connect(resource, name=..., timeout_s=...)``.
Connect = Callable[..., Session]


class NotABlock(InstrumentResponseError):
    """A block was asked for and a text line came (an instrument error, usually); ``answer`` holds it."""

    def __init__(self, detail: str, *, answer: bytes = b"", instrument: str = "", command: str = "") -> None:
        self.answer = answer
        super().__init__(detail, instrument=instrument, command=command)


class VisaSession:
    """A pyvisa message-based resource, newline-terminated, with the raw-socket fast path."""

    def __init__(self, resource: Any, *, name: str, resource_name: str) -> None:
        self.visa_resource = resource
        self.name = name
        self.resource_name = resource_name
        self._fast = _socket_of(resource)
        if self._fast is not None:
            try:
                self._fast[1].setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
            except OSError as exc:
                logger.debug("%s: TCP_NODELAY not set: %s", name, exc)

    @classmethod
    def open(cls, resource: str, *, name: str, timeout_s: float) -> "VisaSession":
        """Open ``resource`` (VISA resource string) answering within ``timeout_s`` (also to open)."""
        import pyvisa

        ms = max(1, int(timeout_s * 1000))
        try:
            visa = resource_manager().open_resource(resource, read_termination="\n", write_termination="\n",
                                                    timeout=ms, open_timeout=ms)
        except pyvisa.errors.VisaIOError as exc:
            raise InstrumentConnectionError(
                f"cannot open VISA resource {resource!r} ({exc.description}); check the resource string in the "
                "station file, that the instrument is on and reachable (for the simulated bench: that "
                "`benchctl sim` is running)", instrument=name) from exc
        except Exception as exc:  # pyvisa-py raises bare exceptions too (a port that is not a number ...)
            raise InstrumentConnectionError(
                f"cannot open VISA resource {resource!r}: {exc}; check the resource string and that the "
                "instrument is reachable", instrument=name) from exc
        return cls(visa, name=name, resource_name=resource)

    # -- the one translation ---------------------------------------------------------

    @property
    def timeout_s(self) -> float:
        ms = self.visa_resource.timeout
        return float("inf") if ms is None else ms / 1000.0

    @timeout_s.setter
    def timeout_s(self, value: float) -> None:
        self.visa_resource.timeout = max(1, int(value * 1000))

    @property
    def fast_path(self) -> bool:
        """True on a pyvisa-py raw socket, where blocks are received straight from the socket."""
        return self._fast is not None

    def disable_fast_path(self) -> None:
        """Use the generic pyvisa path for blocks from now on (any backend's behaviour)."""
        self._fast = None

    @contextmanager
    def translated(self, command: str) -> Iterator[None]:
        """Turn any pyvisa or socket failure inside the block into the project's error for ``command``."""
        try:
            yield
        except BenchctlError:
            raise
        except Exception as exc:
            raise self.translate(exc, command) from exc

    def translate(self, exc: BaseException, command: str) -> InstrumentError:
        import pyvisa

        if isinstance(exc, pyvisa.errors.VisaIOError):
            if exc.error_code == pyvisa.constants.StatusCode.error_timeout:
                return self.timeout_error(command)
            return InstrumentConnectionError(f"VISA I/O error: {exc.description}", instrument=self.name,
                                             command=command)
        if isinstance(exc, TimeoutError) and not isinstance(exc, ConnectionError):
            return self.timeout_error(command, f" ({exc})" if str(exc) else "")
        if isinstance(exc, ConnectionRefusedError):
            return InstrumentConnectionError(
                f"connection refused at {self.resource_name}: nothing listens there; check the resource string, "
                "that the instrument is on (for the simulated bench: that `benchctl sim` is running)",
                instrument=self.name, command=command)
        if isinstance(exc, UnicodeDecodeError):
            return InstrumentResponseError(f"the answer is not text: {exc}", instrument=self.name, command=command)
        return InstrumentConnectionError(
            f"connection failed: {exc}; check the cable/network and that the instrument is on",
            instrument=self.name, command=command)

    def timeout_error(self, command: str, more: str = "") -> InstrumentTimeout:
        return InstrumentTimeout(
            f"no answer within {self.timeout_s:g} s{more}; check the instrument is on, reachable and not busy, "
            "or raise timeout_s in the station file", instrument=self.name, command=command)

    # -- exchanges ---------------------------------------------------------------------

    def write(self, text: str) -> None:
        with self.translated(text):
            self.visa_resource.write(text)

    def query(self, text: str) -> str:
        with self.translated(text):
            return str(self.visa_resource.query(text)).strip()

    def read_block(self, text: str) -> bytes:
        """Send query ``text`` and return the payload of its definite-length block answer.

        The header is read first, then exactly its byte count and the terminator, with the
        read termination cleared: payload bytes may hold any value, newline included. An
        answer that is not a block raises :class:`NotABlock` holding the line.
        """
        visa = self.visa_resource
        previous = visa.read_termination
        with self.translated(text):
            try:
                visa.write(text)
                visa.read_termination = None
                head = bytes(visa.read_bytes(2))
                if head[:1] != b"#":
                    visa.read_termination = previous
                    rest = head if head.endswith(b"\n") else head + bytes(visa.read_raw())
                    raise NotABlock(f"expected a definite-length block, got {rest[:40]!r}; check the query and "
                                    "the data format", answer=rest, instrument=self.name, command=text)
                head += bytes(visa.read_bytes(header_length(head) - 2))
                count = block_length(head) - len(head)
                if self._fast is not None:
                    backend, sock = self._fast
                    data = _recv_exactly(backend, sock, count + 1, self.timeout_s, backend._pending_buffer)
                    payload, end = bytes(data[:count]), bytes(data[count:])
                else:
                    payload = bytes(visa.read_bytes(count, chunk_size=count)) if count else b""
                    end = bytes(visa.read_bytes(1))
            finally:
                try:
                    visa.read_termination = previous
                except Exception:  # a dead session: the original error is what matters
                    pass
        _check_terminator(end, count, self.name, text)
        logger.debug("%s -> block of %d bytes", self.name, len(payload))
        return payload

    def query_text_and_block(self, text: str) -> tuple[str, bytes] | None:
        """``text`` (``<text query>;<block query>``) answered as ``<text>;#<block>``: (text, payload).

        One round trip, on the fast path only; None elsewhere (ask the two queries apart).
        An answer without a block raises :class:`NotABlock` holding it.
        """
        if self._fast is None:
            return None
        backend, sock = self._fast

        def header_done(buf: bytearray) -> bool:
            k = buf.find(b";#")
            if k < 0:
                return b"\n" in buf  # an answer without a block: an error, reported below
            return len(buf) >= k + 3 and len(buf) >= k + 3 + int(buf[k + 2:k + 3] or b"0")

        with self.translated(text):
            self.visa_resource.write(text)
            buf = _recv_until(backend, sock, header_done, self.timeout_s)
            k = buf.find(b";#")
            if k < 0:
                raise NotABlock(f"expected '<text>;#<block>', got {bytes(buf[:60])!r}", answer=bytes(buf),
                                instrument=self.name, command=text)
            head = bytes(buf[k + 1:k + 3])
            head = bytes(buf[k + 1:k + 1 + header_length(head)])
            count = block_length(head) - len(head)
            data = _recv_exactly(backend, sock, count + 1, self.timeout_s, buf[k + 1 + len(head):])
        _check_terminator(bytes(data[count:]), count, self.name, text)
        return bytes(buf[:k]).decode("latin-1"), bytes(data[:count])

    def close(self) -> None:
        """Close; never raises (closing a dead socket must not mask the real error)."""
        try:
            self.visa_resource.close()
        except Exception as exc:
            logger.debug("%s: error while closing: %s", self.name, exc)


def _check_terminator(end: bytes, count: int, name: str, text: str) -> None:
    if end != b"\n":
        raise InstrumentResponseError(f"block of {count} bytes is followed by {end!r}, not the newline terminator; "
                                      "the byte count and the data disagree", instrument=name, command=text)


# -- the fast path: pyvisa-py raw sockets ------------------------------------------------------


def _socket_of(visa: Any) -> tuple[Any, socket.socket] | None:
    """(backend session, socket) of a pyvisa-py raw-socket session, or None for anything else."""
    try:
        backend = visa.visalib.sessions[visa.session]
    except Exception:
        return None
    sock = getattr(backend, "interface", None)
    if (isinstance(sock, socket.socket) and sock.family in (socket.AF_INET, socket.AF_INET6)
            and isinstance(getattr(backend, "_pending_buffer", None), bytearray)):
        return backend, sock
    return None


def _recv_exactly(backend: Any, sock: socket.socket, count: int, timeout_s: float, prefix: bytearray) -> bytearray:
    """``count`` bytes: first what pyvisa-py has already buffered (``prefix``), then straight from the socket."""
    out = bytearray(count)
    have = min(len(prefix), count)
    out[:have] = prefix[:have]
    backend._pending_buffer = bytearray(prefix[have:])
    view = memoryview(out)
    deadline = time.monotonic() + timeout_s
    while have < count:
        left = deadline - time.monotonic()
        if left <= 0:
            raise TimeoutError(f"{count - have} of {count} block bytes did not arrive")
        ready, _, _ = select.select([sock], [], [], min(left, 1.0))
        if not ready:
            continue
        n = sock.recv_into(view[have:], count - have)
        if n == 0:
            raise ConnectionError("the instrument closed the connection in the middle of a block")
        have += n
    return out


def _recv_until(backend: Any, sock: socket.socket, done: Callable[[bytearray], bool], timeout_s: float) -> bytearray:
    """Bytes from pyvisa-py's buffer and then the socket until ``done(buffer)`` is true."""
    buf = bytearray(backend._pending_buffer)
    backend._pending_buffer = bytearray()
    deadline = time.monotonic() + timeout_s
    while not done(buf):
        left = deadline - time.monotonic()
        if left <= 0:
            raise TimeoutError(f"the answer was incomplete ({bytes(buf[:60])!r}...)")
        ready, _, _ = select.select([sock], [], [], min(left, 1.0))
        if ready:
            chunk = sock.recv(65536)
            if not chunk:
                raise ConnectionError("the instrument closed the connection in the middle of an answer")
            buf += chunk
    return buf
