"""A small scriptable HTTP server on a loopback address, with a request log.

One ``ThreadingHTTPServer`` (standard library) on ``127.0.0.x`` and an ephemeral port. Routes
live in memory and can be changed while it runs. Every request is logged with server-side
``time.monotonic()`` and ``time.time()`` stamps, so politeness is judged from what the server
saw, never from the client's claims. The tests, the hostile archive (``demo_site.hostile``)
and the benches use it; the demo archive itself is served by ``demo_site.server``.

A route is an *answer* ``(status, body)`` or ``(status, body, headers)``, or a callable that
gets the request handler: it either returns such an answer or writes the response itself
(for misbehaviours: wrong lengths, resets, endless bodies) and returns None. Lookup order:
the exact request target (path with query), the path, the longest matching prefix in
``prefixes``, ``fallback``, else 404.
"""

from __future__ import annotations

import ipaddress
import threading
import time
from collections.abc import Callable, Mapping
from dataclasses import dataclass
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer
from types import TracebackType
from typing import Any
from urllib.parse import parse_qsl, urlsplit

Handler = BaseHTTPRequestHandler
Answer = tuple[int, bytes] | tuple[int, bytes, Mapping[str, str]]
Route = Answer | Callable[[Handler], Answer | None]


@dataclass(frozen=True)
class Hit:
    """One request as the server saw it: monotonic and wall time, target, headers."""

    mono: float
    wall: float
    path: str  # the request target: path and query, as sent
    headers: dict[str, str]


def send(h: Handler, status: int, body: bytes = b"", headers: Mapping[str, str] | None = None,
         length: int | None = None) -> None:
    """Write a whole response; ``length`` overrides Content-Length (it may lie)."""
    h.send_response(status)
    for k, v in (headers or {}).items():
        h.send_header(k, v)
    h.send_header("Content-Length", str(len(body) if length is None else length))
    h.end_headers()
    if body:
        h.wfile.write(body)
        h.wfile.flush()


def query_of(h: Handler) -> dict[str, str]:
    """The request's query parameters (last value wins)."""
    return dict(parse_qsl(urlsplit(h.path).query, keep_blank_values=True))


class _Server(ThreadingHTTPServer):
    daemon_threads = True
    allow_reuse_address = True

    def handle_error(self, request: Any, client_address: Any) -> None:
        pass  # clients hanging up mid-response (caps, deadlines, hostile answers) are expected


class LoopbackServer:
    """A real HTTP/1.1 server on ``address`` (loopback only) serving routes from memory."""

    def __init__(self, address: str = "127.0.0.1", port: int = 0) -> None:
        if not ipaddress.ip_address(address).is_loopback:
            raise ValueError(f"{address} is not a loopback address; use 127.0.0.x")
        self.routes: dict[str, Route] = {}
        self.prefixes: dict[str, Route] = {}
        self.fallback: Route | None = None
        self.hits: list[Hit] = []
        self._lock = threading.Lock()
        server = self

        class _H(BaseHTTPRequestHandler):
            protocol_version = "HTTP/1.1"
            # Headers and body go out in separate writes: without TCP_NODELAY the body waits for
            # the client's delayed ACK (about 40 ms on Linux) on every answer.
            disable_nagle_algorithm = True

            def do_GET(self) -> None:
                with server._lock:
                    server.hits.append(Hit(time.monotonic(), time.time(), self.path,
                                           dict(self.headers.items())))
                server._answer(self)

            def log_message(self, *args: object) -> None:
                pass

        self.server = _Server((address, port), _H)
        self.host, self.port = address, self.server.server_address[1]
        self._thread = threading.Thread(target=self.server.serve_forever, args=(0.05,),
                                        daemon=True)
        self._thread.start()

    def _find(self, target: str) -> Route | None:
        path = target.split("?", 1)[0]
        for key in (target, path):
            if key in self.routes:
                return self.routes[key]
        for prefix in sorted(self.prefixes, key=len, reverse=True):
            if path.startswith(prefix):
                return self.prefixes[prefix]
        return self.fallback

    def _answer(self, h: Handler) -> None:
        route = self._find(h.path)
        answer = route(h) if callable(route) else route
        if route is None:
            answer = (404, b"not here", {"Content-Type": "text/plain"})
        if answer is not None:
            status, body, *rest = answer
            send(h, status, body, rest[0] if rest else None)

    def route(self, path: str, answer: Route) -> None:
        """Serve ``path`` (a path, or a path with query) with ``answer``."""
        self.routes[path] = answer

    @property
    def base(self) -> str:
        """``http://host:port``."""
        return f"http://{self.host}:{self.port}"

    def url(self, path: str = "/") -> str:
        """Absolute URL of ``path`` on this server."""
        return self.base + path

    @property
    def key(self) -> str:
        """The budget/ledger host key ``host:port``."""
        return f"{self.host}:{self.port}"

    def targets(self) -> list[str]:
        """Request targets (path and query) so far, in arrival order."""
        with self._lock:
            return [h.path for h in self.hits]

    def paths(self) -> list[str]:
        """Paths (query left off) requested so far, in arrival order."""
        return [t.split("?", 1)[0] for t in self.targets()]

    def hits_for(self, target: str) -> list[Hit]:
        """Requests for ``target`` (exact, query included)."""
        with self._lock:
            return [h for h in self.hits if h.path == target]

    def clear(self) -> None:
        """Forget the request log."""
        with self._lock:
            self.hits.clear()

    def close(self) -> None:
        """Stop serving and free the port."""
        self.server.shutdown()
        self.server.server_close()

    def __enter__(self) -> LoopbackServer:
        return self

    def __exit__(self, exc_type: type[BaseException] | None, exc: BaseException | None,
                 tb: TracebackType | None) -> None:
        self.close()
