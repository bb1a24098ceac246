"""The demo server: one object, four loopback hosts, strict like a real archive.

Standard library only. One ``ThreadingHTTPServer`` per address 127.0.0.1-4, all on the
same port; each address is one host with its own robots.txt and role (see
``demo_site.builder.HOST_ROLES``). Every host enforces a request rate with a token
bucket and answers 429 with Retry-After when a client goes faster (RFC 6585 §4,
RFC 9110 §10.2.3); a scheduled 503 "maintenance" and slow paths are configurable.
Every request is logged with a server-side ``time.monotonic()`` start time.
"""

from __future__ import annotations

import base64
import binascii
import hashlib
import json
import math
import sys
import threading
import time
from collections.abc import Mapping
from dataclasses import asdict, dataclass, field
from datetime import UTC, datetime
from email.utils import format_datetime, parsedate_to_datetime
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer
from pathlib import Path
from types import TracebackType
from typing import Any, cast
from urllib.parse import parse_qs, urlsplit

from collector.demo_site.hosts import DEFAULT_RATE, HOSTS
from collector.demo_site.oai import Repository
from collector.demo_site.oai_content import OAI_MISBEHAVIOURS

TEXT = "text/plain; charset=utf-8"
HTML = "text/html; charset=utf-8"
JSON = "application/json"
DEFAULT_SLOW: dict[str, float] = {"/media/slow/": 0.4}
# The demo run turns on one scheduled maintenance window on the cursor API.
DEMO_OPTIONS: dict[str, Any] = {"maintenance": {"/api/v2/objects": 1}}


@dataclass(frozen=True)
class RequestRecord:
    """One request as the server saw it (times are the server's time.monotonic())."""

    t: float
    t_end: float
    client: str
    host: str
    host_index: int
    method: str
    path: str
    status: int
    bytes: int
    user_agent: str | None
    host_header: str | None
    if_none_match: str | None = None  # the conditional request's validators (RFC 9110 §13.1)
    if_modified_since: str | None = None

    def to_json(self) -> dict[str, Any]:
        return asdict(self)


@dataclass
class Reply:
    """A response before it is written: status, headers and body."""

    status: int
    body: bytes = b""
    headers: list[tuple[str, str]] = field(default_factory=list)

    @classmethod
    def text(cls, status: int, text: str, ctype: str = TEXT) -> Reply:
        return cls(status, text.encode("utf-8"), [("Content-Type", ctype)])

    @classmethod
    def json(cls, status: int, obj: Any, port: int) -> Reply:
        body = json.dumps(obj, ensure_ascii=False, indent=1).replace("{port}", str(port))
        return cls(status, body.encode("utf-8"), [("Content-Type", JSON)])


class TokenBucket:
    """``rate`` tokens per second, at most ``burst`` stored; a request takes one token."""

    def __init__(self, rate: float, burst: float, clock: Any = time.monotonic) -> None:
        self.rate, self.burst, self.clock = rate, burst, clock
        self.tokens, self.stamp = burst, clock()
        self.lock = threading.Lock()

    def take(self) -> float:
        """Take a token; return 0.0, or the seconds until one is available (none taken)."""
        with self.lock:
            now = self.clock()
            self.tokens = min(self.burst, self.tokens + (now - self.stamp) * self.rate)
            self.stamp = now
            if self.tokens >= 1.0:
                self.tokens -= 1.0
                return 0.0
            return (1.0 - self.tokens) / self.rate


def http_date(epoch: float) -> str:
    """IMF-fixdate (RFC 9110 §5.6.7), e.g. ``Sun, 06 Nov 1994 08:49:37 GMT``."""
    return format_datetime(datetime.fromtimestamp(int(epoch), UTC), usegmt=True)


def _encode_cursor(offset: int) -> str:
    return base64.urlsafe_b64encode(f"o{offset}".encode()).decode().rstrip("=")


def _decode_cursor(cursor: str) -> int:
    raw = base64.urlsafe_b64decode(cursor + "=" * (-len(cursor) % 4)).decode()
    if not raw.startswith("o"):
        raise ValueError(cursor)
    return int(raw[1:])


def _int_param(query: dict[str, list[str]], name: str, default: int, lo: int, hi: int) -> int:
    values = query.get(name)
    if not values:
        return default
    value = int(values[0])  # ValueError is answered with 400 by the caller
    if not lo <= value <= hi:
        raise ValueError(f"{name} must be between {lo} and {hi}")
    return value


class Site:
    """Pure routing over generated content: (host, method, target, headers) -> Reply."""

    def __init__(self, content_dir: Path, port: int) -> None:
        self.content_dir = Path(content_dir)
        self.port = port
        self.site = json.loads((self.content_dir / "site.json").read_text())
        self.routes: dict[int, dict[str, Any]] = {
            int(h): r for h, r in self.site["routes"].items()}
        self.hosts: dict[int, Any] = {int(h): v for h, v in self.site["hosts"].items()}
        self.apis = self.site["apis"]
        oai = self.apis.get("oai")
        self.oai = None if oai is None else Repository.from_json(
            oai, self.base(oai["host"]) + oai["path"], port)
        self.arm()

    def arm(self) -> None:
        """Arm the OAI-PMH feed's one-off misbehaviours again (an expired token, a 503)."""
        if self.oai is not None:
            self.oai.arm(expire_token=bool(OAI_MISBEHAVIOURS["expire_token"]),
                         unavailable=int(OAI_MISBEHAVIOURS["unavailable"]))

    def base(self, host: int) -> str:
        return f"http://{HOSTS[host]}:{self.port}"

    def respond(self, host: int, method: str, target: str,
                headers: Mapping[str, str] | None = None) -> Reply:
        headers = headers or {}
        parts = urlsplit(target)
        path, query = parts.path, parse_qs(parts.query)
        if path == "/robots.txt":
            return self._robots(host)
        route = self.routes.get(host, {}).get(path)
        if route is not None:
            return self._route(route, headers)
        try:
            reply = self._api(host, path, query)
        except (ValueError, binascii.Error) as exc:
            return Reply.json(400, {"error": f"bad request: {exc}"}, self.port)
        if reply is not None:
            return reply
        return Reply.text(404, "<!DOCTYPE html><title>Not found</title><h1>Not found</h1>",
                          HTML)

    def _robots(self, host: int) -> Reply:
        robots = self.hosts[host]["robots"]
        status = robots["status"]
        if status == 200:
            return Reply.text(200, robots["body"])
        if status in (301, 302, 307, 308):
            return Reply(status, b"", [("Location", robots["location"]),
                                       ("Content-Type", TEXT)])
        if status == 404:
            return Reply.text(404, "no robots.txt here\n")
        return Reply.text(status, "robots.txt temporarily unavailable\n")

    def _route(self, route: dict[str, Any], headers: Mapping[str, str]) -> Reply:
        kind = route["kind"]
        if kind == "redirect":
            location = route["location"].replace("{port}", str(self.port))
            return Reply(route["status"], f'<a href="{location}">moved</a>\n'.encode(),
                         [("Location", location), ("Content-Type", HTML)])
        if kind == "missing":
            return Reply.text(404, "<!DOCTYPE html><title>Not found</title>", HTML)
        body = (self.content_dir / route["file"]).read_bytes()
        if route.get("template"):
            body = body.replace(b"{port}", str(self.port).encode())
        etag = '"' + (route["sha256"] if not route.get("template") else
                      hashlib.sha256(body).hexdigest())[:24] + '"'
        last_modified = self.site["last_modified"]
        common = [("ETag", etag), ("Last-Modified", last_modified),
                  ("Cache-Control", "max-age=3600")]
        if _not_modified(headers, etag, last_modified):
            return Reply(304, b"", common)
        extra = [(str(k), str(v)) for k, v in route.get("headers", [])]
        return Reply(200, body, [("Content-Type", route["content_type"]), *common, *extra])

    def _api(self, host: int, path: str, query: dict[str, list[str]]) -> Reply | None:
        for name, api in self.apis.items():
            if api["host"] != host:
                continue
            if path == api["path"]:
                return getattr(self, f"_list_{name}")(api, query)
            prefix = api["path"] + "/"
            if path.startswith(prefix) and "details" in api:
                detail = api["details"].get(path[len(prefix):])
                if detail is None:
                    return Reply.json(404, {"error": "no such record"}, self.port)
                return Reply.json(200, detail, self.port)
        return None

    def _list_oai(self, api: dict[str, Any], query: dict[str, list[str]]) -> Reply:
        assert self.oai is not None
        status, body, headers = self.oai.respond({k: v[-1] for k, v in query.items()})
        return Reply(status, body, list(headers.items()))

    def _list_v1(self, api: dict[str, Any], query: dict[str, list[str]]) -> Reply:
        page = _int_param(query, "page", 1, 1, 10_000)
        per_page = _int_param(query, "per_page", api["per_page"], 1, 50)
        records = api["records"]
        chunk = records[(page - 1) * per_page: page * per_page]
        return Reply.json(200, {"results": chunk, "meta": {
            "total": len(records), "page": page, "per_page": per_page}}, self.port)

    def _list_v2(self, api: dict[str, Any], query: dict[str, list[str]]) -> Reply:
        cursor = query.get("cursor", [""])[0]
        offset = _decode_cursor(cursor) if cursor else 0
        limit = _int_param(query, "limit", api["page_size"], 1, 25)
        records = api["records"]
        chunk = records[offset: offset + limit]
        nxt = _encode_cursor(offset + limit) if offset + limit < len(records) else None
        return Reply.json(200, {"data": {"items": chunk}, "paging": {"next_cursor": nxt}},
                          self.port)

    def _list_v3(self, api: dict[str, Any], query: dict[str, list[str]]) -> Reply:
        size = api["page_size"]
        records = api["records"]
        last = max(1, math.ceil(len(records) / size))
        page = _int_param(query, "page", 1, 1, last)
        reply = Reply.json(200, {"finds": records[(page - 1) * size: page * size]}, self.port)
        link = f"{self.base(api['host'])}{api['path']}?page="
        # RFC 8288 §3: Link: <URI-Reference>; rel="next", ...
        rels = [f'<{link}1>; rel="first"', f'<{link}{last}>; rel="last"']
        if page < last:
            rels.insert(0, f'<{link}{page + 1}>; rel="next"')
        if page > 1:
            rels.insert(0, f'<{link}{page - 1}>; rel="prev"')
        reply.headers.append(("Link", ", ".join(rels)))
        return reply


def _not_modified(headers: Mapping[str, str], etag: str, last_modified: str) -> bool:
    """Conditional GET per RFC 9110 §13.1.2-13.1.3 (If-None-Match takes precedence)."""
    inm = headers.get("If-None-Match")
    if inm is not None:
        if inm.strip() == "*":
            return True
        # weak comparison: W/ prefixes are ignored
        tags = [t.strip().removeprefix("W/") for t in inm.split(",")]
        return etag.removeprefix("W/") in tags
    ims = headers.get("If-Modified-Since")
    if ims:
        try:
            return parsedate_to_datetime(ims) >= parsedate_to_datetime(last_modified)
        except (TypeError, ValueError):
            return False  # an invalid date is ignored (RFC 9110 §13.1.3)
    return False


class _HostServer(ThreadingHTTPServer):
    daemon_threads = True

    def __init__(self, address: tuple[str, int], demo: DemoServer, host_index: int) -> None:
        self.demo = demo
        self.host_index = host_index
        super().__init__(address, _Handler)

    def handle_error(self, request: Any, client_address: Any) -> None:
        """A client that hangs up early (it refused an oversized body) is normal here."""
        if isinstance(sys.exc_info()[1], ConnectionError):
            return
        super().handle_error(request, client_address)


class _Handler(BaseHTTPRequestHandler):
    protocol_version = "HTTP/1.1"
    # Headers and body go out in separate writes: without TCP_NODELAY the body waits for
    # the client's delayed ACK (about 40 ms on Linux) on every answer.
    disable_nagle_algorithm = True
    server_version = "FernhollowArchive/1"
    timeout = 5  # idle keep-alive connections end after this many seconds
    server: _HostServer

    def do_GET(self) -> None:
        self.server.demo._handle(self, "GET")

    def do_HEAD(self) -> None:
        self.server.demo._handle(self, "HEAD")

    def log_message(self, format: str, *args: Any) -> None:
        pass  # the DemoServer keeps its own structured log


class DemoServer:
    """Four loopback hosts on one port serving the generated archive.

    Options: ``rate`` (requests/s per host; a number or {host_index: rate}; 0 = no
    limit), ``burst`` (bucket size, default max(1, rate/2)), ``retry_after`` (fixed
    Retry-After seconds for 429, default: time until the next token, at least 1),
    ``maintenance`` ({path prefix: number of first hits answered 503}),
    ``maintenance_retry_after`` (seconds), ``slow`` ({path prefix: delay seconds}),
    ``log_path`` (JSONL request log).
    """

    def __init__(self, content_dir: Path, *, port: int = 0,
                 rate: float | Mapping[int, float] = DEFAULT_RATE,
                 burst: float | None = None, retry_after: int | None = None,
                 maintenance: Mapping[str, int] | None = None,
                 maintenance_retry_after: int = 1,
                 slow: Mapping[str, float] | None = None,
                 log_path: Path | None = None) -> None:
        self.content_dir = Path(content_dir)
        self.manifest = json.loads((self.content_dir / "manifest.json").read_text())
        self._want_port = port
        self.rates = {h: float(rate.get(h, DEFAULT_RATE) if isinstance(rate, Mapping)
                               else rate) for h in HOSTS}
        self.burst = burst
        self.retry_after = retry_after
        self.maintenance = dict(maintenance or {})
        self.maintenance_retry_after = maintenance_retry_after
        self.slow = dict(DEFAULT_SLOW if slow is None else slow)
        self.log_path = Path(log_path) if log_path else None
        self.port = 0
        self.site: Site | None = None
        self._servers: list[_HostServer] = []
        self._threads: list[threading.Thread] = []
        self._lock = threading.Lock()
        self._log: list[RequestRecord] = []
        self._log_file: Any = None
        self.reset()

    # -- lifecycle --
    def start(self) -> DemoServer:
        """Bind all four hosts on one (ephemeral unless given) port and start serving."""
        for _attempt in range(20):
            servers: list[_HostServer] = []
            try:
                first = _HostServer((HOSTS[1], self._want_port), self, 1)
                servers.append(first)
                port = first.server_address[1]
                for h in sorted(HOSTS)[1:]:
                    servers.append(_HostServer((HOSTS[h], port), self, h))
            except OSError:
                for s in servers:
                    s.server_close()
                if self._want_port:
                    raise
                continue
            break
        else:
            raise OSError("no free port shared by 127.0.0.1-127.0.0.4 after 20 tries")
        self.port = port
        self.site = Site(self.content_dir, port)
        self._servers = servers
        if self.log_path:
            self.log_path.parent.mkdir(parents=True, exist_ok=True)
            self._log_file = self.log_path.open("a", encoding="utf-8")
        for s in servers:
            t = threading.Thread(target=s.serve_forever, kwargs={"poll_interval": 0.1},
                                 name=f"demo-{s.host_index}", daemon=True)
            t.start()
            self._threads.append(t)
        return self

    def stop(self) -> None:
        """Stop every host and close the log file."""
        for s in self._servers:
            s.shutdown()
            s.server_close()
        self._servers, self._threads = [], []
        if self._log_file:
            self._log_file.close()
            self._log_file = None

    def __enter__(self) -> DemoServer:
        return self if self._servers else self.start()

    def __exit__(self, exc_type: type[BaseException] | None, exc: BaseException | None,
                 tb: TracebackType | None) -> None:
        self.stop()

    # -- the archive months later (re-check tests) --
    def change_archive(self, **changes: Any) -> Any:
        """Change some objects in memory (:func:`collector.demo_site.changes.change_archive`);
        ``restore_archive`` undoes it."""
        from collector.demo_site.changes import change_archive

        assert self.site is not None, "start the server first"
        return change_archive(self.site, **changes)

    def restore_archive(self) -> None:
        """Serve the archive as generated again."""
        if self.site is not None:
            self.site = Site(self.content_dir, self.port)

    # -- addresses --
    def base_url(self, host_index: int) -> str:
        """``http://127.0.0.N:PORT`` for host 1-4."""
        return f"http://{HOSTS[host_index]}:{self.port}"

    def url(self, host_index: int, path: str) -> str:
        return self.base_url(host_index) + path

    def fill(self, template: str) -> str:
        """Replace ``{port}`` in a manifest URL with this server's port."""
        return template.replace("{port}", str(self.port))

    # -- log --
    @property
    def log(self) -> list[RequestRecord]:
        """A copy of the request log so far."""
        with self._lock:
            return list(self._log)

    def clear_log(self) -> None:
        with self._lock:
            self._log.clear()

    def reset(self) -> None:
        """Clear the log, refill every rate bucket and re-arm the maintenance windows."""
        with self._lock:
            self._log.clear()
            self._buckets = {h: TokenBucket(r, self.burst or max(1.0, r / 2))
                             for h, r in self.rates.items() if r > 0}
            self._maintenance_left = dict(self.maintenance)
            if self.site is not None:
                self.site.arm()

    # -- request handling --
    def _handle(self, req: _Handler, method: str) -> None:
        t0 = time.monotonic()
        host = req.server.host_index
        reply = self._gate(host, req.path)
        if reply is None:
            delay = next((d for p, d in self.slow.items() if req.path.startswith(p)), 0.0)
            if delay:
                time.sleep(delay)
            assert self.site is not None
            # The request's headers (an email.message.Message) answer get() like a mapping.
            reply = self.site.respond(host, method, req.path,
                                      cast(Mapping[str, str], req.headers))
        # The record is logged before the reply is written, so a client that has read
        # the reply always finds its request in the log; "bytes" is the body length sent.
        sent = 0 if method == "HEAD" or reply.status == 304 else len(reply.body)
        rec = RequestRecord(t=t0, t_end=time.monotonic(), client=req.client_address[0],
                            host=HOSTS[host], host_index=host, method=method, path=req.path,
                            status=reply.status, bytes=sent,
                            user_agent=req.headers.get("User-Agent"),
                            host_header=req.headers.get("Host"),
                            if_none_match=req.headers.get("If-None-Match"),
                            if_modified_since=req.headers.get("If-Modified-Since"))
        with self._lock:
            self._log.append(rec)
            if self._log_file:
                self._log_file.write(json.dumps(rec.to_json()) + "\n")
                self._log_file.flush()
        try:
            req.send_response(reply.status)
            for k, v in reply.headers:
                req.send_header(k, v)
            req.send_header("Content-Length", str(len(reply.body)))
            req.end_headers()
            if sent:
                req.wfile.write(reply.body)
        except (BrokenPipeError, ConnectionResetError):
            req.close_connection = True

    def _gate(self, host: int, target: str) -> Reply | None:
        """Rate limit (429) and scheduled maintenance (503), before routing."""
        bucket = self._buckets.get(host)
        if bucket is not None:
            wait = bucket.take()
            if wait > 0:
                seconds = self.retry_after or max(1, math.ceil(wait))
                form = self.manifest["hosts"][str(host)]["retry_after_form"]
                # RFC 9110 §10.2.3: delay-seconds or HTTP-date; the date is rounded up a
                # second because IMF-fixdate has whole seconds only
                value = (str(seconds) if form == "seconds"
                         else http_date(time.time() + seconds + 1))
                reply = Reply.text(429, f"Too many requests: this host allows "
                                        f"{self.rates[host]:g} requests per second.\n")
                reply.headers.append(("Retry-After", value))
                return reply
        path = urlsplit(target).path
        with self._lock:
            for prefix, left in self._maintenance_left.items():
                if left > 0 and path.startswith(prefix):
                    self._maintenance_left[prefix] = left - 1
                    reply = Reply.text(503, "Down for scheduled maintenance.\n")
                    reply.headers.append(("Retry-After", str(self.maintenance_retry_after)))
                    return reply
        return None


def start(content_dir: Path | None = None, **options: Any) -> DemoServer:
    """Start a demo server on generated content (generated into the cache if None)."""
    if content_dir is None:
        from collector.demo_site.generate import ensure_content

        content_dir = ensure_content()
    elif not (Path(content_dir) / "manifest.json").exists():
        from collector.demo_site.generate import generate

        generate(Path(content_dir))
    return DemoServer(Path(content_dir), **options).start()
