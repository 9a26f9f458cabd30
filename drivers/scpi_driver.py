"""The base of every driver: the policy of talking to one SCPI instrument.

Three layers, one job each:

* the session (:mod:`drivers.session`): open, close, write, query, one block read, the one
  translation of pyvisa and socket failures into the project's errors, the raw-socket
  fast path;
* the command table and station options (:mod:`drivers.command_table`), validated when a
  station file is loaded (:meth:`ScpiDriver.check_configuration`);
* the policy, here: check after every setting, retry, recover, detect a reset, and the
  bounded paths the interlock uses.

A driver turns method calls into SCPI strings taken from its command table (``COMMANDS``).
After every setting it reads the instrument's error queue (``SYSTem:ERRor?``, SCPI-1999
Vol. 2 §21.8) and raises :class:`ScpiError` naming the instrument, the command and the
SCPI error. A station file may override any entry of the command table for an instrument
whose dialect differs; templates use ``str.format`` fields (``{value}``, ``{state}``).

Robustness (station ``options``: ``retries``, default 2; ``retry_delay_s``, default 0.05):

* Queries that only read (``query``, ``query_float``, ``query_bool``, ``identify``) are
  retried up to ``retries`` times when the connection is lost or the answer times out,
  with a fresh connection before each new attempt; every attempt is logged. The error
  queue (``SYSTem:ERRor?``) is never re-asked blindly: reading it removes an entry.
* A setting is never re-sent blindly. When it or its error check fails, the driver
  reconnects if needed, reads the setting back with its getter (``get_x`` beside
  ``set_x`` in the command table) and sends it again only if the read-back differs; a
  setting without a getter is not re-sent and the error is raised.
* An instrument that reset itself is caught: the error check after each setting asks
  ``*ESR?`` in the same message as ``SYSTem:ERRor?`` (no extra round trip) and the
  power-on bit PON (128, IEEE 488.2-1992 §11.5.1.1.8, from memory) raises
  :class:`InstrumentStateError`; after every reconnect ``*IDN?`` must match the identity
  read at open, PON must be clear and every setting made so far must read back as
  programmed (an output believed on that reads off stops the run the same way).

Bounded exchanges, for the interlock (its watch and the shutdown): ``query_float_now``,
``check_power_on_now`` and ``output_off_now`` are never retried and wait for the driver's
lock only until their ``deadline_s`` (a retry chain of a procedure does not hold them up).
``output_off_now`` also has its answer by then, whatever the instrument does — over a
short-lived connection of its own when the driver's session is busy or gone; the watch's
readings take the instrument's ``timeout_s`` for the answer (the watch decides at its
deadline; a late reading is still checked). A failure drops the session.
``stop_retries`` makes a retry chain in progress give up at its next attempt.

Dialects without code (station ``options``, per instrument): ``error_check`` says what is
asked after a setting (``compound``: ``*ESR?;:SYST:ERR?`` in one message, the default;
``separate``: the two as two messages; ``status_byte``: ``*STB?`` only, reading further only
when its bit 2, error/event queue not empty (SCPI-1999 Vol. 1 §9, from memory), or bit 5,
ESB (IEEE 488.2-1992 §11.2, from memory), is set; ``none``: nothing, with a caution,
:meth:`ScpiDriver.dialect_cautions`). ``completion`` says how :meth:`ScpiDriver.wait_complete`
waits (``opc_query``: ``*OPC?``, the default; ``esr_poll``: ``*OPC`` then ``*ESR?`` polled for
bit 0, OPC; ``fixed_wait``: ``completion_wait_s``). Interface settings (terminations, serial
line, chunk size, query delay) and ``visa_library`` go to the session (:class:`Transport`).

After a timeout the session gets a device clear at once (:meth:`VisaSession.clear`); before
it carries anything else it is resynchronised: ``*IDN?`` is sent and answer lines are read
and discarded until the identity read at open comes, so a late answer to the query that
timed out is never read as the answer to the next one. A reconnect reads its ``*IDN?`` the
same way (on GPIB, USB or serial a new session reaches the same output queue).

A caller's bad argument (a negative scale, an unknown mode) raises :class:`UsageError`
before anything is sent.
"""

from __future__ import annotations

import functools
import logging
import math
import threading
import time
from typing import Any, Callable, ClassVar, Mapping, TypeVar

from benchctl.errors import (
    InstrumentConnectionError,
    InstrumentError,
    InstrumentResponseError,
    InstrumentStateError,
    InstrumentTimeout,
    ScpiError,
    StationFileError,
    UsageError,
)
from benchctl.drivers import command_table as _table
from benchctl.drivers.command_table import OptionSpec, choice_option, text_option
from benchctl.drivers.session import (
    DEFAULT_VISA_LIBRARY,
    Connect,
    NotABlock,
    Session,
    Transport,
    VisaSession,
    resource_manager,
)
from benchctl.drivers.status import (
    ESR_POWER_ON,
    Identity,
    compound,
    on_off,
    operation_complete,
    parse_error_entry,
    parse_event_status,
    parse_status_answer,
    read_back_matches,
    reads_off,
)

__all__ = ["ScpiDriver", "Identity", "ESR_POWER_ON", "OptionSpec", "resource_manager", "DEFAULT_RETRIES",
           "DEFAULT_RETRY_DELAY_S", "DEFAULT_OFF_DEADLINE_S"]

logger = logging.getLogger(__name__)

DEFAULT_RETRIES = 2
#: Deadline of an output-off when none is given (s).
DEFAULT_OFF_DEADLINE_S = 0.5
DEFAULT_RETRY_DELAY_S = 0.05
_RETRYABLE = (InstrumentTimeout, InstrumentConnectionError)

#: Terminations a station may give, and the escaped spellings (a TOML literal string '\r\n') taken for them.
TERMINATIONS = ("\n", "\r\n", "\r", "\n\r")
_TERMINATION_ALIASES = {"\\n": "\n", "\\r\\n": "\r\n", "\\r": "\r", "\\n\\r": "\n\r"}
ERROR_CHECKS = ("compound", "separate", "status_byte", "none")
COMPLETIONS = ("opc_query", "esr_poll", "fixed_wait")
#: Status byte bits (IEEE 488.2-1992 §11.2, with SCPI-1999 Vol. 1 §9 for bit 2; from memory).
STB_ERROR_QUEUE = 4
STB_ESB = 32
#: Standard Event Status Register bits (IEEE 488.2-1992 §11.5.1, from memory): OPC, and the four
#: error bits with the SCPI error class each stands for (SCPI-1999 Vol. 2 §21.8, from memory).
ESR_OPERATION_COMPLETE = 1
ESR_ERRORS = ((32, -100, "command error"), (16, -200, "execution error"), (8, -300, "device-specific error"),
              (4, -400, "query error"))
#: *ESE mask set at open under error_check = status_byte: PON and the four error bits, so ESB shows them.
STATUS_BYTE_EVENT_ENABLE = 128 | 32 | 16 | 8 | 4
#: Answer lines read and discarded at most while resynchronising after a timeout.
RESYNC_MAX_LINES = 16

_POWER_ON_LOST = ("the instrument was reset or power-cycled{during} and every setting made before is lost; the run "
                  "stops so no point is taken on wrong settings. Check its mains and connection, then start the "
                  "run again")

T = TypeVar("T")


class ScpiDriver:
    """A SCPI instrument reached through a session (pyvisa by default).

    ``resource`` is a VISA resource string (``TCPIP::host::port::SOCKET`` for raw
    sockets, ``TCPIP::host::INSTR`` for VXI-11, ``GPIB0::5::INSTR`` ...). ``name`` is
    how errors name the instrument (the station role, usually). ``connect`` opens a
    session (``connect(resource, name=..., timeout_s=...)``); by default
    :meth:`drivers.session.VisaSession.open`, in tests :class:`drivers.testing.ScriptedInstrument`.
    """

    kind: ClassVar[str] = "scpi"
    COMMANDS: ClassVar[dict[str, str]] = {
        "identify": "*IDN?",
        "reset": "*RST",
        "clear_status": "*CLS",
        "operation_complete": "*OPC?",
        "event_status": "*ESR?",
        "next_error": "SYST:ERR?",
        "status_byte": "*STB?",
        "event_enable": "*ESE {value:d}",
        "operation_complete_flag": "*OPC",
    }
    #: Station options every driver takes (subclasses add theirs: merged along the classes).
    OPTIONS: ClassVar[dict[str, OptionSpec]] = {
        "retries": OptionSpec(DEFAULT_RETRIES, 0, 10, whole=True, help="retries of a read-only query"),
        "retry_delay_s": OptionSpec(DEFAULT_RETRY_DELAY_S, 0, 10, help="wait before a retry, s"),
        # the interface (the session layer applies them; serial ones to ASRL resources only)
        "read_termination": text_option("\n", TERMINATIONS, aliases=_TERMINATION_ALIASES,
                                        help="end of each answer line"),
        "write_termination": text_option("\n", TERMINATIONS, aliases=_TERMINATION_ALIASES,
                                         help="end of each program message"),
        "baud_rate": OptionSpec(None, 50, 4_000_000, whole=True, help="serial line speed, bit/s"),
        "data_bits": OptionSpec(None, 5, 8, whole=True, help="serial data bits"),
        "parity": choice_option(None, ("none", "odd", "even", "mark", "space"), help="serial parity"),
        "stop_bits": choice_option(None, (1, 1.5, 2), help="serial stop bits"),
        "flow_control": choice_option(None, ("none", "xon_xoff", "rts_cts", "dtr_dsr"), help="serial flow control"),
        "chunk_size": OptionSpec(None, 64, 64 * 1024 * 1024, whole=True, help="bytes per VISA read"),
        "query_delay_s": OptionSpec(0.0, 0, 10, help="wait between the write and the read of a query, s"),
        # the dialect (the policy here)
        "error_check": choice_option("compound", ERROR_CHECKS, help="what is asked after each setting"),
        "completion": choice_option("opc_query", COMPLETIONS, help="how the end of an operation is awaited"),
        "completion_wait_s": OptionSpec(1.0, 0, 600, help="the wait of completion = fixed_wait, s"),
        "completion_poll_s": OptionSpec(0.01, 0.001, 10, help="polling period of completion = esr_poll, s"),
    }
    #: Options of the serial line: a station gives them for ASRL resources only.
    SERIAL_OPTIONS: ClassVar[tuple[str, ...]] = ("baud_rate", "data_bits", "parity", "stop_bits", "flow_control")
    #: The command-table keys (setting, read-back) of the output switch; None: no output.
    OUTPUT_SWITCH: ClassVar[tuple[str, str] | None] = None
    #: How long :meth:`output_off_now` waits for the driver's own session before it uses a
    #: short-lived connection of its own (s); a normal exchange takes a few ms.
    OFF_LOCK_GRACE_S = 0.05

    def __init__(
        self,
        resource: str,
        *,
        name: str = "",
        timeout_s: float = 2.0,
        commands: Mapping[str, str] | None = None,
        options: Mapping[str, Any] | None = None,
        connect: Connect | None = None,
        visa_library: str = DEFAULT_VISA_LIBRARY,
    ) -> None:
        self.resource = resource
        self.name = name or resource
        self.timeout_s = float(timeout_s)
        self.options = dict(options or {})
        self.commands = self.command_table(commands)
        self._overridden = frozenset(commands or ())
        values = _table.option_values(type(self), self.name, self.options)
        self._option_values = values
        self.visa_library = visa_library
        #: How bytes travel: the VISA library and the interface options (see :class:`Transport`).
        self.transport = Transport(
            visa_library=visa_library,
            **{key: values[key] for key in ("read_termination", "write_termination", "baud_rate", "data_bits",
                                            "parity", "stop_bits", "flow_control", "chunk_size")},
            query_delay_s=float(values["query_delay_s"]))
        self.error_check = str(values["error_check"])
        self.completion = str(values["completion"])
        self.completion_wait_s = float(values["completion_wait_s"])
        self.completion_poll_s = float(values["completion_poll_s"])
        self._connect_session: Connect = connect or functools.partial(VisaSession.open, transport=self.transport)
        #: The session that timed out and got a device clear: resynchronised before its next use.
        self._out_of_step: Session | None = None
        self._cautioned = False
        self._session: Session | None = None
        self._lock = threading.RLock()
        self.identity: Identity | None = None
        self.last_command = ""
        self.retries = int(values["retries"])
        self.retry_delay_s = float(values["retry_delay_s"])
        #: How many times the session was re-established after a failure.
        self.reconnects = 0
        self._wanted_open = False
        self._retries_stopped = False
        #: ``time.monotonic()`` of the last answer the instrument gave this driver (0: none yet).
        self.last_answer_s = 0.0
        # The last successful setting of each command key (fields), for read-back after a reconnect.
        self._settings: dict[str, dict[str, Any]] = {}

    # -- command table and options ----------------------------------------------------

    @classmethod
    def command_table(cls, overrides: Mapping[str, str] | None = None) -> dict[str, str]:
        """The merged command table; an unknown or unusable override is a station-file error."""
        return _table.command_table(cls, overrides)

    @classmethod
    def check_configuration(cls, commands: Mapping[str, Any], options: Mapping[str, Any]) -> list[str]:
        """Every problem of a station entry's ``commands`` and ``options`` for this driver
        (texts starting ``commands:`` or ``options.<key>``); empty when it can be used.
        Called by ``benchctl.station`` when the file is loaded, before anything is opened."""
        return _table.check_configuration(cls, commands, options)

    @classmethod
    def option_defaults(cls) -> dict[str, Any]:
        """Every station option of this driver with its default."""
        return {key: spec.default for key, spec in _table.merged(cls, "OPTIONS").items()}

    def option(self, key: str) -> Any:
        """The value of declared option ``key``: the station's (in its canonical form), or its default."""
        return self._option_values[key]

    def dialect_cautions(self) -> list[str]:
        """What this instrument's dialect leaves unchecked, one sentence each (for the run's
        provenance and the console); empty for the default dialect."""
        cautions = []
        if self.error_check == "none":
            cautions.append(
                f"instrument {self.name}: error_check = \"none\": no error queue or status is read after a "
                "setting, so a refused setting or a reset of the instrument goes unseen by benchctl; check its "
                "front panel, or choose compound, separate or status_byte if it can answer one")
        if self.completion == "fixed_wait":
            cautions.append(
                f"instrument {self.name}: completion = \"fixed_wait\": operations are taken as complete after "
                f"{self.completion_wait_s:g} s without asking the instrument")
        return cautions

    @property
    def compound_messages(self) -> bool:
        """Whether several program message units are sent in one message (``error_check =
        "compound"``, the default); otherwise each goes alone."""
        return self.error_check == "compound"

    def command(self, key: str, **fields: Any) -> str:
        """The SCPI text for command ``key`` with its fields filled in."""
        template = self.commands[key]
        try:
            return template.format(**fields)
        except (KeyError, IndexError, ValueError, TypeError) as exc:
            if key in self._overridden:
                raise StationFileError(
                    f"instruments.{self.name}.commands.{key} = {template!r} cannot be filled with "
                    f"{sorted(fields)}: {exc}; fix the override in the station file") from exc
            raise UsageError(f"command {key!r} ({template!r}) of instrument {self.name} cannot be filled with "
                             f"{fields!r}: {exc}") from exc

    on_off = staticmethod(on_off)

    # -- session -------------------------------------------------------------------

    def open(self) -> "ScpiDriver":
        """Open the session and read the identity. Safe to call twice.

        The power-on bit of ``*ESR?`` is read (and so cleared) here, so a later PON means
        the instrument reset while this driver used it.
        """
        with self._lock:
            if self._session is not None:
                return self
            self._session = self._connect(self.timeout_s)
        try:
            self.identity = self._identify_once()
            if self.error_check != "none":
                self._read_event_status(strict=False)
            if self.error_check == "status_byte":
                self.send(self.command("event_enable", value=STATUS_BYTE_EVENT_ENABLE))
        except Exception:
            self.close()
            raise
        if not self._cautioned:
            self._cautioned = True
            for caution in self.dialect_cautions():
                logger.warning("caution: %s", caution)
        self._wanted_open = True
        self._retries_stopped = False
        self._settings.clear()
        return self

    def _connect(self, timeout_s: float) -> Session:
        """A new session to the resource, answering within ``timeout_s`` (also to open)."""
        return self._connect_session(self.resource, name=self.name, timeout_s=timeout_s)

    @property
    def session(self) -> Session | None:
        """The open session (None while closed or lost)."""
        return self._session

    def close(self) -> None:
        """Close the session. Safe to call twice; never raises."""
        with self._lock:
            self._wanted_open = False
            session, self._session = self._session, None
        if session is not None:
            session.close()

    @property
    def is_open(self) -> bool:
        """True from a successful :meth:`open` until :meth:`close`, also while a lost
        connection is being re-established (so a shutdown still tries to reach it)."""
        return self._wanted_open

    def __enter__(self) -> "ScpiDriver":
        return self.open()

    def __exit__(self, *exc_info: object) -> None:
        self.close()

    def _drop_session(self) -> None:
        with self._lock:
            session, self._session = self._session, None
        if session is not None:
            session.close()

    def _require_session(self) -> Session:
        if self._session is None:
            if self._wanted_open:
                raise InstrumentConnectionError(
                    f"the connection to {self.resource} was lost and could not be re-established; check the "
                    "instrument is on and reachable", instrument=self.name)
            raise InstrumentConnectionError("the session is not open; call open() first", instrument=self.name)
        return self._session

    # -- exchanges (no policy) ------------------------------------------------------------

    def _exchange(self, text: str, call: Callable[[Session], T]) -> T:
        """``call(session)`` for message ``text`` under the lock; an interrupt (a signal) drops the
        session, since part of the message may be on the wire or its answer still to come."""
        with self._lock:
            session = self._require_session()
            if self._out_of_step is session:
                self._resynchronise(session)
            self.last_command = text
            logger.debug("%s <- %s", self.name, text)
            try:
                return call(session)
            except InstrumentError as exc:
                if isinstance(exc, InstrumentTimeout):
                    self._clear_after_timeout(session)
                raise exc if exc.instrument else exc.located(instrument=self.name)
            except BaseException as exc:
                if not isinstance(exc, Exception):
                    self._drop_session()
                raise

    def _clear_after_timeout(self, session: Session) -> None:
        """Device clear of ``session`` after a timeout; it is resynchronised before its next use."""
        clear = getattr(session, "clear", None)
        if callable(clear):
            logger.warning("%s: timeout; device clear sent, resynchronising before the next exchange", self.name)
            clear()
        self._out_of_step = session

    def _resynchronise(self, session: Session) -> None:
        """Read stale answers away: ``*IDN?``, then lines until the identity of open answers.

        A late answer to the query that timed out precedes the marker's answer (the instrument
        answers in order, IEEE 488.2-1992 §6.4, from memory) and is discarded. Fails (and drops the
        session, so a retry reconnects) when the identity does not come.
        """
        command = self.commands["identify"]
        self.last_command = command
        try:
            self._read_identity(session, command, resync=True)
        except InstrumentError as exc:
            self._out_of_step = None
            self._drop_session()
            raise exc.located(detail=f"{exc.detail} (resynchronising after a timeout)", instrument=self.name,
                              command=command) from exc
        self._out_of_step = None

    def _read_identity(self, session: Session, command: str, *, resync: bool) -> Identity:
        """Send ``*IDN?`` on ``session`` and read answer lines until one is an identity (stale
        lines before it are discarded); with ``resync`` it must be the identity read at open."""
        answer = session.query(command)
        read = getattr(session, "read", None)
        for _ in range(RESYNC_MAX_LINES):
            try:
                identity = Identity.parse(answer)
            except ValueError:
                identity = None
            if identity is not None and (not resync or self.identity is None or identity == self.identity):
                self.last_answer_s = time.monotonic()
                return identity
            if not callable(read) or (identity is not None and not resync):
                break
            logger.warning("%s: discarding the stale answer %r", self.name, answer[:60])
            answer = read()
        try:
            return Identity.parse(answer)
        except ValueError as exc:
            raise InstrumentResponseError(str(exc), instrument=self.name, command=command) from exc

    def send(self, text: str) -> None:
        """Send one program message (no error check)."""
        self._exchange(text, lambda s: s.write(text))

    def send_at_shutdown(self, text: str) -> None:
        """Send one program message at a run's shutdown: over the session, or over a fresh one
        when an interrupt dropped it (no identity check, no retry, no error check)."""
        with self._lock:
            if self._session is None and self._wanted_open:
                self._session = self._connect(min(self.timeout_s, DEFAULT_OFF_DEADLINE_S))
        self.send(text)

    def ask(self, text: str) -> str:
        """Send a query and return its answer line (no error check)."""
        answer = self._exchange(text, lambda s: s.query(text))
        logger.debug("%s -> %s", self.name, answer)
        self.last_answer_s = time.monotonic()
        return answer

    def read_block(self, text: str) -> bytes:
        """Send query ``text`` and read its definite-length block answer (payload bytes).

        An answer that is not a block is reported with the instrument's queued error when
        there is one (:class:`ScpiError`), else as an :class:`InstrumentResponseError`.
        """
        with self._lock:
            try:
                payload = self._exchange(text, lambda s: s.read_block(text))
            except NotABlock:
                self.raise_on_errors(text)
                raise
            self.last_answer_s = time.monotonic()
            return payload

    def query_text_and_block(self, text: str) -> tuple[str, bytes] | None:
        """``<text query>;<block query>`` in one round trip where the session can (its fast path):
        (text answer, block payload); None where it cannot (ask the two apart)."""
        with self._lock:
            try:
                both = self._exchange(text, lambda s: s.query_text_and_block(text))
            except NotABlock:
                self.raise_on_errors(text)
                raise
            if both is not None:
                self.last_answer_s = time.monotonic()
            return both

    # -- policy: retries, reconnects, read-back --------------------------------------------

    def _reconnect(self, *, skip_key: str | None = None, deadline_at: float | None = None) -> None:
        """A fresh session; then the same identity, no power-on since, and every setting as programmed.

        With ``deadline_at`` (``time.monotonic()`` seconds) every exchange of it must end by then.
        """
        with self._lock:
            if not self._wanted_open:
                raise InstrumentConnectionError("the session is closed; call open() first", instrument=self.name)
            self._drop_session()
            self.reconnects += 1
            logger.warning("%s: reconnecting to %s (reconnect %d)", self.name, self.resource, self.reconnects)

            def bound() -> None:
                if deadline_at is not None:
                    self._require_session().timeout_s = self._remaining(deadline_at, self.last_command)

            self._session = self._connect(self.timeout_s if deadline_at is None
                                          else self._remaining(deadline_at, "reconnect"))
            bound()
            self._out_of_step = None
            session = self._require_session()
            self.last_command = self.commands["identify"]
            identity = self._read_identity(session, self.commands["identify"], resync=False)
            if self.identity is not None and identity != self.identity:
                raise InstrumentStateError(
                    f"after reconnecting, *IDN? answers '{identity}' but '{self.identity}' answered when the run "
                    f"opened {self.resource}; another instrument is there now. Check the wiring and the "
                    "resource string, then start the run again",
                    instrument=self.name, command=self.commands["identify"])
            bound()
            esr = self._read_event_status() if self.error_check != "none" else None
            if esr is not None and esr & ESR_POWER_ON:
                raise InstrumentStateError("after reconnecting, *ESR? shows the power-on bit: "
                                           + _POWER_ON_LOST.format(during=""),
                                           instrument=self.name, command=self.commands["event_status"])
            for key, fields in list(self._settings.items()):
                if key == skip_key:
                    continue
                getter = self._getter_for(key)
                if getter is None:
                    continue
                bound()
                answer = self.ask(self.command(getter))
                if read_back_matches(fields, answer) is False:
                    raise InstrumentStateError(
                        f"after reconnecting, {self.command(getter)!r} reads {answer!r} but "
                        f"{self.command(key, **fields)!r} was programmed: the instrument lost its settings "
                        "(reset, power cycle or its own protection?); the run stops so no point is taken on "
                        "wrong settings. Check the instrument, then start the run again",
                        instrument=self.name, command=self.command(getter))
            if deadline_at is not None and self._session is not None:
                self._session.timeout_s = self.timeout_s

    def _getter_for(self, key: str) -> str | None:
        """The command-table key that reads back setting ``key`` (``set_x`` -> ``get_x``), if any."""
        if key.startswith("set_"):
            getter = "get_" + key[4:]
            if getter in self.commands:
                return getter
        return None

    def _retrying(self, text: str, exchange: Callable[[], T], *,
                  retry_on: tuple[type[InstrumentError], ...] = _RETRYABLE) -> T:
        """Run an idempotent ``exchange()``; on a lost connection or a timeout (or any of
        ``retry_on``) reconnect and try again."""
        attempts = 1 + self.retries
        with self._lock:
            for attempt in range(1, attempts + 1):
                try:
                    if self._session is None and self._wanted_open:
                        self._reconnect()
                    return exchange()
                except retry_on as exc:
                    if attempt == attempts or not self._wanted_open or self._retries_stopped:
                        self._drop_session()  # a late answer must not be read as the next one
                        if attempt == 1:
                            raise
                        during = f"; the last failure was {exc.command!r} while reconnecting" \
                            if exc.command and exc.command != text else ""
                        raise exc.located(
                            detail=f"{exc.detail} (gave up after {attempts} attempts with a reconnect before each "
                                   f"retry{during})", instrument=self.name, command=text) from exc
                    logger.warning("%s: %r failed (attempt %d of %d): %s; reconnecting and asking again",
                                   self.name, text, attempt, attempts, exc)
                    self._drop_session()
                    if self.retry_delay_s:
                        time.sleep(self.retry_delay_s)
        raise AssertionError("unreachable")  # pragma: no cover

    def stop_retries(self) -> None:
        """No retry, read-back or re-send from now until the next :meth:`open`.

        A retry chain in progress gives up at its next attempt: used when the run is shutting down.
        """
        self._retries_stopped = True

    # -- settings and readings ----------------------------------------------------------

    def write(self, key: str, **fields: Any) -> None:
        """Send setting ``key`` and raise if the instrument queued an error for it.

        The check asks ``*ESR?`` and ``SYSTem:ERRor?`` in one message; a power-on bit
        raises :class:`InstrumentStateError`. On a lost connection, a timeout or a
        malformed check answer the setting is read back and re-sent only if it differs.
        """
        text = self.command(key, **fields)
        with self._lock:
            sent = False
            try:
                self.send(text)
                sent = True
                self._check_setting(text)
            except (*_RETRYABLE, InstrumentResponseError) as exc:
                self._recover_setting(key, fields, text, exc, check_lost=sent and isinstance(exc, _RETRYABLE))
            self._settings[key] = dict(fields)

    def _status_query(self) -> str:
        return compound(self.commands["event_status"], self.commands["next_error"])

    def _checking(self, text: str, query: str) -> str:
        try:
            return self.ask(query)
        except InstrumentError as exc:
            raise exc.located(detail=f"{exc.detail} (while checking {text!r})", command=text) from exc

    def _check_setting(self, text: str) -> None:
        if self.error_check == "none":
            return
        if self.error_check == "separate":
            self._check_separately(text)
            return
        if self.error_check == "status_byte":
            self._check_status_byte(text)
            return
        check = self._status_query()
        answer = self._checking(text, check)
        status = parse_status_answer(answer)
        if status is None:
            raise InstrumentResponseError(
                f"the check {check!r} after the setting answered {answer!r}, not '<ESR>;<code>,\"<message>\"'",
                instrument=self.name, command=text)
        esr, first = status
        if esr & ESR_POWER_ON:
            raise InstrumentStateError(f"*ESR? shows the power-on bit after {text!r}: "
                                       + _POWER_ON_LOST.format(during=""), instrument=self.name, command=text)
        if first[0] != 0:
            self._raise_scpi([first] + self.read_errors(), text)

    def _event_status_checked(self, text: str, answer: str, query: str) -> int:
        esr = parse_event_status(answer)
        if esr is None:
            raise InstrumentResponseError(f"the check {query!r} after the setting answered {answer!r}, not a number",
                                          instrument=self.name, command=text)
        if esr & ESR_POWER_ON:
            raise InstrumentStateError(f"*ESR? shows the power-on bit after {text!r}: "
                                       + _POWER_ON_LOST.format(during=""), instrument=self.name, command=text)
        return esr

    def _check_separately(self, text: str) -> None:
        """error_check = separate: ``*ESR?`` and ``SYST:ERR?`` as two messages."""
        query = self.commands["event_status"]
        self._event_status_checked(text, self._checking(text, query), query)
        query = self.commands["next_error"]
        answer = self._checking(text, query)
        entry = parse_error_entry(answer)
        if entry is None:
            raise InstrumentResponseError(f"the check {query!r} after the setting answered {answer!r}, not "
                                          "'<code>,\"<message>\"'", instrument=self.name, command=text)
        if entry[0] != 0:
            self._raise_scpi([entry] + self.read_errors(), text)

    def _check_status_byte(self, text: str) -> None:
        """error_check = status_byte: ``*STB?``; on ESB the event register tells which event
        (its error bits as SCPI error classes), on bit 2 the error queue is read."""
        query = self.commands["status_byte"]
        answer = self._checking(text, query)
        stb = parse_event_status(answer)
        if stb is None:
            raise InstrumentResponseError(f"the check {query!r} after the setting answered {answer!r}, not a number",
                                          instrument=self.name, command=text)
        if stb & STB_ESB:
            esr_query = self.commands["event_status"]
            esr = self._event_status_checked(text, self._checking(text, esr_query), esr_query)
            for bit, code, what in ESR_ERRORS:
                if esr & bit:
                    if stb & STB_ERROR_QUEUE:
                        errors = self.read_errors()
                        if errors:
                            self._raise_scpi(errors, text)
                    raise ScpiError(f"the instrument reports a {what} (*ESR? = {esr}, SCPI error class {code}) for "
                                    "the setting; check the value is within its range and the command matches its "
                                    "dialect (override it in the station file if not)",
                                    code=code, instrument=self.name, command=text)
        if stb & STB_ERROR_QUEUE:
            errors = self.read_errors()
            if errors:
                self._raise_scpi(errors, text)

    def _recover_setting(self, key: str, fields: Mapping[str, Any], text: str, first: InstrumentError,
                         check_lost: bool = False) -> None:
        """After ``text`` failed with ``first``: reconnect if needed, read back, re-send only if it differs.

        ``check_lost``: the setting was sent and the answer to its error check never came. Reading
        ``*ESR?`` and the error queue removes what they report, so an error that answer carried is
        gone for good; when the read-back then matches, a warning says so instead of staying silent.
        """
        if self._retries_stopped:  # the run is shutting down: no read-back, no re-send
            self._drop_session()  # a late answer must not be read as the next one
            raise first
        getter = self._getter_for(key)
        if getter is None:
            raise first.located(
                detail=f"{first.detail}; the setting has no read-back command, so whether it took effect is unknown "
                       "and it is not sent again blindly. Check the instrument, then start the run again",
                command=text) from first
        attempts = max(1, self.retries)
        exc: InstrumentError = first
        for attempt in range(1, attempts + 1):
            if self._retries_stopped:
                self._drop_session()
                raise exc
            logger.warning("%s: setting %r failed (%s); verifying it by read-back (attempt %d of %d)",
                           self.name, text, exc, attempt, attempts)
            try:
                if isinstance(exc, _RETRYABLE) or self._session is None:
                    if attempt > 1 and self.retry_delay_s:
                        time.sleep(self.retry_delay_s)
                    self._reconnect(skip_key=key)
                answer = self.ask(self.command(getter))
            except (*_RETRYABLE, InstrumentResponseError) as again:
                exc = again
                continue
            match = read_back_matches(fields, answer)
            if match is None:
                raise InstrumentResponseError(
                    f"read-back {self.command(getter)!r} answered {answer!r}, which cannot be compared with "
                    f"{text!r}; the setting is not sent again blindly", instrument=self.name, command=text) from first
            if match:
                errors = self.read_errors()
                if errors:
                    self._raise_scpi(errors, text)
                logger.warning("%s: read-back shows %r took effect; not sent again", self.name, text)
                if check_lost:
                    logger.warning("%s: the answer to the error check after %r was lost; an error it reported "
                                   "(reading the queue removes it) cannot be recovered, so the instrument's own "
                                   "error log is the only record of one", self.name, text)
                return
            logger.warning("%s: read-back %r differs from %r; sending the setting again", self.name, answer, text)
            try:
                self.send(text)
                self._check_setting(text)
                return
            except (*_RETRYABLE, InstrumentResponseError) as again:
                exc = again
        raise exc.located(detail=f"{exc.detail} (setting not confirmed after {attempts} read-back attempt(s) with "
                                 "reconnects)", instrument=self.name, command=text) from exc

    def query(self, key: str, **fields: Any) -> str:
        text = self.command(key, **fields)
        if key == "next_error":  # reading the error queue removes an entry: never retried
            return self.ask(text)
        return self._retrying(text, lambda: self.ask(text))

    def _number(self, answer: str, text: str, *, check_errors: bool = True) -> float:
        try:
            value = float(answer.split(",")[0])
        except ValueError:
            if check_errors:
                self.raise_on_errors(text)
            raise InstrumentResponseError(f"expected a number, got {answer!r}", instrument=self.name,
                                          command=text) from None
        if not math.isfinite(value):
            raise InstrumentResponseError(f"expected a finite number, got {answer!r}", instrument=self.name,
                                          command=text)
        return value

    def query_float(self, key: str, **fields: Any) -> float:
        text = self.command(key, **fields)
        return self._retrying(text, lambda: self._number(self.ask(text), text))

    def query_bool(self, key: str, **fields: Any) -> bool:
        text = self.command(key, **fields)
        answer = self._retrying(text, lambda: self.ask(text)).upper()
        if answer in ("1", "ON"):
            return True
        if answer in ("0", "OFF"):
            return False
        raise InstrumentResponseError(f"expected 0/1/ON/OFF, got {answer!r}", instrument=self.name, command=text)

    def read_errors(self, limit: int = 32) -> list[tuple[int, str]]:
        """Drain the SCPI error queue: ``[(code, message), ...]`` (empty when none)."""
        errors: list[tuple[int, str]] = []
        command = self.commands["next_error"]
        for _ in range(limit):
            answer = self.ask(command)
            entry = parse_error_entry(answer)
            if entry is None:
                raise InstrumentResponseError(f"error-queue answer {answer!r} is not '<code>,\"<message>\"'",
                                              instrument=self.name, command=command)
            if entry[0] == 0:
                break
            errors.append(entry)
        return errors

    def raise_on_errors(self, command: str) -> None:
        """Raise the instrument's queued errors for ``command``, as option ``error_check`` reads them
        (``status_byte``: the status byte first, the queue only when bit 2 says it holds one; ``none``: no check)."""
        if self.error_check == "none":
            return
        if self.error_check == "status_byte":
            self._check_status_byte(command)
            return
        errors = self.read_errors()
        if errors:
            self._raise_scpi(errors, command)

    def _raise_scpi(self, errors: list[tuple[int, str]], command: str) -> None:
        code, message = errors[0]
        more = f" (and {len(errors) - 1} more: {errors[1:]})" if len(errors) > 1 else ""
        raise ScpiError(
            f"SCPI error {code} {message!r}{more}; check the value is within the instrument's "
            "range and the command matches its dialect (override it in the station file if not)",
            code=code, instrument=self.name, command=command)

    def identify(self) -> Identity:
        return self._retrying(self.commands["identify"], self._identify_once)

    def _identify_once(self) -> Identity:
        command = self.commands["identify"]
        answer = self.ask(command)
        try:
            return Identity.parse(answer)
        except ValueError as exc:
            raise InstrumentResponseError(str(exc), instrument=self.name, command=command) from exc

    def check_power_on(self) -> None:
        """Raise :class:`InstrumentStateError` when ``*ESR?`` shows the power-on bit (one query).

        For a background watch: an instrument that reset itself while the run sends it
        no setting is found within one watch period (IEEE 488.2-1992 §11.5.1.1.8, from memory).
        """
        if self.error_check == "none":
            return  # the dialect has no status to read (a caution says so at open)
        command = self.commands["event_status"]
        esr = self._retrying(command, self._read_event_status)
        if esr is not None and esr & ESR_POWER_ON:
            raise InstrumentStateError("*ESR? shows the power-on bit: " + _POWER_ON_LOST.format(during=" during the run"),
                                       instrument=self.name, command=command)

    def _read_event_status(self, strict: bool = True) -> int | None:
        """Read (and so clear) ``*ESR?``. A non-number raises, or gives None when not ``strict`` (at open)."""
        command = self.commands["event_status"]
        answer = self.ask(command)
        esr = parse_event_status(answer)
        if esr is None:
            if strict:
                raise InstrumentResponseError(
                    f"expected the event status register as a number, got {answer!r}; whether the instrument "
                    "reset cannot be told", instrument=self.name, command=command)
            logger.debug("%s: *ESR? answered %r, not a number", self.name, answer)
        return esr

    def reset(self) -> None:
        """Reset to the instrument's default state (*RST), clear status (*CLS) and check."""
        with self._lock:
            self.send(self.command("reset"))
            self.send(self.command("clear_status"))
            self._settings.clear()  # *RST returned every setting to its default
            self.wait_complete()
            self.raise_on_errors(self.command("reset"))

    def wait_complete(self, timeout_s: float | None = None) -> None:
        """Block until pending operations are done, as option ``completion`` says: ``*OPC?``
        (IEEE 488.2-1992 §10.19, from memory; within ``timeout_s``, else the instrument's
        timeout), ``*OPC`` and ``*ESR?`` polled for bit 0 until ``timeout_s``, or a fixed wait."""
        if self.completion == "fixed_wait":
            time.sleep(self.completion_wait_s)
            return
        if self.completion == "esr_poll":
            self._poll_event_status(self.timeout_s if timeout_s is None else float(timeout_s))
            return
        command = self.command("operation_complete")
        with self._lock:
            session = self._require_session()
            previous = session.timeout_s
            if timeout_s is not None:
                session.timeout_s = timeout_s
            try:
                answer = self.ask(command)
            finally:
                if self._session is session:  # an interrupt drops (closes) the session: nothing to restore
                    session.timeout_s = previous
        if not operation_complete(answer):
            raise InstrumentResponseError(f"{command!r} answered {answer!r}, expected 1 (or +1, 1.0)",
                                          instrument=self.name, command=command)

    def _poll_event_status(self, timeout_s: float) -> None:
        """completion = esr_poll: ``*OPC``, then ``*ESR?`` every ``completion_poll_s`` until its
        OPC bit (0) is set or ``timeout_s`` has passed; a power-on bit on the way raises."""
        start = self.command("operation_complete_flag")
        query = self.commands["event_status"]
        deadline = time.monotonic() + timeout_s
        with self._lock:
            self.send(start)
            while True:
                try:
                    answer = self.ask(query)
                except InstrumentTimeout as exc:
                    raise exc.located(detail=f"{exc.detail} (polling for the end of an operation, which may take "
                                             f"up to {timeout_s:g} s)") from exc
                esr = parse_event_status(answer)
                if esr is None:
                    raise InstrumentResponseError(f"{query!r} answered {answer!r} while polling for the end of an "
                                                  "operation, not a number", instrument=self.name, command=query)
                if esr & ESR_POWER_ON:
                    raise InstrumentStateError("*ESR? shows the power-on bit: " + _POWER_ON_LOST.format(during=""),
                                               instrument=self.name, command=query)
                if esr & ESR_OPERATION_COMPLETE:
                    return
                if time.monotonic() >= deadline:
                    raise InstrumentTimeout(
                        f"the operation was not complete within {timeout_s:g} s ({start!r}, then {query!r} polled "
                        "for bit 0, OPC); check the instrument is not waiting for a trigger, or give a longer wait",
                        instrument=self.name, command=query)
                time.sleep(self.completion_poll_s)

    def safe_state(self) -> None:
        """Put the instrument in its safe state: its output off (:meth:`output_off_now`)."""
        self.output_off_now(deadline_s=min(self.timeout_s, DEFAULT_OFF_DEADLINE_S))

    # -- bounded exchanges: no retries, a deadline (the interlock's watch and shutdown) ----

    def _remaining(self, deadline_at: float, command: str) -> float:
        remaining = deadline_at - time.monotonic()
        if remaining <= 0:
            raise InstrumentTimeout("the deadline passed before the exchange could start (not retried)",
                                    instrument=self.name, command=command)
        return remaining

    def _deadline_error(self, exc: InstrumentError, text: str, deadline_s: float) -> InstrumentError:
        if isinstance(exc, InstrumentTimeout):
            return InstrumentTimeout(f"no answer within {deadline_s:.3g} s (a bounded exchange, never retried)",
                                     instrument=self.name, command=text)
        return exc

    def _ask_bounded(self, text: str, deadline_s: float, *, reconnect: bool = True,
                     answer_by_deadline: bool = True, before: str | None = None) -> str:
        """One exchange on the driver's session, never retried; the lock is waited for until
        ``deadline_s`` from now only.

        ``answer_by_deadline``: the answer too must come by then (the off path); otherwise
        within the driver's own ``timeout_s`` (the watch: it decides at its deadline, and a
        late answer is still checked rather than dropped). A lost session is re-established
        (and verified) when ``reconnect``; a failure drops the session so that a late answer
        is not read as the next one.
        """
        deadline_at = time.monotonic() + deadline_s
        if not self._lock.acquire(timeout=max(0.0, deadline_s)):
            raise InstrumentTimeout(
                f"the driver stayed busy with another exchange (a retry chain?) for the whole deadline of "
                f"{deadline_s:.3g} s; not read", instrument=self.name, command=text)
        try:
            if self._session is None:
                if not (reconnect and self._wanted_open):
                    raise InstrumentConnectionError("no open session", instrument=self.name, command=text)
                try:
                    self._reconnect(deadline_at=deadline_at if answer_by_deadline else None)
                except BaseException:
                    self._drop_session()
                    raise
            session = self._require_session()
            previous = session.timeout_s
            if answer_by_deadline:
                timeout_s = self._remaining(deadline_at, text)
            else:
                timeout_s = deadline_s = self.timeout_s
            try:
                session.timeout_s = timeout_s
                if before is not None:  # a setting sent alone first (no compound messages)
                    self.send(before)
                return self.ask(text)
            except InstrumentError as exc:
                self._drop_session()
                raise self._deadline_error(exc, text, deadline_s) from exc
            finally:
                if self._session is session:
                    session.timeout_s = previous
        finally:
            self._lock.release()

    def _ask_separately(self, text: str, deadline_at: float, before: str | None = None) -> str:
        """One exchange over a short-lived connection of its own, over by ``deadline_at``
        (``before``: a message sent alone first)."""
        deadline_s = self._remaining(deadline_at, text)
        session = self._connect(deadline_s)
        try:
            session.timeout_s = self._remaining(deadline_at, text)
            if before is not None:
                logger.debug("%s <- %s (separate connection)", self.name, before)
                session.write(before)
            logger.debug("%s <- %s (separate connection)", self.name, text)
            return session.query(text)
        except InstrumentError as exc:
            raise self._deadline_error(exc.located(instrument=self.name, command=text), text, deadline_s) from exc
        finally:
            session.close()

    def query_float_now(self, key: str, *, deadline_s: float, answer_by_deadline: bool = False,
                        **fields: Any) -> float:
        """Reading ``key`` (with its template ``fields``) as a number: no retry, no error-queue
        read; the driver is waited for ``deadline_s`` at most, the answer for its ``timeout_s``
        (the watch) or, with ``answer_by_deadline``, by the same deadline (the shutdown's
        discharge read-back)."""
        text = self.command(key, **fields)
        return self._number(self._ask_bounded(text, deadline_s, answer_by_deadline=answer_by_deadline), text,
                            check_errors=False)

    def check_power_on_now(self, *, deadline_s: float) -> None:
        """:meth:`check_power_on` for the watch, never retried (waits as :meth:`query_float_now`)."""
        if self.error_check == "none":
            return  # the dialect has no status to read (a caution says so at open)
        command = self.commands["event_status"]
        answer = self._ask_bounded(command, deadline_s, answer_by_deadline=False)
        esr = parse_event_status(answer)
        if esr is None:
            raise InstrumentResponseError(
                f"expected the event status register as a number, got {answer!r}; whether the instrument "
                "reset cannot be told", instrument=self.name, command=command)
        if esr & ESR_POWER_ON:
            raise InstrumentStateError("*ESR? shows the power-on bit: " + _POWER_ON_LOST.format(during=" during the run"),
                                       instrument=self.name, command=command)

    def output_off_now(self, *, deadline_s: float = DEFAULT_OFF_DEADLINE_S) -> str:
        """Switch the output off and read it back as off within ``deadline_s``; never retried.

        One message, the OFF setting and the read-back query (``OUTP OFF;:OUTP?``): its answer
        shows the instrument processed the OFF. The driver's session is used when it is free
        within :attr:`OFF_LOCK_GRACE_S`, otherwise (busy with a retry chain, lost, or failed
        just now) a short-lived connection of its own within the rest of the deadline.
        Returns what confirmed it; raises an :class:`InstrumentError` when nothing did.
        """
        if self.OUTPUT_SWITCH is None:
            return "no output to switch"
        set_key, get_key = self.OUTPUT_SWITCH
        off, check = self.command(set_key, state=on_off(False)), self.command(get_key)
        text = compound(off, check) if self.compound_messages else check
        before = None if self.compound_messages else off
        started = time.monotonic()
        deadline_at = started + deadline_s
        self._settings[set_key] = {"state": on_off(False)}  # a later reconnect must expect it off
        errors: list[InstrumentError] = []

        def confirmed(answer: str) -> bool:
            is_off = reads_off(answer)
            if is_off:
                return True
            errors.append(InstrumentStateError(
                f"after {off!r} the read-back {check!r} answered {answer!r}, not off; switch it off by hand and "
                "check the instrument", instrument=self.name, command=text) if is_off is False else
                InstrumentResponseError(f"expected 0/OFF from {check!r} after {off!r}, got {answer!r}",
                                        instrument=self.name, command=text))
            return False

        if self._lock.acquire(timeout=max(0.0, min(self.OFF_LOCK_GRACE_S, deadline_s / 4))):
            try:
                if self._session is not None:
                    if confirmed(self._ask_bounded(text, self._remaining(deadline_at, text), reconnect=False,
                                                   before=before)):
                        return (f"{off!r} confirmed by {check!r} over its session in "
                                f"{(time.monotonic() - started) * 1e3:.0f} ms")
                    self._drop_session()  # perhaps a late answer to an earlier query: ask afresh
            except InstrumentError as exc:
                errors.append(exc)
            finally:
                self._lock.release()
        try:
            if confirmed(self._ask_separately(text, deadline_at, before)):
                return (f"{off!r} confirmed by {check!r} over a separate connection in "
                        f"{(time.monotonic() - started) * 1e3:.0f} ms")
        except InstrumentError as exc:
            errors.append(exc)
        if len(errors) == 1:
            raise errors[0]
        raise errors[-1].located(detail=f"over its session: {errors[0].detail}; over a separate connection: "
                                        f"{errors[-1].detail}", instrument=self.name, command=text) from errors[-1]
