"""SCPI core of the simulated instruments: parser, status model and a loopback TCP server.

Instruments are reached only through sockets, exactly like hardware; this package
never imports benchctl. See :mod:`.instrument` for the behaviour and the clauses
of IEEE 488.2-1992 / SCPI-1999 it follows.
"""

from __future__ import annotations

from .audit import AuditEntry, AuditLog
from .errors import STANDARD_ERRORS, ErrorEntry, ScpiError, ScpiExecutionError
from .hislip import HislipServer
from .instrument import Identity, ScpiInstrument
from .params import Block, Boolean, Choice, Numeric, Text
from .quirks import QUIRK_NAMES, QuirkError, Quirks, parse_quirk_spec, parse_quirks
from .responses import format_response
from .server import GARBLED_RESPONSE, FaultKind, ScpiServer

__all__ = [
    "AuditEntry",
    "AuditLog",
    "Block",
    "Boolean",
    "Choice",
    "ErrorEntry",
    "FaultKind",
    "GARBLED_RESPONSE",
    "HislipServer",
    "Identity",
    "Numeric",
    "QUIRK_NAMES",
    "QuirkError",
    "Quirks",
    "STANDARD_ERRORS",
    "ScpiError",
    "ScpiExecutionError",
    "ScpiInstrument",
    "ScpiServer",
    "Text",
    "format_response",
    "parse_quirk_spec",
    "parse_quirks",
]
