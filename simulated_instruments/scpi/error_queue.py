"""The SCPI error/event queue (SCPI-1999 Vol. 2 §21.8, IEEE 488.2-1992 §11.5, from memory).

First in, first out. When the queue is full, the newest entry is replaced by
-350,"Queue overflow" and further errors are dropped until it is read.
Not thread-safe by itself: the instrument holds its lock around every use.
"""

from __future__ import annotations

from collections import deque

from .errors import ErrorEntry, standard_message

NO_ERROR = ErrorEntry(0, "No error")
QUEUE_OVERFLOW_CODE = -350


class ErrorQueue:
    """Bounded FIFO of :class:`ErrorEntry`; ``capacity`` counts the -350 entry too."""

    def __init__(self, capacity: int = 16) -> None:
        if capacity < 2:
            raise ValueError(
                f"error queue capacity must be at least 2 (one error and the overflow "
                f"entry); got {capacity}"
            )
        self.capacity = capacity
        self._entries: deque[ErrorEntry] = deque()

    def push(self, entry: ErrorEntry) -> None:
        """Append ``entry``; on overflow replace the newest entry by -350."""
        if len(self._entries) < self.capacity:
            self._entries.append(entry)
            return
        if self._entries[-1].code != QUEUE_OVERFLOW_CODE:
            self._entries[-1] = ErrorEntry(QUEUE_OVERFLOW_CODE, standard_message(QUEUE_OVERFLOW_CODE))

    def pop(self) -> ErrorEntry:
        """Remove and return the oldest entry, or 0,"No error" when empty."""
        return self._entries.popleft() if self._entries else NO_ERROR

    def peek_all(self) -> tuple[ErrorEntry, ...]:
        """Every queued entry, oldest first, without removing them."""
        return tuple(self._entries)

    def clear(self) -> None:
        self._entries.clear()

    def __len__(self) -> int:
        return len(self._entries)
