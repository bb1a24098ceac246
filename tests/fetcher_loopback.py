"""A tiny programmable HTTP server on 127.0.0.x for the fetcher tests.

Each :class:`LoopbackSite` is a real ``ThreadingHTTPServer`` on an ephemeral port; it logs every
request with server-side ``time.monotonic()`` and ``time.time()`` stamps, so politeness is judged
from what the server saw, never from the client's claims.
"""

from __future__ import annotations

import threading
import time
from collections.abc import Callable
from dataclasses import dataclass
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer
from typing import Any

Handler = Callable[[BaseHTTPRequestHandler], None]


@dataclass(frozen=True)
class Hit:
    """One request as the server saw it."""

    mono: float
    wall: float
    path: str
    headers: dict[str, str]


def send(h: BaseHTTPRequestHandler, status: int, body: bytes = b"",
         headers: dict[str, str] | None = None) -> None:
    """Write a complete response with Content-Length."""
    h.send_response(status)
    for k, v in (headers or {}).items():
        h.send_header(k, v)
    h.send_header("Content-Length", str(len(body)))
    h.end_headers()
    if body:
        h.wfile.write(body)


class LoopbackSite:
    """Routes: exact path (with query, else without) -> handler or (status, body[, headers])."""

    def __init__(self, address: str = "127.0.0.1") -> None:
        self.routes: dict[str, Any] = {}
        self.hits: list[Hit] = []
        self._lock = threading.Lock()
        site = self

        class _H(BaseHTTPRequestHandler):
            protocol_version = "HTTP/1.1"

            def do_GET(self) -> None:
                with site._lock:
                    site.hits.append(Hit(time.monotonic(), time.time(), self.path,
                                         {k: v for k, v in self.headers.items()}))
                route = site.routes.get(self.path)
                if route is None:
                    route = site.routes.get(self.path.split("?", 1)[0])
                if route is None:
                    send(self, 404, b"not here")
                elif callable(route):
                    route(self)
                else:
                    status, body, *rest = route
                    send(self, status, body, rest[0] if rest else None)

            def log_message(self, *args: object) -> None:
                pass

        class _Server(ThreadingHTTPServer):
            def handle_error(self, request: object, client_address: object) -> None:
                pass  # clients hanging up mid-response (caps, deadlines) are expected here

        self.server = _Server((address, 0), _H)
        self.server.daemon_threads = True
        self.host, self.port = address, self.server.server_address[1]
        self._thread = threading.Thread(target=self.server.serve_forever, args=(0.05,),
                                        daemon=True)
        self._thread.start()

    def url(self, path: str = "/") -> str:
        """Absolute URL of ``path`` on this site."""
        return f"http://{self.host}:{self.port}{path}"

    @property
    def key(self) -> str:
        """The budget/ledger host key ``host:port``."""
        return f"{self.host}:{self.port}"

    def paths(self) -> list[str]:
        """Paths requested so far, in order."""
        with self._lock:
            return [h.path for h in self.hits]

    def hits_for(self, path: str) -> list[Hit]:
        """Requests for ``path`` (exact, query included)."""
        with self._lock:
            return [h for h in self.hits if h.path == path]

    def close(self) -> None:
        """Stop serving and free the port."""
        self.server.shutdown()
        self.server.server_close()


def max_in_window(stamps: list[float], window: float) -> int:
    """Largest number of stamps inside any half-open window [t, t + window)."""
    stamps = sorted(stamps)
    best, j = 0, 0
    for i, start in enumerate(stamps):
        while j < len(stamps) and stamps[j] < start + window:
            j += 1
        best = max(best, j - i)
    return best
