"""A scripted instrument and its sessions, for unit tests of drivers without sockets.

In the spirit of a mock transport: the driver is built with
``connect=instrument.connect`` and talks to a :class:`ScriptedInstrument` through
:class:`ScriptedSession` objects that implement :class:`drivers.session.Session`. The
instrument answers from a small state table (``VOLT 12`` then ``VOLT?`` answers ``12``),
from scripted answers, and the IEEE 488.2 common queries it needs (``*IDN?``, ``*ESR?``,
``*OPC?``, ``*OPC``, ``*STB?``, ``*ESE``, ``*RST``, ``*CLS``) and ``SYSTem:ERRor?``; it records
every program message and every device clear, and fails on cue (:meth:`ScriptedInstrument.fail`):
a timeout, with or without the message applied and with or without its answer arriving late
(before the device clear that follows, or after it), or a dropped connection.

It is not a simulator: no SCPI tree, no physics (that is ``simulated_instruments``, over
real sockets). Compound messages are split at ``;`` and a leading ``:`` is ignored.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import TYPE_CHECKING, Any, Callable, Literal, TypeVar

from benchctl.errors import InstrumentConnectionError, InstrumentTimeout
from benchctl.drivers.session import NotABlock

if TYPE_CHECKING:
    from benchctl.drivers.scpi_driver import ScpiDriver

D = TypeVar("D", bound="ScpiDriver")

Failure = Literal["timeout", "drop", "garble"]


@dataclass
class _Fault:
    message: str
    error: Failure
    applied: bool
    late_answer: bool | str
    times: int


class ScriptedInstrument:
    """An instrument that is not there: state, scripted answers, a message log, faults on cue."""

    def __init__(self, identity: str = "benchctl-test,scripted,0001,1.0",
                 answers: dict[str, str | Callable[[str], str]] | None = None) -> None:
        self.identity = identity
        #: Scripted answers by whole query unit (``MEAS:VOLT?``) or header; a callable gets the unit.
        self.answers: dict[str, str | Callable[[str], str]] = dict(answers or {})
        #: Settings received: header -> parameter text (what a query of the header answers).
        self.state: dict[str, str] = {}
        #: The SCPI error queue, oldest first.
        self.errors: list[tuple[int, str]] = []
        #: Standard Event Status Register (bit 7, 128, is power-on: IEEE 488.2-1992 §11.5.1.1.8, from memory).
        self.esr = 0
        #: Standard Event Status Enable register (``*ESE``); ESB of ``*STB?`` is ESR AND ESE.
        self.ese = 0
        #: Device clears received (over any session).
        self.clears = 0
        #: Headers whose setting queues this error (code, message) instead of taking effect.
        self.refuse: dict[str, tuple[int, str]] = {}
        #: Payloads answered to block queries, by query text.
        self.blocks: dict[str, bytes] = {}
        #: Every program message received, over every session, in order.
        self.messages: list[str] = []
        self.connects = 0
        self.refused_connects = 0
        self._faults: list[_Fault] = []

    # -- scripting -----------------------------------------------------------------------

    def fail(self, message: str, error: Failure = "timeout", *, applied: bool = False,
             late_answer: bool | str = False, times: int = 1) -> None:
        """The next ``times`` messages equal to ``message`` fail with ``error``.

        ``"garble"``: the message is acted on and its answer replaced by bytes that mean nothing.
        ``applied``: the instrument acts on the message before the failure (a setting takes
        effect, its answer is lost). ``late_answer`` (timeouts): the answer arrives after the
        timeout and waits on that session for whoever reads next; ``"after_clear"``: it
        arrives later still, after a device clear, just before the next message's answers
        (a slow instrument on a raw socket, which has no device clear).
        """
        self._faults.append(_Fault(message, error, applied, late_answer, times))

    def refuse_connections(self, times: int = 1) -> None:
        """The next ``times`` connection attempts fail (nothing listens)."""
        self.refused_connects += times

    def power_cycle(self) -> None:
        """The instrument reset behind the driver's back: settings lost, power-on bit set."""
        self.state.clear()
        self.esr |= 128

    def connect(self, resource: str, *, name: str, timeout_s: float) -> "ScriptedSession":
        """A :data:`drivers.session.Connect` for ``ScpiDriver(..., connect=instrument.connect)``."""
        if self.refused_connects > 0:
            self.refused_connects -= 1
            raise InstrumentConnectionError(f"connection refused at {resource}", instrument=name)
        self.connects += 1
        return ScriptedSession(self, name=name, timeout_s=timeout_s)

    # -- what the instrument does with a message ----------------------------------------------

    def _fault_for(self, message: str) -> _Fault | None:
        for fault in self._faults:
            if fault.message == message and fault.times > 0:
                fault.times -= 1
                return fault
        return None

    def process(self, message: str) -> list[str]:
        """Act on one program message; the answers of its queries, in order."""
        answers = []
        for unit in (u.strip().lstrip(":") for u in message.split(";")):
            if not unit:
                continue
            header, _, parameter = unit.partition(" ")
            header = header.upper()
            if header.endswith("?"):
                answer = self._query(unit, header[:-1])
                if answer is not None:
                    answers.append(answer)
            else:
                self._set(header, parameter.strip())
        return answers

    def _query(self, unit: str, header: str) -> str | None:
        scripted = self.answers.get(unit, self.answers.get(header + "?"))
        if scripted is not None:
            return scripted(unit) if callable(scripted) else scripted
        if header == "*IDN":
            return self.identity
        if header == "*ESR":
            esr, self.esr = self.esr, 0
            return str(esr)
        if header == "*OPC":
            return "1"
        if header == "*STB":  # bit 2 error queue not empty (SCPI-1999), bit 5 ESB (IEEE 488.2 §11.2; from memory)
            return str((4 if self.errors else 0) | (32 if self.esr & self.ese else 0))
        if header in ("SYST:ERR", "SYSTEM:ERROR"):
            code, text = self.errors.pop(0) if self.errors else (0, "No error")
            return f'{code},"{text}"'
        if header in self.state:
            return self.state[header]
        self.errors.append((-113, f"Undefined header; {unit}"))
        return None

    def _set(self, header: str, parameter: str) -> None:
        if header == "*RST":
            self.state.clear()
        elif header == "*CLS":
            self.errors.clear()
            self.esr = 0
        elif header == "*OPC":
            self.esr |= 1  # operation complete at once: nothing here takes time
        elif header == "*ESE":
            self.ese = int(float(parameter or 0))
        elif header in self.refuse:
            self.errors.append(self.refuse[header])
        else:
            self.state[header] = parameter


class ScriptedSession:
    """One connection to a :class:`ScriptedInstrument` (implements :class:`drivers.session.Session`)."""

    def __init__(self, instrument: ScriptedInstrument, *, name: str, timeout_s: float) -> None:
        self.instrument = instrument
        self.name = name
        self.timeout_s = timeout_s
        self.closed = False
        self._pending: list[str] = []  # answer lines not read yet, one per message (a late answer waits here)
        self._late: list[str] = []  # answers still on their way: they arrive with the next message

    def _deliver(self, text: str) -> None:
        if self.closed:
            raise InstrumentConnectionError("the connection is closed", instrument=self.name, command=text)
        self._pending.extend(self._late)
        self._late.clear()
        inst = self.instrument
        inst.messages.append(text)
        fault = inst._fault_for(text)
        if fault is None:
            self._answer(inst.process(text))
            return
        answers = inst.process(text) if fault.applied or fault.error == "garble" else []
        if fault.error == "garble":
            self._answer(["~?GARBLED%&~"] if answers else [])
            return
        if fault.error == "drop":
            self.closed = True
            raise InstrumentConnectionError("connection reset by the instrument", instrument=self.name, command=text)
        if fault.late_answer == "after_clear":
            self._late.append(";".join(answers)) if answers else None
        elif fault.late_answer:
            self._answer(answers)
        raise InstrumentTimeout(f"no answer within {self.timeout_s:g} s", instrument=self.name, command=text)

    def _answer(self, answers: list[str]) -> None:
        if answers:  # the queries of one message answer in one line (IEEE 488.2 §8.4, from memory)
            self._pending.append(";".join(answers))

    def write(self, text: str) -> None:
        self._deliver(text)

    def query(self, text: str) -> str:
        self._deliver(text)
        if not self._pending:
            raise InstrumentTimeout(f"no answer within {self.timeout_s:g} s", instrument=self.name, command=text)
        return self._pending.pop(0)

    def read_block(self, text: str) -> bytes:
        self._deliver(text)
        if text in self.instrument.blocks:
            self._pending.clear()
            return self.instrument.blocks[text]
        if self._pending:  # a text line where a block was asked for (an error, usually)
            line = self._pending.pop(0)
            raise NotABlock(f"expected a definite-length block, got {line[:40]!r}", answer=line.encode(),
                            instrument=self.name, command=text)
        raise InstrumentTimeout(f"no answer within {self.timeout_s:g} s", instrument=self.name, command=text)

    def query_text_and_block(self, text: str) -> tuple[str, bytes] | None:
        return None  # no fast path: the caller asks the two queries apart

    def read(self) -> str:
        """The next answer line already there, sending nothing (a timeout when there is none)."""
        if self.closed:
            raise InstrumentConnectionError("the connection is closed", instrument=self.name, command="(read)")
        if not self._pending:
            raise InstrumentTimeout(f"no answer within {self.timeout_s:g} s", instrument=self.name, command="(read)")
        return self._pending.pop(0)

    def clear(self) -> None:
        """Device clear: the answers waiting are discarded (the instrument's output queue,
        IEEE 488.2-1992 §5.8, from memory); one still on its way (``"after_clear"``) is not."""
        self.instrument.clears += 1
        self._pending.clear()

    def close(self) -> None:
        self.closed = True

    def __repr__(self) -> str:
        return f"<ScriptedSession {self.name} {'closed' if self.closed else 'open'}>"


def scripted_driver(cls: type[D], instrument: ScriptedInstrument | None = None, **kwargs: Any) -> D:
    """An opened driver of class ``cls`` talking to ``instrument`` (a new one when None)."""
    instrument = instrument or ScriptedInstrument()
    kwargs.setdefault("name", cls.kind)
    driver = cls(f"SCRIPTED::{cls.kind}", connect=instrument.connect, **kwargs)
    driver.open()
    return driver
