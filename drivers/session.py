"""The session layer: one message-based connection to one instrument, and nothing more.

A session opens, writes a program message, queries (one answer line), reads one IEEE 488.2
definite-length block answer, and closes. Every failure of pyvisa or of the socket
underneath becomes the project's own error here, once, in :meth:`VisaSession.translated`
(:class:`InstrumentTimeout` states the timeout that applied). Retries, error-queue checks,
read-back and reconnects are policy and live in :mod:`drivers.scpi_driver`; a session
never retries.

:class:`Session` is the interface the driver needs; :class:`VisaSession` implements it over
pyvisa, on the VISA library the station names (``visa_library``: ``"@py"``, pyvisa-py, by
default, so no vendor VISA is needed; ``"@ivi"`` or a path for a vendor's), one resource
manager per library (:func:`resource_manager`); a test double with scripted answers is in
:mod:`drivers.testing`. :class:`Transport` holds the interface settings of the station's
``options`` (terminations, serial line settings, chunk size, query delay). Interfaces that
pyvisa-py reaches only through an optional package (serial, USB-TMC, GPIB) fail with one
line naming benchctl's extra that installs it (:data:`INTERFACE_EXTRAS`); a VXI-11 or
HiSLIP resource that does not open says what to check (:func:`open_problem`).

After a timeout the policy calls :meth:`VisaSession.clear`: a device clear (VISA
``viClear``; on GPIB the selected device clear, which empties the instrument's input
buffer and output queue, IEEE 488.2-1992 §5.8, from memory) and, on a raw socket, which has
no device clear of its own, discarding whatever already arrived; :meth:`VisaSession.read`
lets the policy read and discard stale answer lines until its marker answers.

Tuning of pyvisa-py raw sockets (``TCPIP::host::port::SOCKET``), the documented fast path,
the only place any driver reaches into pyvisa-py internals (``visalib.sessions``, the
backend's ``interface`` socket and ``_pending_buffer``). Only SOCKET resources take it;
every other resource class (VXI-11 and HiSLIP ``TCPIP::host::inst0|hislip0::INSTR``, GPIB,
USB, ASRL) and every other VISA library take plain pyvisa calls:

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
from dataclasses import dataclass
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
_resource_managers: dict[str, Any] = {}

#: The VISA library of a station that names none: pyvisa-py, pure Python.
DEFAULT_VISA_LIBRARY = "@py"

#: The interfaces pyvisa-py reaches only through an optional package: VISA interface type ->
#: (benchctl extra, the package it installs).
INTERFACE_EXTRAS: dict[str, tuple[str, str]] = {
    "ASRL": ("serial", "pyserial"),
    "USB": ("usb", "pyusb"),
    "GPIB": ("gpib", "gpib-ctypes"),
}


class VisaLibraryError(InstrumentConnectionError):
    """The station's ``visa_library`` cannot be loaded (not installed, a wrong path)."""


def resource_manager(library: str = DEFAULT_VISA_LIBRARY) -> Any:
    """The process-wide pyvisa ResourceManager of VISA library ``library`` (``"@py"``,
    ``"@ivi"``, a path to a vendor library), one per library string.

    pyvisa shares one manager per backend in a process, so other code closing "its own"
    manager closes ours too; a closed one is replaced. A library that cannot be loaded
    raises :class:`VisaLibraryError` in one line saying what to install or set.
    """
    import pyvisa

    with _resource_manager_lock:
        manager = _resource_managers.get(library)
        if manager is not None:
            try:
                manager.session  # raises InvalidSession once closed
            except pyvisa.errors.InvalidSession:
                manager = None
        if manager is None:
            try:
                manager = pyvisa.ResourceManager(library)
            except Exception as exc:  # OSError/LibraryError (a binary library), ValueError (no such backend)
                raise VisaLibraryError(library_problem(library, exc)) from exc
            _resource_managers[library] = manager
        return manager


def library_problem(library: str, exc: BaseException) -> str:
    """One line: VISA library ``library`` did not load (``exc``), and what to install or set."""
    reason = " ".join(str(exc).split()) or type(exc).__name__
    if library == "@py":
        what = "install pyvisa-py (pip install pyvisa-py)"
    elif library == "@ivi":
        what = "install a vendor VISA library (its installer puts it where pyvisa looks)"
    elif library.startswith("@"):
        what = f"install the pyvisa backend package pyvisa-{library[1:]}"
    else:
        what = "give the path of an installed vendor VISA library (such as libvisa.so or visa64.dll)"
    return (f"visa_library {library!r} cannot be loaded ({reason[:160]}); {what}, or set visa_library in "
            "[station] or [instruments.<role>] to one that is installed (\"@py\" is pyvisa-py)")


@dataclass(frozen=True)
class Transport:
    """How bytes travel to one instrument: the station's ``visa_library`` and interface options.

    ``None`` leaves a setting at the VISA library's default. The serial settings apply to
    ASRL resources only (the station refuses them on others); ``parity``, ``stop_bits`` and
    ``flow_control`` are the station's words and numbers, mapped to pyvisa's constants when
    applied. ``query_delay_s`` is waited between the write and the read of every query.
    An empty ``read_termination`` reads to the END/EOI of the message (GPIB, USB-TMC).
    """

    visa_library: str = DEFAULT_VISA_LIBRARY
    read_termination: str = "\n"
    write_termination: str = "\n"
    baud_rate: int | None = None
    data_bits: int | None = None
    parity: str | None = None
    stop_bits: float | None = None
    flow_control: str | None = None
    chunk_size: int | None = None
    query_delay_s: float = 0.0


def serial_constants() -> dict[str, dict[Any, Any]]:
    """The station's words for the serial line -> pyvisa's constants (VISA attributes)."""
    from pyvisa import constants

    return {
        "parity": {"none": constants.Parity.none, "odd": constants.Parity.odd, "even": constants.Parity.even,
                   "mark": constants.Parity.mark, "space": constants.Parity.space},
        "stop_bits": {1: constants.StopBits.one, 1.5: constants.StopBits.one_and_a_half,
                      2: constants.StopBits.two},
        "flow_control": {"none": constants.ControlFlow.none, "xon_xoff": constants.ControlFlow.xon_xoff,
                         "rts_cts": constants.ControlFlow.rts_cts, "dtr_dsr": constants.ControlFlow.dtr_dsr},
    }


def resource_parts(resource: str) -> tuple[str, str, str]:
    """(interface type, resource class, LAN device name) of a resource string, upper/upper/lower
    case ("" each when it does not parse): ``("TCPIP", "INSTR", "hislip0")``."""
    from pyvisa import rname

    try:
        parsed = rname.parse_resource_name(resource)
    except Exception:
        return "", "", ""
    return (str(getattr(parsed, "interface_type", "")).upper(), str(getattr(parsed, "resource_class", "")).upper(),
            str(getattr(parsed, "lan_device_name", "")).lower())


def open_problem(resource: str, exc: BaseException, *, timeout_s: float) -> str:
    """One line saying why ``resource`` did not open and what to check (no traceback)."""
    interface, klass, device = resource_parts(resource)
    text = " ".join(str(exc).split())
    if isinstance(exc, ValueError) and "install" in text.lower() and interface in INTERFACE_EXTRAS:
        extra, package = INTERFACE_EXTRAS[interface]
        more = " with the linux-gpib driver on Linux" if extra == "gpib" else ""
        return (f"{resource} needs the {extra} extra: pip install \"benchctl[{extra}]\" ({package}{more}, for "
                "pyvisa-py; or set visa_library to a vendor VISA)")
    description = getattr(exc, "description", "") or text or type(exc).__name__
    if isinstance(exc, ConnectionRefusedError):
        description = "connection refused: nothing listens there"
    if interface == "TCPIP" and klass == "INSTR":
        if device.startswith("hislip"):
            protocol, check = "HiSLIP", "that HiSLIP is enabled in the instrument's LAN settings (TCP port 4880)"
        else:
            protocol, check = "VXI-11", ("that the instrument's VXI-11 server is on and its port mapper (TCP 111) "
                                         "is reachable through any firewall")
        return (f"cannot open {protocol} resource {resource!r} within {timeout_s:g} s ({description[:160]}); check "
                f"the host name or address, {check}, or use the instrument's raw socket (TCPIP::host::port::SOCKET)")
    return (f"cannot open VISA resource {resource!r} ({description[:160]}); check the resource string in the "
            "station file, that the instrument is on and reachable (for the simulated bench: that "
            "`benchctl sim` is running)")


def _apply_settings(visa: Any, resource: str, transport: Transport) -> None:
    """The chunk size on any resource; the serial line settings on ASRL resources only."""
    if transport.chunk_size is not None:
        visa.chunk_size = int(transport.chunk_size)
    if resource_parts(resource)[0] != "ASRL":
        return
    if transport.baud_rate is not None:
        visa.baud_rate = int(transport.baud_rate)
    if transport.data_bits is not None:
        visa.data_bits = int(transport.data_bits)
    words = serial_constants()
    for key in ("parity", "stop_bits", "flow_control"):
        value = getattr(transport, key)
        if value is not None:
            setattr(visa, key, words[key][value])


class Session(Protocol):
    """What a driver needs of a connection. Methods raise only :class:`InstrumentError` kinds."""

    #: The timeout of each exchange, seconds (settable).
    timeout_s: float

    def write(self, text: str) -> None: ...

    def query(self, text: str) -> str: ...

    def read_block(self, text: str) -> bytes: ...

    def query_text_and_block(self, text: str) -> tuple[str, bytes] | None: ...

    def close(self) -> None: ...

    # Optional (the policy looks them up, a session without them is used without): ``clear()``,
    # a device clear after a timeout, and ``read()``, one more answer line without sending anything.


#: How a driver opens a session: ``connect(resource, name=..., timeout_s=...)``.
Connect = Callable[..., Session]


class NotABlock(InstrumentResponseError):
    """A block was asked for and a text line came (an instrument error, usually); ``answer`` holds it."""

    def __init__(self, detail: str, *, answer: bytes = b"", instrument: str = "", command: str = "") -> None:
        self.answer = answer
        super().__init__(detail, instrument=instrument, command=command)


class VisaSession:
    """A pyvisa message-based resource with the station's :class:`Transport`, and the raw-socket fast path."""

    def __init__(self, resource: Any, *, name: str, resource_name: str, transport: Transport | None = None) -> None:
        self.visa_resource = resource
        self.name = name
        self.resource_name = resource_name
        self.transport = transport or Transport()
        self._term = self.transport.read_termination.encode("latin-1")
        self._fast = _socket_of(resource) if resource_parts(resource_name)[1] == "SOCKET" else None
        if self._fast is not None:
            try:
                self._fast[1].setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
            except OSError as exc:
                logger.debug("%s: TCP_NODELAY not set: %s", name, exc)

    @classmethod
    def open(cls, resource: str, *, name: str, timeout_s: float, transport: Transport | None = None) -> "VisaSession":
        """Open ``resource`` (VISA resource string) answering within ``timeout_s`` (also to open),
        on ``transport``'s VISA library with its interface settings."""
        transport = transport or Transport()
        try:
            manager = resource_manager(transport.visa_library)
        except VisaLibraryError as exc:
            raise exc.located(instrument=name) from exc.__cause__
        ms = max(1, int(timeout_s * 1000))
        try:
            visa = manager.open_resource(resource, read_termination=transport.read_termination or None,
                                         write_termination=transport.write_termination, timeout=ms, open_timeout=ms)
        except Exception as exc:  # pyvisa's VisaIOError and pyvisa-py's bare exceptions (a missing package ...)
            raise InstrumentConnectionError(open_problem(resource, exc, timeout_s=timeout_s), instrument=name) from exc
        try:
            _apply_settings(visa, resource, transport)
        except Exception as exc:
            try:
                visa.close()
            except Exception:  # the refused setting is what matters
                pass
            raise InstrumentConnectionError(
                f"{resource} opened but refused its interface settings ({' '.join(str(exc).split())[:160]}); check "
                "the options baud_rate, data_bits, parity, stop_bits, flow_control and chunk_size in the station "
                "file", instrument=name) from exc
        return cls(visa, name=name, resource_name=resource, transport=transport)

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
        delay = self.transport.query_delay_s
        with self.translated(text):
            if not delay:
                return str(self.visa_resource.query(text)).strip()
            self.visa_resource.write(text)
            time.sleep(delay)
            return str(self.visa_resource.read()).strip()

    def read(self) -> str:
        """One more answer line, sending nothing (the policy reads stale answers away with it)."""
        with self.translated("(read)"):
            return str(self.visa_resource.read()).strip()

    def clear(self) -> None:
        """Device clear, then on a raw socket drop whatever input already arrived; never raises.

        A raw socket has no device clear in its protocol: on pyvisa-py's the buffered input and
        what has already arrived are discarded here (pyvisa-py's own ``clear`` would spin forever
        on a socket the instrument closed). An answer that comes later still is the policy's to
        skip (its marker).
        """
        if self._fast is None:
            try:
                self.visa_resource.clear()
            except Exception as exc:
                logger.debug("%s: device clear not done: %s", self.name, exc)
            return
        backend, sock = self._fast
        backend._pending_buffer = bytearray()
        deadline = time.monotonic() + 0.5
        try:
            while time.monotonic() < deadline and select.select([sock], [], [], 0)[0]:
                if not sock.recv(65536):
                    break  # closed by the instrument: nothing more will come
        except OSError as exc:
            logger.debug("%s: draining after a timeout failed: %s", self.name, exc)

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
                if self.transport.query_delay_s:
                    time.sleep(self.transport.query_delay_s)
                visa.read_termination = None
                head = bytes(visa.read_bytes(2))
                if head[:1] != b"#":
                    visa.read_termination = previous
                    ended = bool(self._term) and head.endswith(self._term[-1:])
                    rest = head if ended else head + bytes(visa.read_raw())
                    raise NotABlock(f"expected a definite-length block, got {rest[:40]!r}; check the query and "
                                    "the data format", answer=rest, instrument=self.name, command=text)
                head += bytes(visa.read_bytes(header_length(head) - 2))
                count = block_length(head) - len(head)
                ends = len(self._term)
                if self._fast is not None:
                    backend, sock = self._fast
                    data = _recv_exactly(backend, sock, count + ends, self.timeout_s, backend._pending_buffer)
                    payload, end = bytes(data[:count]), bytes(data[count:])
                else:
                    payload = bytes(visa.read_bytes(count, chunk_size=count)) if count else b""
                    end = bytes(visa.read_bytes(ends)) if ends else b""
            finally:
                try:
                    visa.read_termination = previous
                except Exception:  # a dead session: the original error is what matters
                    pass
        _check_terminator(end, count, self.name, text, self._term)
        logger.debug("%s -> block of %d bytes", self.name, len(payload))
        return payload

    def query_text_and_block(self, text: str) -> tuple[str, bytes] | None:
        """``text`` (``<text query>;<block query>``) answered as ``<text>;#<block>``: (text, payload).

        One round trip, on the fast path only; None elsewhere (ask the two queries apart).
        An answer without a block raises :class:`NotABlock` holding it.
        """
        if self._fast is None or not self._term:
            return None
        backend, sock = self._fast
        term, ends = self._term, len(self._term)

        def header_done(buf: bytearray) -> bool:
            k = buf.find(b";#")
            if k < 0:
                return term in buf  # an answer without a block: an error, reported below
            return len(buf) >= k + 3 and len(buf) >= k + 3 + int(buf[k + 2:k + 3] or b"0")

        with self.translated(text):
            self.visa_resource.write(text)
            if self.transport.query_delay_s:
                time.sleep(self.transport.query_delay_s)
            buf = _recv_until(backend, sock, header_done, self.timeout_s)
            k = buf.find(b";#")
            if k < 0:
                raise NotABlock(f"expected '<text>;#<block>', got {bytes(buf[:60])!r}", answer=bytes(buf),
                                instrument=self.name, command=text)
            head = bytes(buf[k + 1:k + 3])
            head = bytes(buf[k + 1:k + 1 + header_length(head)])
            count = block_length(head) - len(head)
            data = _recv_exactly(backend, sock, count + ends, self.timeout_s, buf[k + 1 + len(head):])
        _check_terminator(bytes(data[count:]), count, self.name, text, term)
        return bytes(buf[:k]).decode("latin-1"), bytes(data[:count])

    def close(self) -> None:
        """Close; never raises (closing a dead socket must not mask the real error)."""
        try:
            self.visa_resource.close()
        except Exception as exc:
            logger.debug("%s: error while closing: %s", self.name, exc)


def _check_terminator(end: bytes, count: int, name: str, text: str, term: bytes = b"\n") -> None:
    if end != term:
        raise InstrumentResponseError(f"block of {count} bytes is followed by {end!r}, not the read termination "
                                      f"{term!r}; the byte count and the data disagree", instrument=name, command=text)


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
