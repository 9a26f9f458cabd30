"""Serving the web view with waitress (a pure-Python WSGI server), in the foreground or,
for tests, in a thread of its own."""

from __future__ import annotations

import logging
import threading
from dataclasses import dataclass
from typing import Any

log = logging.getLogger(__name__)

#: Worker threads: a few browsers polling progress and one rendering plots.
THREADS = 6


@dataclass
class RunningServer:
    """A server started by :func:`start_in_thread`: its address and how to stop it."""

    host: str
    port: int
    server: Any
    thread: threading.Thread
    stopping: threading.Event

    @property
    def url(self) -> str:
        host = f"[{self.host}]" if ":" in self.host else self.host
        return f"http://{host}:{self.port}"

    def stop(self) -> None:
        """Stop serving: the server's own thread closes every connection and the listening
        socket at its next turn (within a loop timeout); waits for it."""
        self.stopping.set()
        self.thread.join(timeout=10)


def make_server(app: Any, host: str, port: int) -> Any:
    """A waitress server for ``app`` bound to ``host:port`` (port 0: a free one); not started."""
    from waitress.server import create_server

    return create_server(app, host=host, port=port, threads=THREADS, ident="benchctl", expose_tracebacks=False,
                         clear_untrusted_proxy_headers=True)


def start_in_thread(app: Any, host: str = "127.0.0.1", port: int = 0) -> RunningServer:
    """Serve ``app`` from a daemon thread; returns once the socket listens."""
    server = make_server(app, host, port)
    stopping = threading.Event()

    def serve() -> None:
        # waitress's loop runs while it has sockets: turn it one step at a time and, when asked,
        # close the keep-alive connections browsers hold and the listener from this same thread
        sockets = server._map  # waitress's socket map (the one its run() loops over)
        while not stopping.is_set():
            server.asyncore.loop(timeout=0.1, map=sockets, use_poll=True, count=1)
        for channel in list(sockets.values()):
            if channel is not server:
                channel.handle_close()
        server.close()
        server.task_dispatcher.shutdown()

    thread = threading.Thread(target=serve, name="benchctl-web", daemon=True)
    thread.start()
    return RunningServer(host, int(server.effective_port), server, thread, stopping)


__all__ = ["THREADS", "RunningServer", "make_server", "start_in_thread"]
