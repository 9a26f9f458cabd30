"""SCPI error numbers, their standard texts, and the exceptions that carry them.

Negative numbers and texts follow SCPI-1999 Vol. 2 ch. 21 "Error/Event queue"
(from memory; the classes are IEEE 488.2-1992 §11.5.1: command, execution,
device-dependent and query errors). A queued error is reported by
``SYSTem:ERRor?`` as ``<code>,"<message>[;<detail>]"``.
"""

from __future__ import annotations

from dataclasses import dataclass

#: Standard SCPI error texts (SCPI-1999 Vol. 2 §21.8, from memory).
STANDARD_ERRORS: dict[int, str] = {
    0: "No error",
    -100: "Command error",
    -101: "Invalid character",
    -102: "Syntax error",
    -103: "Invalid separator",
    -104: "Data type error",
    -108: "Parameter not allowed",
    -109: "Missing parameter",
    -111: "Header separator error",
    -112: "Program mnemonic too long",
    -113: "Undefined header",
    -114: "Header suffix out of range",
    -120: "Numeric data error",
    -131: "Invalid suffix",
    -138: "Suffix not allowed",
    -141: "Invalid character data",
    -161: "Invalid block data",
    -200: "Execution error",
    -221: "Settings conflict",
    -222: "Data out of range",
    -224: "Illegal parameter value",
    -241: "Hardware missing",
    -350: "Queue overflow",
    -363: "Input buffer overrun",
    -410: "Query INTERRUPTED",
    -420: "Query UNTERMINATED",
    -440: "Query UNTERMINATED after indefinite response",
}


def standard_message(code: int) -> str:
    """The standard text for ``code``; for an unlisted code, the text of its class.

    The class of a negative code is its hundreds (-1xx command, -2xx execution,
    -3xx device-specific, -4xx query; IEEE 488.2-1992 §11.5.1.1, from memory).
    """
    if code in STANDARD_ERRORS:
        return STANDARD_ERRORS[code]
    if code < 0:
        class_code = -((-code) // 100) * 100
        return {
            -100: "Command error",
            -200: "Execution error",
            -300: "Device-specific error",
            -400: "Query error",
        }.get(class_code, "Device-specific error")
    return "Device-specific error"


@dataclass(frozen=True)
class ErrorEntry:
    """One entry of the error/event queue."""

    code: int
    message: str
    detail: str = ""

    def response(self) -> str:
        """The ``SYSTem:ERRor?`` response: ``<code>,"<message>[;<detail>]"``.

        Double quotes inside the text are doubled, as IEEE 488.2-1992 §8.7.8
        requires inside string response data (from memory).
        """
        text = self.message if not self.detail else f"{self.message};{self.detail}"
        text = text.replace('"', '""').replace("\n", " ").replace("\r", " ")
        text = text.encode("ascii", "replace").decode("ascii")  # responses stay 7-bit ASCII
        return f'{self.code},"{text}"'


class ScpiError(Exception):
    """An error the core queues instead of executing a program message unit.

    Raised inside the parser and by parameter specifications; handlers raise the
    subclass :class:`ScpiExecutionError`.
    """

    def __init__(self, code: int, detail: str = "", message: str | None = None) -> None:
        self.code = code
        self.message = message if message is not None else standard_message(code)
        self.detail = detail
        super().__init__(f"{code},{self.message}" + (f";{detail}" if detail else ""))

    def entry(self) -> ErrorEntry:
        """This error as an error-queue entry."""
        return ErrorEntry(self.code, self.message, self.detail)


class ScpiExecutionError(ScpiError):
    """Raised by an instrument handler to queue a SCPI error instead of acting.

    ``ScpiExecutionError(-221, "Settings conflict", "OVP below the set voltage")``;
    ``message`` may be ``None`` for the standard text of ``code``.
    """

    def __init__(self, code: int, message: str | None = None, detail: str = "") -> None:
        super().__init__(code, detail=detail, message=message)
