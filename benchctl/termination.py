"""Termination signals: every catchable way a run is told to end leads to the same safe shutdown.

``SIGINT`` (Ctrl-C), ``SIGTERM`` (a scheduler's timeout, a service stop, a cancelled CI
job) and ``SIGHUP`` (a closed terminal or SSH session) are caught while a run executes
(POSIX.1-2017 <signal.h> names them; SIGKILL cannot be caught — the store's recovery marks
such a run interrupted when it is next opened). The first one:

1. calls ``on_first`` at once (the runner switches the outputs off in the safe order in a
   thread of its own, so they go off even while the main thread is busy);
2. raises :class:`StopSignal` in the main thread — only where the run allows it
   (:meth:`StopSignals.interruptible`) and never inside a store write
   (:meth:`StopSignals.deferred`), which finishes first so no point is half-written.

Every later signal is only acknowledged on the console: once the shutdown has begun it
is not cut short (the outputs go off, the run is stored), and the message says so and
how long it may take. A signal the process was started to ignore (``nohup`` ignores
SIGHUP, a background job SIGINT) stays ignored.
"""

from __future__ import annotations

import logging
import signal
import threading
from contextlib import contextmanager
from typing import Any, Callable, Iterator

logger = logging.getLogger(__name__)

#: What each caught signal usually means, for the stored message.
MEANINGS = {
    "SIGINT": "Ctrl-C",
    "SIGTERM": "a termination request: a scheduler's timeout, a service stop or a cancelled job",
    "SIGHUP": "the terminal or SSH session closed",
}
CAUGHT = tuple(name for name in MEANINGS if hasattr(signal, name))


class StopSignal(KeyboardInterrupt):
    """A run stopped by a termination signal; ``signal_name`` is e.g. ``"SIGTERM"``."""

    def __init__(self, signal_name: str) -> None:
        self.signal_name = signal_name
        super().__init__(f"stopped by {signal_name} ({MEANINGS.get(signal_name, 'a signal')})")

    @property
    def message(self) -> str:
        return str(self)


class StopSignals:
    """Catch the termination signals while a run executes (a context manager, main thread only).

    ``notify(text)`` tells the person at the console what is happening (it must not raise;
    errors are swallowed: a closed terminal must not stop the shutdown). ``on_first(stop)``
    is called once, at the first signal. ``budget_s`` is how long the shutdown may take,
    for the message. In any other thread than the main one nothing is installed.
    """

    def __init__(self, *, notify: Callable[[str], None] | None = None) -> None:
        self.notify = notify
        self.on_first: Callable[[StopSignal], None] | None = None
        self.budget_s: float | None = None
        self.first: StopSignal | None = None
        self.received: list[str] = []
        self.raised = False
        self._previous: dict[int, Any] = {}
        self._interruptible = False
        self._critical = 0

    # -- installing ------------------------------------------------------------------

    def __enter__(self) -> "StopSignals":
        if threading.current_thread() is not threading.main_thread():
            logger.debug("not in the main thread: termination signals are not caught here")
            return self
        for name in CAUGHT:
            number = getattr(signal, name)
            previous = signal.getsignal(number)
            if previous is signal.SIG_IGN:
                continue  # started to ignore it (nohup, a background job): respect that
            self._previous[number] = previous
            signal.signal(number, self._handle)
        return self

    def __exit__(self, *exc_info: object) -> None:
        for number, previous in self._previous.items():
            signal.signal(number, previous)
        self._previous.clear()

    # -- where a signal may interrupt ------------------------------------------------

    @contextmanager
    def interruptible(self) -> Iterator[None]:
        """Inside: the first signal raises :class:`StopSignal` at once (or on entry, if it came before)."""
        previous = self._interruptible
        self._interruptible = True
        try:
            self._raise_pending()
            yield
        finally:
            self._interruptible = previous

    @contextmanager
    def deferred(self) -> Iterator[None]:
        """Inside (a store write): a signal waits until the block is done, then raises if allowed."""
        self._critical += 1
        try:
            yield
        finally:
            self._critical -= 1
        self._raise_pending()

    def raise_if_received(self) -> None:
        """Raise the first signal now if it came but has not been raised yet (the run is stored)."""
        if self.first is not None and not self.raised:
            self.raised = True
            raise self.first

    def _raise_pending(self) -> None:
        if self.first is not None and not self.raised and self._interruptible and self._critical == 0:
            self.raised = True
            raise self.first

    # -- the handler -----------------------------------------------------------------

    def _say(self, text: str) -> None:
        if self.notify is None:
            logger.warning("%s", text)
            return
        logger.info("%s", text)
        try:
            self.notify(text)
        except Exception:  # a closed terminal (SIGHUP) must not stop the shutdown
            pass

    def _budget(self) -> str:
        if self.budget_s is None:
            return ""
        return f" (the outputs are off within about {self.budget_s:.1f} s)"

    def _handle(self, signum: int, frame: Any) -> None:
        name = signal.Signals(signum).name
        self.received.append(name)
        if self.first is not None:
            self._say(f"{name} received again: still shutting down{self._budget()}; the run is being stored. "
                      "Interrupting the shutdown could leave an output on, so further signals are ignored")
            return
        stop = StopSignal(name)
        self.first = stop
        self._say(f"{name} received ({MEANINGS.get(name, 'a signal')}): shutting down — outputs off in the safe "
                  f"order (source first, then the load){self._budget()}, then the run is stored as interrupted. "
                  "Further signals are ignored until then")
        if self.on_first is not None:
            try:
                self.on_first(stop)
            except Exception:
                logger.exception("starting the shutdown on %s failed", name)
        self._raise_pending()
