"""What an instrument's answers about itself mean: identity, status, error queue, read-back.

Pure functions and small values, no I/O: the driver's policy (:mod:`drivers.scpi_driver`)
asks, these read the answers.

* ``*IDN?``: four comma-separated fields maker, model, serial, firmware (IEEE 488.2-1992
  §10.14, from memory).
* ``*ESR?``: the Standard Event Status Register as a number; bit 7 (128) is PON, power on
  (IEEE 488.2-1992 §11.5.1.1.8, from memory).
* ``SYSTem:ERRor?``: ``<code>,"<message>"``, code 0 when the queue is empty (SCPI-1999
  Vol. 2 §21.8).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any, Mapping

#: Power-on bit of the Standard Event Status Register (IEEE 488.2-1992 §11.5.1.1.8, from memory).
ESR_POWER_ON = 128


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


def on_off(state: bool) -> str:
    """The SCPI Boolean word for ``state`` (SCPI-1999 Vol. 1 §7.3: ON | OFF)."""
    return "ON" if state else "OFF"


def parse_error_entry(answer: str) -> tuple[int, str] | None:
    """``(code, message)`` of one ``SYSTem:ERRor?`` answer, or None when it has no integer code."""
    code_text, _, message = answer.partition(",")
    try:
        code = int(code_text.strip())
    except ValueError:
        return None
    return code, message.strip().strip('"')


def parse_status_answer(answer: str) -> tuple[int, tuple[int, str]] | None:
    """``(esr, (code, message))`` of the compound answer ``<ESR>;<code>,"<message>"``, or None."""
    esr_text, sep, error_text = answer.partition(";")
    if not sep:
        return None
    try:
        esr = int(float(esr_text))
    except ValueError:
        return None
    entry = parse_error_entry(error_text)
    return None if entry is None else (esr, entry)


def parse_event_status(answer: str) -> int | None:
    """The ``*ESR?`` answer as a number, or None when it is not one."""
    try:
        value = float(answer)
    except ValueError:
        return None
    return int(value) if math.isfinite(value) else None


def operation_complete(answer: str) -> bool:
    """Whether an ``*OPC?`` answer says "complete": the NR1 ``1`` of IEEE 488.2-1992 §10.19
    (from memory), also in the forms instruments send in practice (``+1``, ``1.0``, ``+1.000E+00``)."""
    try:
        value = float(answer.strip())
    except ValueError:
        return False
    return value == 1.0


def compound(first: str, second: str) -> str:
    """``first;second`` as one program message, ``second`` started at the root (``;:``) unless it
    is a common command (``*``) or already rooted (SCPI-1999 Vol. 1 §6.2.4, from memory)."""
    return f"{first};{second if second.startswith((':', '*')) else ':' + second}"


def read_back_matches(fields: Mapping[str, Any], answer: str) -> bool | None:
    """Whether a getter's ``answer`` shows the setting made with ``fields``; None when it cannot tell.

    Numbers compare at the 6 significant digits the templates send (``{value:.6g}``); Booleans
    as 1/ON and 0/OFF; words by their short or long form (SCPI answers CURR for CURRent).
    """
    if len(fields) != 1:
        return None
    (value,) = fields.values()
    text = answer.strip().strip('"').upper()
    if isinstance(value, bool):
        value = on_off(value)
    if isinstance(value, (int, float)):
        try:
            got = float(text.split(",")[0])
        except ValueError:
            return None
        return math.isclose(got, float(value), rel_tol=2e-6, abs_tol=1e-12)
    if isinstance(value, str):
        word = value.strip().upper()
        if word in ("ON", "OFF"):
            return text in (("1", "ON") if word == "ON" else ("0", "OFF"))
        return bool(text) and (text == word or word.startswith(text) or text.startswith(word))
    return None


def reads_off(answer: str) -> bool | None:
    """True for 0/OFF, False for 1/ON, None for anything else (an output switch's read-back)."""
    word = answer.strip().strip('"').upper()
    if word in ("0", "OFF"):
        return True
    if word in ("1", "ON"):
        return False
    return None
