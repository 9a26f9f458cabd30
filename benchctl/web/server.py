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

    @property
    def url(self) -> str:
        host = f"[{self.host}]" if ":" in self.host else self.host
        return f"http://{host}:{self.port}"

    def stop(self) -> None:
        """Close the listening socket and every connection; waits for the thread."""
        self.server.close()
        self.thread.join(timeout=10)


def make_server(app: Any, host: str, port: int) -> Any:
    """A waitress server for ``app`` bound to ``host:port`` (port 0: a free one); not started."""
    from waitress.server import create_server

    return create_server(app, host=host, port=port, threads=THREADS, ident="benchctl", expose_tracebacks=False,
                         clear_untrusted_proxy_headers=True)


def start_in_thread(app: Any, host: str = "127.0.0.1", port: int = 0) -> RunningServer:
    """Serve ``app`` from a daemon thread; returns once the socket listens."""
    server = make_server(app, host, port)
    thread = threading.Thread(target=server.run, name="benchctl-web", daemon=True)
    thread.start()
    return RunningServer(host, int(server.effective_port), server, thread)


__all__ = ["THREADS", "RunningServer", "make_server", "start_in_thread"]
