"""Cut a byte stream into program messages at the newline terminator.

The terminator is LF (IEEE 488.2-1992 §7.5; a CR before it is white space and so
tolerated). An LF inside a definite-length block ``#<n><len><bytes>`` is data
(§7.7.6.2) and does not end the message. An LF inside a quoted string does end
it, so a never-closed quote cannot swallow the messages that follow. A message
longer than ``max_message_bytes`` is reported as :class:`Overrun` and discarded
up to the next LF (SCPI -363 Input buffer overrun).
"""

from __future__ import annotations

import re
from dataclasses import dataclass

_SPECIAL_RE = re.compile(rb"[\n\"'#]")
_DIGITS = b"123456789"


@dataclass(frozen=True)
class Overrun:
    """A message that exceeded the limit; ``size_bytes`` is how much had arrived when it was cut."""

    size_bytes: int


class MessageFramer:
    """Incremental framer: :meth:`feed` bytes, get complete messages (without LF) and overruns."""

    def __init__(self, max_message_bytes: int = 1 << 20) -> None:
        if max_message_bytes < 1:
            raise ValueError(f"max_message_bytes must be positive; got {max_message_bytes}")
        self.max_message_bytes = max_message_bytes
        self._buf = bytearray()
        self._scan = 0
        self._discarding = False

    def feed(self, data: bytes) -> list[bytes | Overrun]:
        out: list[bytes | Overrun] = []
        self._buf += data
        while True:
            if self._discarding:
                k = self._buf.find(b"\n")
                if k < 0:
                    self._buf.clear()
                    self._scan = 0
                    break
                del self._buf[: k + 1]
                self._discarding = False
                self._scan = 0
                continue
            end = self._find_terminator()
            if end >= 0:
                message = bytes(self._buf[:end])
                del self._buf[: end + 1]
                self._scan = 0
                out.append(Overrun(len(message)) if len(message) > self.max_message_bytes else message)
                continue
            if len(self._buf) > self.max_message_bytes:
                out.append(Overrun(len(self._buf)))
                self._discarding = True
                continue
            break
        return out

    def reset(self) -> None:
        """Forget every byte buffered (a device clear empties the input buffer)."""
        self._buf.clear()
        self._scan = 0
        self._discarding = False

    def has_partial(self) -> bool:
        """Whether part of a further message (not only white space) is buffered."""
        return not self._discarding and bool(self._buf.strip())

    def _find_terminator(self) -> int:
        buf = self._buf
        pos = self._scan
        while True:
            m = _SPECIAL_RE.search(buf, pos)
            if m is None:
                self._scan = len(buf)
                return -1
            i = m.start()
            c = buf[i]
            if c == 0x0A:
                return i
            if c in b"\"'":
                close = buf.find(bytes([c]), i + 1)
                newline = buf.find(b"\n", i + 1)
                if close < 0 and newline < 0:
                    self._scan = i
                    return -1
                if close < 0 or 0 <= newline < close:
                    return newline
                pos = close + 1
                continue
            # '#': a definite-length block hides its bytes from the terminator search
            if i + 1 >= len(buf):
                self._scan = i
                return -1
            if buf[i + 1] not in _DIGITS:
                pos = i + 1
                continue
            width = buf[i + 1] - 0x30
            if len(buf) < i + 2 + width:
                self._scan = i
                return -1
            digits = bytes(buf[i + 2:i + 2 + width])
            if not digits.isdigit():
                pos = i + 1
                continue
            end = i + 2 + width + int(digits)
            if len(buf) < end:
                self._scan = i
                return -1
            pos = end
