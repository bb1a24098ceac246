"""The transport's own keep-alive cache and body decoding (collector.fetching.transport over
http.client): connections the server closed, the cache's bounds, gzip and deflate decoded
as the standard library decodes them, bombs and short bodies refused.

Every test talks to a real loopback server (collector.demo_site.loopback). Whether a
connection was reused is read from the server's side: the client port of each request, and
the connections the server saw end.
"""

from __future__ import annotations

import gzip
import random
import threading
import time
import tracemalloc
import zlib
from collections.abc import Callable, Iterator
from dataclasses import replace
from pathlib import Path

import pytest
import urllib3
from support.server import LoopbackServer, send

from collector.demo_site.loopback import Answer, Handler
from collector.errors import DownloadTimeout, FetchError, TooLarge
from collector.fetching.fetcher import Fetcher, FetchSettings
from collector.fetching.http_target import transport_target
from collector.fetching.transport import (
    DEFAULT_HEADERS,
    DRAIN_MAX,
    DRAIN_SECONDS,
    Transport,
    TransportError,
)

HEADERS = {"User-Agent": "collector/test (+curator@example.org)", "Accept-Encoding": "gzip"}
# Compressible but not trivial: random runs between long repeats (seeded, so every run the same).
_RNG = random.Random(20261205)
DATA = b"".join(_RNG.randbytes(40) + bytes([_RNG.randrange(256)]) * _RNG.randrange(3000)
                for _ in range(200))


@pytest.fixture
def server() -> Iterator[LoopbackServer]:
    with LoopbackServer("127.0.0.1") as loopback:
        loopback.fallback = (200, b"{}")
        yield loopback


@pytest.fixture
def transport() -> Iterator[Transport]:
    sender = Transport(pools=4)
    yield sender
    sender.close()


class _Closes:
    """Counts the connections ``server`` has closed on its side (after their last answer)."""

    def __init__(self, server: LoopbackServer) -> None:
        self.count = 0
        self._seen = threading.Condition()
        closing = server.server.shutdown_request

        def closed(request: object) -> None:
            closing(request)
            with self._seen:
                self.count += 1
                self._seen.notify_all()

        server.server.shutdown_request = closed  # type: ignore[method-assign]

    def wait_for(self, n: int) -> bool:
        """True once ``n`` connections have been closed (False after 5 s)."""
        with self._seen:
            return self._seen.wait_for(lambda: self.count >= n, 5.0)


def _noting(ports: list[int], answer: Answer = (200, b"{}")) -> Callable[[Handler], Answer]:
    def note(h: Handler) -> Answer:
        ports.append(h.client_address[1])
        return answer
    return note


def _get(transport: Transport, url: str, n: int = 65536) -> tuple[int, bytes, int]:
    """Status, decoded body and the largest piece one read1(n) gave."""
    with transport.get(transport_target(url), HEADERS, connect_timeout=5.0,
                       read_timeout=10.0) as answer:
        pieces = []
        while piece := answer.read1(n):
            pieces.append(piece)
        return answer.status_code, b"".join(pieces), max(map(len, pieces), default=0)


# -- the request on the wire ---------------------------------------------------------------
@pytest.mark.parametrize("pinned", [False, True])
def test_headers_arrive_in_the_order_urllib3_sent_them(transport: Transport,
                                                       pinned: bool) -> None:
    """Header names and values in the order urllib3's pool sent them when it was given the
    same headers (the transport's previous sender; test_transport.py compares the set of
    headers with requests'): Host first when connecting to the host named, last when
    connecting to a checked address for a name."""
    with LoopbackServer("127.0.0.2") as site:
        host = "localhost" if pinned else site.host
        target = transport_target(f"http://{host}:{site.port}/order?x=1")
        if pinned:
            target = replace(target, addresses=(site.host,))
        with transport.get(target, {**HEADERS, "X-Extra": "yes"}, connect_timeout=5.0,
                           read_timeout=10.0) as answer:
            answer.read()
        sent = {**DEFAULT_HEADERS, **HEADERS, "X-Extra": "yes"}
        if pinned:
            sent["Host"] = f"localhost:{site.port}"
        with urllib3.HTTPConnectionPool(site.host, site.port) as pool:
            pool.urlopen("GET", "/order?x=1", headers=sent, retries=False)
        ours, reference = site.hits
    assert list(ours.headers.items()) == list(reference.headers.items())
    assert ours.path == reference.path


# -- keep-alive: connections the server closed ----------------------------------------------
@pytest.mark.parametrize("last_words", [b"", b"HTTP/1.1 408 Request Timeout\r\n"
                                                b"Content-Length: 0\r\nConnection: close\r\n\r\n"])
def test_a_connection_the_server_closed_while_idle_is_not_used(
        server: LoopbackServer, transport: Transport, last_words: bytes) -> None:
    """The server closes a kept connection after its answer (RFC 9112 §9.6: a server may close
    an idle connection at any time), perhaps saying 408 first, unasked (RFC 9110 §15.5.9): the
    next request goes out once, on a new connection, and the 408 is never taken for its
    answer (the idle connection is seen readable before it is used, as urllib3 checks)."""
    closes, ports, asked = _Closes(server), [], threading.Event()

    def answer_then_close(h: Handler) -> None:
        ports.append(h.client_address[1])
        send(h, 200, b"bye")
        asked.wait(5.0)  # the client has read the answer: anything now arrives unasked
        h.wfile.write(last_words)
        h.close_connection = True  # closed after this answer, without saying so beforehand

    server.route("/bye", answer_then_close)
    server.route("/next", _noting(ports))
    assert _get(transport, server.url("/bye"))[:2] == (200, b"bye")
    asked.set()
    assert closes.wait_for(1)
    assert _get(transport, server.url("/next"))[:2] == (200, b"{}")
    assert server.paths() == ["/bye", "/next"]  # exactly one request for /next
    assert ports[0] != ports[1]


def test_a_request_the_server_dropped_on_a_kept_connection_is_sent_once_more(
        server: LoopbackServer, transport: Transport) -> None:
    """The server closes a kept connection as the request arrives, answering nothing: the GET
    (idempotent, RFC 9110 §9.2.2; RFC 9112 §9.3.1 lets a client retry it) goes out again on a
    new connection and its answer is returned."""
    ports: list[int] = []

    def drop_the_first(h: Handler) -> Answer | None:
        ports.append(h.client_address[1])
        if len(ports) == 2:  # the first /flaky, on the kept connection
            h.close_connection = True
            return None  # nothing written: the client reads the end of the connection
        return (200, b"again")

    server.route("/kept", drop_the_first)
    server.route("/flaky", drop_the_first)
    assert _get(transport, server.url("/kept"))[:2] == (200, b"again")
    assert _get(transport, server.url("/flaky"))[:2] == (200, b"again")
    assert server.paths() == ["/kept", "/flaky", "/flaky"]
    assert ports[0] == ports[1] != ports[2]  # dropped on the kept one, answered on a new one


def test_a_request_dropped_again_on_the_new_connection_fails(server: LoopbackServer,
                                                             transport: Transport) -> None:
    """Sent once more, never twice more: a server that drops every request gets it twice
    (kept connection, then a new one) and the transport raises TransportError."""
    def drop(h: Handler) -> None:
        h.close_connection = True

    server.route("/never", drop)
    _get(transport, server.url("/kept"))
    with pytest.raises(TransportError) as err:
        _get(transport, server.url("/never"))
    assert "RemoteDisconnected" in str(err.value)
    assert server.paths() == ["/kept", "/never", "/never"]


# -- the cache's bounds ------------------------------------------------------------------------
def test_the_least_recently_used_host_is_closed_beyond_the_bound() -> None:
    """Transport(pools=2) and three hosts asked in turn: the first one's connection is closed
    (its server sees it end) and asking it again opens a new one; the others are reused."""
    with (LoopbackServer() as a, LoopbackServer() as b, LoopbackServer() as c):
        ports: dict[str, list[int]] = {"a": [], "b": [], "c": []}
        closes = {}
        for name, site in (("a", a), ("b", b), ("c", c)):
            site.fallback = _noting(ports[name])
            closes[name] = _Closes(site)
        sender = Transport(pools=2)
        try:
            for site in (a, b, c):
                _get(sender, site.url("/x"))
            assert closes["a"].wait_for(1)
            assert closes["b"].count == closes["c"].count == 0
            _get(sender, b.url("/y"))
            _get(sender, a.url("/y"))
        finally:
            sender.close()
        assert ports["b"][0] == ports["b"][1]  # kept
        assert ports["a"][0] != ports["a"][1]  # closed for the bound, a new connection


def test_no_more_than_per_pool_idle_connections_are_kept_for_a_host(
        server: LoopbackServer) -> None:
    """Two answers from one host open at once, both read to their end, with per_pool=1: the
    first closed is kept, the second closed for the bound (the server sees one end)."""
    ports: list[int] = []
    server.fallback = _noting(ports)
    closes = _Closes(server)
    sender = Transport(pools=4, per_pool=1)
    target = transport_target(server.url("/x"))
    try:
        first = sender.get(target, HEADERS, connect_timeout=5.0, read_timeout=10.0)
        second = sender.get(target, HEADERS, connect_timeout=5.0, read_timeout=10.0)
        assert first.read() == second.read() == b"{}"
        first.close()
        second.close()
        assert closes.wait_for(1)
        _get(sender, server.url("/y"))
        assert closes.count == 1  # the kept one is still open
    finally:
        sender.close()
    assert ports[0] != ports[1]
    assert ports[2] == ports[0]
    assert closes.wait_for(2)  # the kept one, closed by sender.close()


def test_threads_sharing_the_cache_each_get_their_own_answers() -> None:
    """Six threads, three hosts, a cache bound that keeps evicting (pools=2, per_pool=1):
    every answer is the one asked for (common practice, no source)."""
    with (LoopbackServer() as a, LoopbackServer() as b, LoopbackServer() as c):
        for site in (a, b, c):
            site.fallback = lambda h: (200, h.path.encode())
        sender = Transport(pools=2, per_pool=1)
        wrong: list[str] = []

        def ask(i: int) -> None:
            for j in range(15):
                site = (a, b, c)[(i + j) % 3]
                path = f"/t{i}/{j}"
                if _get(sender, site.url(path))[:2] != (200, path.encode()):
                    wrong.append(path)

        threads = [threading.Thread(target=ask, args=(i,)) for i in range(6)]
        for t in threads:
            t.start()
        for t in threads:
            t.join()
        sender.close()
        assert wrong == []
        assert len(a.hits) + len(b.hits) + len(c.hits) == 90


# -- content codings ---------------------------------------------------------------------------
def _raw_deflate(data: bytes) -> bytes:
    packer = zlib.compressobj(9, zlib.DEFLATED, -zlib.MAX_WBITS)
    return packer.compress(data) + packer.flush()


# (Content-Encoding, the body as sent, the standard library's decoding of it). RFC 9110
# §8.4.1.2-3: "gzip" is RFC 1952 (x-gzip its alias), "deflate" a zlib stream (RFC 1950);
# bare deflate data (RFC 1951) is what some servers send as "deflate" (urllib3 took both).
CODINGS = [
    ("gzip", gzip.compress(DATA), gzip.decompress),
    ("x-gzip", gzip.compress(DATA), gzip.decompress),
    ("deflate", zlib.compress(DATA), zlib.decompress),
    ("deflate", _raw_deflate(DATA), lambda b: zlib.decompress(b, -zlib.MAX_WBITS)),
    # two gzip members one after the other (RFC 1952 §2.2): gzip.decompress reads both
    ("gzip", gzip.compress(DATA) + gzip.compress(b"second member"), gzip.decompress),
]


@pytest.mark.parametrize(("coding", "body", "reference"), CODINGS,
                         ids=["gzip", "x-gzip", "deflate-zlib", "deflate-raw", "gzip-members"])
def test_compressed_bodies_are_decoded_as_the_standard_library_decodes_them(
        server: LoopbackServer, transport: Transport, coding: str, body: bytes,
        reference: Callable[[bytes], bytes]) -> None:
    """The decoded body equals the standard library's decoding of what was sent, and no
    read1(4096) gives more than 4096 bytes however well the body compresses."""
    server.route("/c", (200, body, {"Content-Encoding": coding}))
    status, got, largest = _get(transport, server.url("/c"), n=4096)
    assert status == 200 and got == reference(body)
    assert got.startswith(DATA) and len(got) > 10 * len(body)
    assert largest == 4096


def test_a_chunked_gzip_body_is_decoded_and_its_connection_kept(
        server: LoopbackServer, transport: Transport) -> None:
    """Transfer-Encoding: chunked (RFC 9112 §7.1) around a gzip body: decoded whole, and the
    connection serves the next request."""
    packed, ports = gzip.compress(DATA), []

    def chunked(h: Handler) -> None:
        ports.append(h.client_address[1])
        h.send_response(200)
        h.send_header("Content-Encoding", "gzip")
        h.send_header("Transfer-Encoding", "chunked")
        h.end_headers()
        for i in range(0, len(packed), 1000):
            piece = packed[i:i + 1000]
            h.wfile.write(f"{len(piece):x}\r\n".encode() + piece + b"\r\n")
        h.wfile.write(b"0\r\n\r\n")

    server.route("/chunked", chunked)
    server.route("/after", _noting(ports))
    assert _get(transport, server.url("/chunked"))[:2] == (200, gzip.decompress(packed))
    _get(transport, server.url("/after"))
    assert ports[0] == ports[1]


def test_an_unknown_coding_is_passed_through_undecoded(server: LoopbackServer,
                                                       transport: Transport) -> None:
    """A coding the transport does not decode (br, RFC 7932) reaches the caller as sent."""
    server.route("/br", (200, b"\x1b\x03\x00\xf8not really brotli", {"Content-Encoding": "br"}))
    assert _get(transport, server.url("/br"))[1] == b"\x1b\x03\x00\xf8not really brotli"


# -- bombs and short bodies, through the fetcher -----------------------------------------------
def _settings(**kw: object) -> FetchSettings:
    recipe = {"contact": "curator@example.org",
              "budgets": {"min_interval": 0.0, "max_attempts": 2, "backoff_base": 0.01,
                          "backoff_max": 0.02},
              "network": {"allow_addresses": ["127.0.0.1"], "read_timeout": 5.0}}
    return FetchSettings.from_recipe(recipe, **kw)


def test_a_gzip_bomb_is_stopped_at_the_cap_without_being_decoded_whole(
        server: LoopbackServer, tmp_path: Path) -> None:
    """50 MB of zeros sent as about 50 KB of gzip, a 1 MB cap: TooLarge, no file kept, and
    the client never held more than a few MB (tracemalloc peak < 10 MB; decoded whole it
    would be 50 MB)."""
    packer = zlib.compressobj(9, zlib.DEFLATED, 16 + zlib.MAX_WBITS)
    bomb = b"".join(packer.compress(bytes(1_000_000)) for _ in range(50)) + packer.flush()
    assert len(bomb) < 100_000
    server.route("/robots.txt", (404, b""))
    server.route("/bomb.png", (200, bomb, {"Content-Encoding": "gzip"}))
    fetcher = Fetcher(_settings(max_image_bytes=1_000_000), None)
    tracemalloc.start()
    try:
        with pytest.raises(TooLarge):
            fetcher.download(server.url("/bomb.png"), tmp_path)
        peak = tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()
        fetcher.close()
    assert peak < 10_000_000
    assert list(tmp_path.iterdir()) == []


def _short(h: Handler) -> None:
    send(h, 200, b"x" * 100, {"Content-Type": "image/png"}, length=1000)
    h.close_connection = True  # 100 of the 1,000 bytes promised, then the end


def test_a_body_shorter_than_its_content_length_is_an_error_and_no_file(
        server: LoopbackServer, transport: Transport, tmp_path: Path) -> None:
    """Content-Length 1000, 100 bytes, then the connection ends: an incomplete message
    (RFC 9112 §8), never a short file. The transport raises TransportError (IncompleteRead);
    the fetcher's download fails as a connection error and leaves no file."""
    server.route("/robots.txt", (404, b""))
    server.route("/short.png", _short)
    with pytest.raises(TransportError, match="IncompleteRead"):
        _get(transport, server.url("/short.png"))
    fetcher = Fetcher(_settings(), None)
    try:
        with pytest.raises(FetchError) as err:
            fetcher.download(server.url("/short.png"), tmp_path)
    finally:
        fetcher.close()
    assert err.value.reason == "connection" and "IncompleteRead" in err.value.detail
    assert list(tmp_path.iterdir()) == []


def test_truncated_gzip_data_is_an_error(server: LoopbackServer, transport: Transport) -> None:
    """A gzip body cut short (its Content-Length honest, the member incomplete: RFC 1952
    §2.2 ends a member with CRC32 and ISIZE) is a read error, not a short body."""
    server.route("/cut", (200, gzip.compress(DATA)[:-100], {"Content-Encoding": "gzip"}))
    with pytest.raises(TransportError, match="truncated"):
        _get(transport, server.url("/cut"))


# RFC 1952 §2.3: a gzip member header (ID1 ID2, CM 8 = deflate, no flags, no time, XFL 0, OS
# 255); RFC 1951 §3.2.4: a stored block that is not the last (BFINAL 0, BTYPE 00) of length 0
# (LEN 0000, NLEN FFFF) holds no data, so a stream of them decodes to nothing for ever.
_GZIP_HEADER = b"\x1f\x8b\x08\x00\x00\x00\x00\x00\x00\xff"
_EMPTY_BLOCK = b"\x00\x00\x00\xff\xff"


def _empty_blocks(h: Handler) -> None:
    """A gzip body of empty deflate blocks, one every 0.05 s for 3 s (no length: it ends when
    the connection closes)."""
    h.send_response(200)
    h.send_header("Content-Encoding", "gzip")
    h.send_header("Connection", "close")
    h.end_headers()
    h.close_connection = True
    try:
        h.wfile.write(_GZIP_HEADER)
        for _ in range(60):
            h.wfile.write(_EMPTY_BLOCK)
            h.wfile.flush()
            time.sleep(0.05)
    except OSError:
        pass


def test_compressed_data_that_never_decodes_stops_at_the_download_deadline(
        server: LoopbackServer, tmp_path: Path) -> None:
    """Empty deflate blocks sent slowly decode to nothing, each arriving well within the read
    timeout: the download still stops at its overall deadline (1 s here; the server would go
    on for 3 s), with no file kept (libraries.md §6: a deadline over the whole body)."""
    server.route("/robots.txt", (404, b""))
    server.route("/nothing.png", _empty_blocks)
    fetcher = Fetcher(_settings(download_deadline=1.0), None)
    began = time.monotonic()
    try:
        with pytest.raises(DownloadTimeout):
            fetcher.download(server.url("/nothing.png"), tmp_path)
    finally:
        fetcher.close()
    assert time.monotonic() - began < 2.5
    assert list(tmp_path.iterdir()) == []


# -- bodies nobody reads: short ones are read and dropped, so the connection is kept ----------
def _port_noting(ports: list[int], status: int, body: bytes,
                 headers: dict[str, str] | None = None) -> Callable[[Handler], None]:
    def answer(h: Handler) -> None:
        ports.append(h.client_address[1])
        send(h, status, body, headers)
    return answer


def test_a_redirect_with_a_short_note_keeps_its_connection(server: LoopbackServer,
                                                           tmp_path: Path) -> None:
    """RFC 9110 §15.4: a redirect usually carries a short hypertext note, which the fetcher
    never reads. It is read and dropped on close, so robots.txt, the redirect and its target
    go over one connection (before: a new connection after every redirect)."""
    ports: list[int] = []
    server.route("/robots.txt", _port_noting(ports, 404, b"<p>none</p>"))
    server.route("/moved.png", _port_noting(
        ports, 302, b"<p>Found: <a href='/here.png'>here</a></p>", {"Location": "/here.png"}))
    server.route("/here.png", _port_noting(ports, 200, b"\x89PNG-ish", {"Content-Type":
                                                                          "image/png"}))
    fetcher = Fetcher(_settings(), None)
    try:
        fetched = fetcher.download(server.url("/moved.png"), tmp_path)
    finally:
        fetcher.close()
    assert fetched.status == 200 and fetched.final_url.endswith("/here.png")
    assert server.paths() == ["/robots.txt", "/moved.png", "/here.png"]
    assert len(set(ports)) == 1


@pytest.mark.parametrize(("body", "kept"), [
    (b"<p>slow down</p>", True),                                # short, its length known
    (b"x" * (DRAIN_MAX + 1), False),                             # longer than DRAIN_MAX
])
def test_an_unread_body_is_dropped_only_when_short(server: LoopbackServer, transport: Transport,
                                                   body: bytes, kept: bool) -> None:
    """A 503 whose body is never read: the next request reuses the connection when the body
    was short (read and dropped), and goes over a new one when it was not."""
    ports: list[int] = []
    server.route("/busy", _port_noting(ports, 503, body))
    server.route("/next", _noting(ports))
    with transport.get(transport_target(server.url("/busy")), HEADERS, connect_timeout=5.0,
                       read_timeout=10.0) as answer:
        assert answer.status_code == 503  # its body left unread, as the fetcher leaves it
    assert _get(transport, server.url("/next"))[:2] == (200, b"{}")
    assert (ports[0] == ports[1]) is kept


def test_a_short_body_that_does_not_come_is_not_waited_for(server: LoopbackServer,
                                                           transport: Transport) -> None:
    """A short body announced but held back: closing the answer waits DRAIN_SECONDS at most,
    then closes the connection; the next request goes over a new one."""
    ports: list[int] = []
    release = threading.Event()

    def held_back(h: Handler) -> None:
        ports.append(h.client_address[1])
        h.send_response(302)
        h.send_header("Location", "/elsewhere")
        h.send_header("Content-Length", "20")
        h.end_headers()
        h.wfile.flush()
        release.wait(10.0)
        h.close_connection = True

    server.route("/held", held_back)
    server.route("/next", _noting(ports))
    answer = transport.get(transport_target(server.url("/held")), HEADERS, connect_timeout=5.0,
                           read_timeout=10.0)
    began = time.monotonic()
    answer.close()
    waited = time.monotonic() - began
    release.set()
    assert waited < DRAIN_SECONDS + 1.0
    assert _get(transport, server.url("/next"))[:2] == (200, b"{}")
    assert ports[0] != ports[1]
