"""Test support for the source adapters: a loopback HTTP server, a minimal real page fetcher built
on requests, and an in-memory fake fetcher; plus checks that these helpers behave."""

from __future__ import annotations

import json
import threading
from collections.abc import Callable, Iterator, Mapping
from contextlib import contextmanager
from dataclasses import dataclass, field
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer
from typing import Any
from urllib.parse import parse_qsl, urlencode, urlsplit

import requests

import sources
from collector.schema import expand_env
from sources import SourceNote

# A route answers (status, headers, body) for a parsed query.
Answer = tuple[int, dict[str, str], bytes]
Route = Callable[[dict[str, str]], Answer]


def json_answer(data: Any, status: int = 200, headers: Mapping[str, str] | None = None) -> Answer:
    """A JSON answer for a route."""
    body = json.dumps(data).encode()
    return status, {"Content-Type": "application/json", **(headers or {})}, body


def html_answer(text: str, status: int = 200) -> Answer:
    """An HTML answer for a route."""
    return status, {"Content-Type": "text/html; charset=utf-8"}, text.encode("utf-8")


class LoopbackServer:
    """A real HTTP/1.1 server on 127.0.0.1 (ephemeral port) serving routes from memory."""

    def __init__(self) -> None:
        self.routes: dict[str, Route] = {}
        self.log: list[str] = []  # request targets (path?query) in arrival order
        server = self

        class Handler(BaseHTTPRequestHandler):
            def do_GET(self) -> None:
                parts = urlsplit(self.path)
                server.log.append(self.path)
                route = server.routes.get(parts.path)
                if route is None:
                    status, headers, body = 404, {"Content-Type": "text/plain"}, b"not found"
                else:
                    status, headers, body = route(dict(parse_qsl(parts.query)))
                self.send_response(status)
                for k, v in headers.items():
                    self.send_header(k, v)
                self.send_header("Content-Length", str(len(body)))
                self.end_headers()
                self.wfile.write(body)

            def log_message(self, format: str, *args: Any) -> None:
                pass

        self.httpd = ThreadingHTTPServer(("127.0.0.1", 0), Handler)
        self.port = self.httpd.server_address[1]
        self.base = f"http://127.0.0.1:{self.port}"
        self.thread = threading.Thread(target=self.httpd.serve_forever,
                                       kwargs={"poll_interval": 0.05}, daemon=True)

    def route(self, path: str, func: Route) -> None:
        """Serve path with func."""
        self.routes[path] = func

    def paths(self) -> list[str]:
        """Paths (without query) requested so far."""
        return [urlsplit(p).path for p in self.log]


@contextmanager
def serve() -> Iterator[LoopbackServer]:
    """Run a LoopbackServer for the duration of a with-block."""
    srv = LoopbackServer()
    srv.thread.start()
    try:
        yield srv
    finally:
        srv.httpd.shutdown()
        srv.httpd.server_close()


@dataclass
class SimplePage:
    """A Page as the adapters see it."""

    url: str
    status: int
    headers: Mapping[str, str]
    body: bytes
    links: dict[str, str] = field(default_factory=dict)

    @property
    def text(self) -> str:
        """Body decoded as UTF-8."""
        return self.body.decode("utf-8", "replace")

    def json(self) -> Any:
        """Body parsed as JSON (ValueError when it is not)."""
        return json.loads(self.body)


@dataclass
class Call:
    """One get_page call as received by a test fetcher."""

    url: str
    purpose: str
    params: dict[str, str] | None
    secret_params: tuple[str, ...]


class RequestsFetcher:
    """A minimal real PageFetcher for tests: requests.get wrapped into a Page (loopback only)."""

    def __init__(self) -> None:
        self.calls: list[Call] = []
        self.session = requests.Session()

    def get_page(self, url: str, *, purpose: str = "listing", item_id: int | None = None,
                 params: Mapping[str, str] | None = None, headers: Mapping[str, str] | None = None,
                 secret_params: Any = ()) -> SimplePage:
        """GET url (must be loopback) and wrap the answer."""
        assert (urlsplit(url).hostname or "").startswith("127."), url
        self.calls.append(Call(url, purpose, dict(params) if params else None,
                               tuple(secret_params)))
        # Like collector.fetcher, fill "${NAME}" references just before sending.
        params = {k: expand_env(v, strict=True) for k, v in (params or {}).items()} or None
        headers = {k: expand_env(v, strict=True) for k, v in (headers or {}).items()}
        r = self.session.get(url, params=params, headers=headers, timeout=10)
        links = {rel: v["url"] for rel, v in r.links.items()}
        return SimplePage(r.url, r.status_code, r.headers, r.content, links)


class FakeFetcher:
    """An in-memory PageFetcher: answers keyed by full URL (query sorted)."""

    def __init__(self, pages: Mapping[str, Answer]) -> None:
        self.pages = {self.key(k): v for k, v in pages.items()}
        self.calls: list[Call] = []

    @staticmethod
    def key(url: str, params: Mapping[str, str] | None = None) -> str:
        """Canonical form of a URL plus params."""
        parts = urlsplit(url)
        query = sorted(parse_qsl(parts.query) + list((params or {}).items()))
        return parts._replace(query=urlencode(query)).geturl()

    def get_page(self, url: str, *, purpose: str = "listing", item_id: int | None = None,
                 params: Mapping[str, str] | None = None, headers: Mapping[str, str] | None = None,
                 secret_params: Any = ()) -> SimplePage:
        """Answer from memory; unknown URLs get a 404."""
        self.calls.append(Call(url, purpose, dict(params) if params else None,
                               tuple(secret_params)))
        full = self.key(url, params)
        status, headers_out, body = self.pages.get(full, (404, {}, b"not found"))
        return SimplePage(full, status, headers_out, body)


def collect(source: dict[str, Any], fetcher: Any, base_dir: Any = ".",
            ) -> tuple[list[sources.Candidate], list[SourceNote]]:
    """Run iter_candidates to the end; return candidates and notes."""
    from pathlib import Path

    notes: list[SourceNote] = []
    cands = list(sources.iter_candidates(source, fetcher, notes.append, Path(base_dir)))
    return cands, notes


def test_loopback_server_serves_routes_and_logs_requests() -> None:
    """The test server answers a configured route on 127.0.0.1 and logs the request target."""
    with serve() as srv:
        srv.route("/x", lambda q: json_answer({"q": q}))
        page = RequestsFetcher().get_page(f"{srv.base}/x", params={"a": "1"})
        assert page.json() == {"q": {"a": "1"}}
        assert srv.log == ["/x?a=1"]


def test_requests_fetcher_exposes_rfc8288_link_header_as_links() -> None:
    """The test fetcher maps a Link header's rel="next" to page.links, unresolved (RFC 8288 §3)."""
    with serve() as srv:
        srv.route("/p", lambda q: json_answer([], headers={"Link": '</p?page=2>; rel="next"'}))
        page = RequestsFetcher().get_page(f"{srv.base}/p")
        assert page.links == {"next": "/p?page=2"}
