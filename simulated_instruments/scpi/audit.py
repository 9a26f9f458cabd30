"""Append-only, thread-safe record of what an instrument received and did.

Entries carry a sequence number (counting from 1, never reset, so entries stay
ordered across ``clear()``) and a monotonic time stamp in seconds.
"""

from __future__ import annotations

import threading
import time
from collections.abc import Callable
from dataclasses import dataclass
from typing import Literal

AuditKind = Literal["command", "state"]


@dataclass(frozen=True)
class AuditEntry:
    """``kind`` "command": ``text`` is a program message unit as received, ``source`` who sent it.
    ``kind`` "state": ``text`` names the state the instrument reported, ``value`` its new value."""

    seq: int
    t_s: float
    kind: AuditKind
    text: str
    value: object = None
    source: str = ""


class AuditLog:
    def __init__(self, clock: Callable[[], float] = time.monotonic) -> None:
        self._clock = clock
        self._lock = threading.Lock()
        self._entries: list[AuditEntry] = []
        self._seq = 0

    def _append(self, kind: AuditKind, text: str, value: object, source: str) -> AuditEntry:
        with self._lock:
            self._seq += 1
            entry = AuditEntry(self._seq, self._clock(), kind, text, value, source)
            self._entries.append(entry)
            return entry

    def record_command(self, unit: str, source: str = "") -> AuditEntry:
        return self._append("command", unit, None, source)

    def record_state(self, name: str, value: object) -> AuditEntry:
        return self._append("state", name, value, "")

    def entries(self) -> tuple[AuditEntry, ...]:
        """Every entry, oldest first."""
        with self._lock:
            return tuple(self._entries)

    def commands(self) -> list[str]:
        """The program message units received, oldest first."""
        with self._lock:
            return [e.text for e in self._entries if e.kind == "command"]

    def states(self, name: str | None = None) -> list[AuditEntry]:
        """State entries, all or only those named ``name``."""
        with self._lock:
            return [e for e in self._entries if e.kind == "state" and (name is None or e.text == name)]

    def clear(self) -> None:
        with self._lock:
            self._entries.clear()
