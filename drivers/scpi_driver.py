"""The base of every driver: one SCPI instrument behind a pyvisa message-based session.

A driver turns method calls into SCPI strings taken from its command table
(``COMMANDS``), sends them through pyvisa (pyvisa-py backend, so no vendor VISA is
needed), and turns every failure of pyvisa or of the socket underneath into the
project's own errors, once, here. After every setting it reads the instrument's error
queue (``SYSTem:ERRor?``, SCPI-1999 Vol. 2 §21.8) and raises :class:`ScpiError`
naming the instrument, the command and the SCPI error.

A station file may override any entry of the command table for an instrument whose
dialect differs; templates use ``str.format`` fields (``{value}``, ``{state}``).
"""

from __future__ import annotations

import logging
import math
import threading
from dataclasses import dataclass
from typing import Any, ClassVar, Mapping

from benchctl.errors import (
    InstrumentConnectionError,
    InstrumentError,
    InstrumentResponseError,
    InstrumentTimeout,
    ScpiError,
    StationFileError,
)

logger = logging.getLogger(__name__)

_resource_manager_lock = threading.Lock()
_resource_manager: Any = None


def resource_manager() -> Any:
    """The process-wide pyvisa ResourceManager on the pure-Python backend (``@py``)."""
    global _resource_manager
    with _resource_manager_lock:
        if _resource_manager is None:
            import pyvisa

            _resource_manager = pyvisa.ResourceManager("@py")
        return _resource_manager


@dataclass(frozen=True)
class Identity:
    """The four fields of an IEEE 488.2 ``*IDN?`` answer (IEEE 488.2-1992 §10.14)."""

    maker: str
    model: str
    serial: str
    firmware: str

    @classmethod
    def parse(cls, text: str) -> "Identity":
        fields = [f.strip() for f in text.strip().split(",")]
        if len(fields) != 4 or not fields[0] or not fields[1]:
            raise ValueError(f"*IDN? answer {text!r} does not have the four fields maker,model,serial,firmware")
        return cls(*fields)

    def __str__(self) -> str:
        return f"{self.maker} {self.model} s/n {self.serial} fw {self.firmware}"


def _disable_nagle(session: Any) -> None:
    """Send each message at once on raw TCP sockets (TCP_NODELAY).

    Without it a setting followed by ``SYST:ERR?`` waits for the instrument's delayed
    acknowledgement of the first packet — about 40 ms on Linux (Nagle's algorithm,
    RFC 896, meeting delayed ACKs, RFC 1122 §4.2.3.2). pyvisa-py does not expose the
    VISA attribute for it on SOCKET resources, so the option is set on its socket.
    """
    import socket

    try:
        backend_session = session.visalib.sessions[session.session]
        sock = getattr(backend_session, "interface", None)
        if isinstance(sock, socket.socket) and sock.family in (socket.AF_INET, socket.AF_INET6):
            sock.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
    except Exception as exc:  # other backends and interfaces (GPIB, USB, serial): nothing to do
        logger.debug("TCP_NODELAY not set: %s", exc)


def _on_off(state: bool) -> str:
    return "ON" if state else "OFF"


class ScpiDriver:
    """A SCPI instrument reached through pyvisa.

    ``resource`` is a VISA resource string (``TCPIP::host::port::SOCKET`` for raw
    sockets, ``TCPIP::host::INSTR`` for VXI-11, ``GPIB0::5::INSTR`` ...). ``name`` is
    how errors name the instrument (the station role, usually).
    """

    kind: ClassVar[str] = "scpi"
    COMMANDS: ClassVar[dict[str, str]] = {
        "identify": "*IDN?",
        "reset": "*RST",
        "clear_status": "*CLS",
        "operation_complete": "*OPC?",
        "next_error": "SYST:ERR?",
    }

    def __init__(
        self,
        resource: str,
        *,
        name: str = "",
        timeout_s: float = 2.0,
        commands: Mapping[str, str] | None = None,
        options: Mapping[str, Any] | None = None,
    ) -> None:
        self.resource = resource
        self.name = name or resource
        self.timeout_s = float(timeout_s)
        self.options = dict(options or {})
        self.commands = self.command_table(commands)
        self._session: Any = None
        self._lock = threading.RLock()
        self.identity: Identity | None = None
        self.last_command = ""

    # -- command table -------------------------------------------------------------

    @classmethod
    def command_table(cls, overrides: Mapping[str, str] | None = None) -> dict[str, str]:
        """The merged command table; unknown override names are a station-file error."""
        table: dict[str, str] = {}
        for klass in reversed(cls.__mro__):
            table.update(getattr(klass, "COMMANDS", {}))
        if overrides:
            unknown = sorted(set(overrides) - set(table))
            if unknown:
                raise StationFileError(
                    f"driver {cls.kind!r} has no command named {', '.join(unknown)}; "
                    f"the names that can be overridden are: {', '.join(sorted(table))}"
                )
            for key, template in overrides.items():
                if not isinstance(template, str) or not template.strip():
                    raise StationFileError(f"command override {key!r} must be a non-empty string")
            table.update(overrides)
        return table

    def command(self, key: str, **fields: Any) -> str:
        """The SCPI text for command ``key`` with its fields filled in."""
        template = self.commands[key]
        try:
            return template.format(**fields)
        except (KeyError, IndexError, ValueError) as exc:
            raise InstrumentError(
                f"command template {template!r} for {key!r} cannot be filled with {sorted(fields)}: {exc}; "
                "fix the override in the station file",
                instrument=self.name,
            ) from exc

    # -- session -------------------------------------------------------------------

    def open(self) -> "ScpiDriver":
        """Open the VISA session and read the identity. Safe to call twice."""
        with self._lock:
            if self._session is not None:
                return self
            import pyvisa

            try:
                session = resource_manager().open_resource(
                    self.resource,
                    read_termination="\n",
                    write_termination="\n",
                    timeout=int(self.timeout_s * 1000),
                )
            except pyvisa.errors.VisaIOError as exc:
                raise InstrumentConnectionError(
                    f"cannot open VISA resource {self.resource!r} ({exc.description}); "
                    "check the resource string in the station file, that the instrument is on "
                    "and reachable (for the simulated bench: that `benchctl sim` is running)",
                    instrument=self.name,
                ) from exc
            except (OSError, ValueError) as exc:
                raise InstrumentConnectionError(
                    f"cannot open VISA resource {self.resource!r}: {exc}; check the resource "
                    "string and that the instrument is reachable",
                    instrument=self.name,
                ) from exc
            _disable_nagle(session)
            self._session = session
        try:
            self.identity = self.identify()
        except Exception:
            self.close()
            raise
        return self

    def close(self) -> None:
        """Close the session. Safe to call twice; never raises."""
        with self._lock:
            session, self._session = self._session, None
        if session is not None:
            try:
                session.close()
            except Exception as exc:  # closing a dead socket must not mask the real error
                logger.debug("%s: error while closing: %s", self.name, exc)

    @property
    def is_open(self) -> bool:
        return self._session is not None

    def __enter__(self) -> "ScpiDriver":
        return self.open()

    def __exit__(self, *exc_info: object) -> None:
        self.close()

    def _require_session(self) -> Any:
        if self._session is None:
            raise InstrumentConnectionError(
                "the session is not open; call open() first", instrument=self.name
            )
        return self._session

    # -- transport -----------------------------------------------------------------

    def _translate(self, exc: Exception, command: str) -> InstrumentError:
        import pyvisa

        if isinstance(exc, pyvisa.errors.VisaIOError):
            if exc.error_code == pyvisa.constants.StatusCode.error_timeout:
                return InstrumentTimeout(
                    f"no answer within {self.timeout_s:g} s; check the instrument is on, "
                    "reachable and not busy, or raise timeout_s in the station file",
                    instrument=self.name,
                    command=command,
                )
            return InstrumentConnectionError(
                f"VISA I/O error: {exc.description}", instrument=self.name, command=command
            )
        if isinstance(exc, ConnectionRefusedError):
            return InstrumentConnectionError(
                f"connection refused at {self.resource}: nothing listens there; check the resource "
                "string, that the instrument is on (for the simulated bench: that `benchctl sim` is running)",
                instrument=self.name, command=command,
            )
        if isinstance(exc, UnicodeDecodeError):
            return InstrumentResponseError(
                f"the answer is not text: {exc}", instrument=self.name, command=command
            )
        return InstrumentConnectionError(
            f"connection failed: {exc}; check the cable/network and that the instrument is on",
            instrument=self.name,
            command=command,
        )

    def send(self, text: str) -> None:
        """Send one program message (no error check)."""
        with self._lock:
            session = self._require_session()
            self.last_command = text
            logger.debug("%s <- %s", self.name, text)
            try:
                session.write(text)
            except Exception as exc:
                raise self._translate(exc, text) from exc

    def ask(self, text: str) -> str:
        """Send a query and return its answer line (no error check)."""
        with self._lock:
            session = self._require_session()
            self.last_command = text
            logger.debug("%s <- %s", self.name, text)
            try:
                answer = session.query(text)
            except Exception as exc:
                raise self._translate(exc, text) from exc
            logger.debug("%s -> %s", self.name, answer)
            return answer.strip()

    # -- SCPI helpers ---------------------------------------------------------------

    def write(self, key: str, **fields: Any) -> None:
        """Send setting ``key`` and raise if the instrument queued an error for it."""
        text = self.command(key, **fields)
        with self._lock:
            self.send(text)
            self.raise_on_errors(text)

    def query(self, key: str, **fields: Any) -> str:
        return self.ask(self.command(key, **fields))

    def query_float(self, key: str, **fields: Any) -> float:
        text = self.command(key, **fields)
        answer = self.ask(text)
        try:
            value = float(answer.split(",")[0])
        except ValueError:
            self.raise_on_errors(text)
            raise InstrumentResponseError(
                f"expected a number, got {answer!r}", instrument=self.name, command=text
            ) from None
        if not math.isfinite(value):
            raise InstrumentResponseError(
                f"expected a finite number, got {answer!r}", instrument=self.name, command=text
            )
        return value

    def query_bool(self, key: str, **fields: Any) -> bool:
        text = self.command(key, **fields)
        answer = self.ask(text).upper()
        if answer in ("1", "ON"):
            return True
        if answer in ("0", "OFF"):
            return False
        raise InstrumentResponseError(
            f"expected 0/1/ON/OFF, got {answer!r}", instrument=self.name, command=text
        )

    def read_errors(self, limit: int = 32) -> list[tuple[int, str]]:
        """Drain the SCPI error queue: ``[(code, message), ...]`` (empty when none)."""
        errors: list[tuple[int, str]] = []
        for _ in range(limit):
            answer = self.ask(self.commands["next_error"])
            code_text, _, message = answer.partition(",")
            try:
                code = int(code_text)
            except ValueError:
                raise InstrumentResponseError(
                    f"error-queue answer {answer!r} is not '<code>,\"<message>\"'",
                    instrument=self.name,
                    command=self.commands["next_error"],
                ) from None
            if code == 0:
                break
            errors.append((code, message.strip().strip('"')))
        return errors

    def raise_on_errors(self, command: str) -> None:
        errors = self.read_errors()
        if errors:
            code, message = errors[0]
            more = f" (and {len(errors) - 1} more: {errors[1:]})" if len(errors) > 1 else ""
            raise ScpiError(
                f"SCPI error {code} {message!r}{more}; check the value is within the instrument's "
                "range and the command matches its dialect (override it in the station file if not)",
                code=code,
                instrument=self.name,
                command=command,
            )

    def identify(self) -> Identity:
        answer = self.query("identify")
        try:
            return Identity.parse(answer)
        except ValueError as exc:
            raise InstrumentResponseError(str(exc), instrument=self.name, command="*IDN?") from exc

    def reset(self) -> None:
        """Reset to the instrument's default state (*RST), clear status (*CLS) and check."""
        with self._lock:
            self.send(self.command("reset"))
            self.send(self.command("clear_status"))
            self.wait_complete()
            self.raise_on_errors(self.command("reset"))

    def wait_complete(self, timeout_s: float | None = None) -> None:
        """Block until pending operations are done (*OPC?, IEEE 488.2 §10.19)."""
        with self._lock:
            session = self._require_session()
            previous = session.timeout
            if timeout_s is not None:
                session.timeout = int(timeout_s * 1000)
            try:
                answer = self.ask(self.command("operation_complete"))
            finally:
                session.timeout = previous
        if answer != "1":
            raise InstrumentResponseError(
                f"*OPC? answered {answer!r}, expected '1'", instrument=self.name, command="*OPC?"
            )

    def safe_state(self) -> None:
        """Put the instrument in its safe state (outputs off). Overridden by kinds with outputs."""

    on_off = staticmethod(_on_off)
