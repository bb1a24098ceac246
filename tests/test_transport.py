"""The transport sends what requests sent, keeps one connection per host, keeps no cookies,
and connects to the address the guard checked.

Every test talks to a real loopback server (collector.demo_site.loopback). The reference for
"what is sent" is requests itself (``Session.get`` of the same URL and headers, which the
fetcher used before), compared on what the server received.
"""

from __future__ import annotations

import itertools
import socket
import ssl
import threading
import time
from collections.abc import Iterator
from dataclasses import replace
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer
from pathlib import Path

import pytest
import requests
import trustme

from collector.demo_site.loopback import Answer, Handler, LoopbackServer
from collector.errors import FetchError
from collector.fetching.fetcher import Fetcher, FetchSettings
from collector.fetching.http_target import transport_target
from collector.fetching.transport import Transport, TransportError, TransportTimeout

HEADERS = {"User-Agent": "collector/test (+curator@example.org)", "Accept-Encoding": "gzip",
           "X-Extra": "yes"}


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


def _get(transport: Transport, url: str, headers: dict[str, str] | None = None,
         read_timeout: float = 10.0, address: str | None = None) -> tuple[int, bytes]:
    target = replace(transport_target(url), addresses=(address,) if address else ())
    with transport.get(target, HEADERS if headers is None else headers,
                       connect_timeout=5.0, read_timeout=read_timeout) as answer:
        return answer.status_code, answer.read()


@pytest.mark.parametrize("path", [
    "/x?q=1&r=%C3%A9",
    "/caf\u00e9 bar?a=b c",         # the URL is prepared (quoted) before it is sent
    "/a/./b/../c",                  # dot segments: sent as the library resolves them
])
@pytest.mark.parametrize("credentials", ["", "us%40er:p%3Ass@"])
def test_the_request_received_is_the_one_requests_sent(server: LoopbackServer,
                                                      transport: Transport, path: str,
                                                      credentials: str) -> None:
    """Request target and every header the server receives are those of requests'
    ``Session.get`` with the same URL and headers: Host, the defaults requests added
    (Accept, Connection) under ours, and Basic auth made from credentials in the URL
    (RFC 7617; the reference is requests itself)."""
    url = f"http://{credentials}{server.host}:{server.port}{path}"
    session = requests.Session()
    session.trust_env = False
    session.get(url, headers=HEADERS, allow_redirects=False, timeout=10).close()
    session.close()
    assert _get(transport, url) == (200, b"{}")
    sent_by_requests, sent_by_us = server.hits
    assert sent_by_us.path == sent_by_requests.path
    assert sent_by_us.headers == sent_by_requests.headers
    assert ("Authorization" in sent_by_us.headers) == bool(credentials)


def test_a_cookie_set_by_an_archive_is_never_sent_back(server: LoopbackServer,
                                                        transport: Transport) -> None:
    """No cookie jar: a Set-Cookie answer changes nothing in the next request (cookies an
    archive needs are recipe headers, kept out of the ledger)."""
    server.route("/first", (200, b"", {"Set-Cookie": "visit=1; Path=/"}))
    _get(transport, server.url("/first"))
    _get(transport, server.url("/second"))
    assert "Cookie" not in server.hits_for("/second")[0].headers


def test_one_kept_connection_serves_a_hosts_requests_in_turn(server: LoopbackServer,
                                                              transport: Transport) -> None:
    """Answers read to their end give the connection back: three requests, one TCP
    connection (the server sees one client port)."""
    ports: list[int] = []

    def note_port(h: Handler) -> Answer:
        ports.append(h.client_address[1])
        return (200, b"{}")

    server.route("/kept", note_port)
    for _ in range(3):
        assert _get(transport, server.url("/kept")) == (200, b"{}")
    assert len(ports) == 3 and len(set(ports)) == 1


@pytest.mark.parametrize("value", ["a\r\nInjected: yes", "a\nInjected: yes", " leading"])
def test_a_header_that_would_split_is_refused_before_anything_is_sent(
        server: LoopbackServer, transport: Transport, value: str) -> None:
    """A CR or LF in a header value (RFC 9110 §5.5: not allowed in a field value) or a leading
    space raises ValueError, as requests refused it, and nothing reaches the server."""
    with pytest.raises(ValueError):
        _get(transport, server.url("/x"), {**HEADERS, "X-Note": value})
    assert server.hits == []


def test_a_request_made_again_sends_its_own_target_and_a_bad_header_is_refused_each_time(
        server: LoopbackServer, transport: Transport) -> None:
    """The transport makes a request's head once for the same headers and host: each
    request still sends its own target and Host, and a header it refused is refused again
    (RFC 9110 §5.5), never sent from what an earlier request made."""
    other = LoopbackServer("127.0.0.1")
    other.fallback = (200, b"{}")
    try:
        for path in ("/a?x=1", "/b", "/a?x=2"):
            assert _get(transport, server.url(path))[0] == 200
        assert _get(transport, other.url("/c"))[0] == 200
        for _ in range(2):
            with pytest.raises(ValueError):
                _get(transport, server.url("/d"), {**HEADERS, "X-Note": "a\r\nInjected: yes"})
        assert [(h.path, h.headers["Host"]) for h in server.hits] == [
            ("/a?x=1", server.key), ("/b", server.key), ("/a?x=2", server.key)]
        assert [(h.path, h.headers["Host"]) for h in other.hits] == [("/c", other.key)]
    finally:
        other.close()


def test_a_refused_connection_is_an_error_not_a_timeout(transport: Transport) -> None:
    """Nothing listening on the port: TransportError, not TransportTimeout (urllib3 files its
    NewConnectionError under connect timeouts; requests told them apart too)."""
    with socket.socket() as probe:  # a loopback port that was free a moment ago
        probe.bind(("127.0.0.1", 0))
        port = probe.getsockname()[1]
    with pytest.raises(TransportError) as err:
        _get(transport, f"http://127.0.0.1:{port}/x")
    assert not isinstance(err.value, TransportTimeout)
    assert "NewConnectionError" in str(err.value)


def test_an_answer_slower_than_the_read_timeout_is_a_timeout(server: LoopbackServer,
                                                             transport: Transport) -> None:
    """No status line within the read timeout: TransportTimeout."""
    def slow(h: Handler) -> Answer:
        time.sleep(1.5)
        return (200, b"late")

    server.route("/slow", slow)
    with pytest.raises(TransportTimeout):
        _get(transport, server.url("/slow"), read_timeout=0.2)


# -- the connection goes to the address the guard checked -----------------------------------
# "localhost" is answered by /etc/hosts (127.0.0.1 or ::1), never by a DNS server; the fetcher's
# resolver says 127.0.0.2, where the server listens. Connecting to what the guard checked
# reaches it; resolving the name a second time when connecting would not (DNS rebinding).
CHECKED = "127.0.0.2"


def _says_checked(host: str, port: int, **kwargs: object) -> list:
    """A resolver (socket.getaddrinfo's shape) that answers CHECKED for every name."""
    return [(socket.AF_INET, socket.SOCK_STREAM, 6, "", (CHECKED, port))]


def _fetcher(transport: Transport) -> Fetcher:
    settings = FetchSettings.from_recipe(
        {"contact": "curator@example.org", "budgets": {"min_interval": 0.0},
         "network": {"allow_addresses": [CHECKED]}}, resolver=_says_checked)
    return Fetcher(settings, None, transport=transport)


def test_the_connection_goes_to_the_checked_address_not_a_second_answer(
        transport: Transport) -> None:
    """http://localhost:PORT/ with the resolver answering 127.0.0.2: the request arrives at
    127.0.0.2 with ``Host: localhost:PORT`` (RFC 9110 §7.2: the URL's authority)."""
    with LoopbackServer(CHECKED) as server:
        server.route("/robots.txt", (404, b""))
        server.route("/x", (200, b"pinned"))
        page = _fetcher(transport).get_page(f"http://localhost:{server.port}/x")
        assert page.body == b"pinned"
        assert [h.headers["Host"] for h in server.hits] == [f"localhost:{server.port}"] * 2


class _TLSServer:
    """An HTTPS server on CHECKED with a certificate for ``name`` from ``ca`` (trustme)."""

    def __init__(self, ca: trustme.CA, name: str) -> None:
        class _H(BaseHTTPRequestHandler):
            protocol_version = "HTTP/1.1"

            def do_GET(self) -> None:
                status, body = (404, b"") if self.path == "/robots.txt" else (200, b"secure")
                self.send_response(status)
                self.send_header("Content-Length", str(len(body)))
                self.end_headers()
                self.wfile.write(body)

            def log_message(self, *args: object) -> None:
                pass

        context = ssl.create_default_context(ssl.Purpose.CLIENT_AUTH)
        ca.issue_cert(name).configure_cert(context)
        self.server = ThreadingHTTPServer((CHECKED, 0), _H)
        self.server.daemon_threads = True
        self.server.socket = context.wrap_socket(self.server.socket, server_side=True)
        self.port = self.server.server_address[1]
        threading.Thread(target=self.server.serve_forever, args=(0.05,), daemon=True).start()

    def close(self) -> None:
        self.server.shutdown()
        self.server.server_close()


@pytest.mark.parametrize(("certified", "trusted", "ok"), [
    ("localhost", True, True),           # the name in the URL, from a trusted CA
    ("other.invalid", True, False),      # another name: refused though the address is right
    ("localhost", False, False),         # a CA we do not trust: refused
])
def test_over_tls_the_checked_address_is_verified_against_the_urls_name(
        tmp_path: Path, certified: str, trusted: bool, ok: bool) -> None:
    """Connecting to the checked address keeps TLS whole: SNI and the certificate check use
    the URL's host name (RFC 6125 §6: the reference identity is the name the client meant),
    and a certificate for another name or from an untrusted CA fails the request."""
    ca = trustme.CA()
    bundle = tmp_path / "ca.pem"
    (ca if trusted else trustme.CA()).cert_pem.write_to_path(str(bundle))
    server = _TLSServer(ca, certified)
    sender = Transport(pools=4, ca_certs=str(bundle))
    url = f"https://localhost:{server.port}/x"
    try:
        if ok:
            assert _fetcher(sender).get_page(url).body == b"secure"
        else:
            with pytest.raises(TransportError) as err:
                _get(sender, url, address=CHECKED)
            assert "CERTIFICATE_VERIFY_FAILED" in str(err.value) or "match" in str(err.value)
            with pytest.raises(FetchError):  # robots.txt is unreachable, the page not asked
                _fetcher(sender).get_page(url)
    finally:
        sender.close()
        server.close()


def test_a_name_keeps_its_address_while_the_resolver_rotates_its_answers() -> None:
    """A DNS server rotating two addresses (round robin) does not move the requests between
    them: the fetcher keeps the checked address it connected to while it is among the
    answers, so one kept connection serves them all (common practice, no source)."""
    with LoopbackServer(CHECKED) as first, LoopbackServer("127.0.0.3", first.port) as second:
        ports: list[int] = []

        def note_port(h: Handler) -> Answer:
            ports.append(h.client_address[1])
            return (200, b"{}")

        for server in (first, second):
            server.route("/robots.txt", (404, b""))
            server.prefixes["/item/"] = note_port
        answers = [[first.host, second.host], [second.host, first.host]]
        turns = itertools.cycle(answers)

        def rotating(host: str, port: int, **kwargs: object) -> list:
            return [(socket.AF_INET, socket.SOCK_STREAM, 6, "", (a, port)) for a in next(turns)]

        settings = FetchSettings.from_recipe(
            {"contact": "curator@example.org", "budgets": {"min_interval": 0.0},
             "network": {"allow_addresses": [first.host, second.host]}}, resolver=rotating)
        sender = Transport(pools=4)
        fetcher = Fetcher(settings, None, transport=sender)
        try:
            for i in range(6):
                fetcher.get_page(f"http://localhost:{first.port}/item/{i}")
        finally:
            sender.close()
        assert second.hits == [] and len(first.hits) == 7  # robots.txt and six pages
        assert len(set(ports)) == 1


def test_an_address_that_refuses_is_passed_over_for_the_next_checked_one() -> None:
    """The resolver answers 127.0.0.3 first, where nothing listens, then 127.0.0.2: the
    request goes to 127.0.0.2 at once, as socket.create_connection tries a name's addresses in
    turn (nothing was sent to the first), and later requests start there."""
    with LoopbackServer(CHECKED) as server:
        server.route("/robots.txt", (404, b""))
        server.fallback = (200, b"{}")

        def refusing_first(host: str, port: int, **kwargs: object) -> list:
            return [(socket.AF_INET, socket.SOCK_STREAM, 6, "", (a, port))
                    for a in ("127.0.0.3", CHECKED)]

        settings = FetchSettings.from_recipe(
            {"contact": "curator@example.org", "budgets": {"min_interval": 0.0},
             "network": {"allow_addresses": ["127.0.0.2", "127.0.0.3"]}},
            resolver=refusing_first)
        sender = Transport(pools=4)
        fetcher = Fetcher(settings, None, transport=sender)
        try:
            for i in range(3):
                assert fetcher.get_page(f"http://localhost:{server.port}/p/{i}").status == 200
            order = fetcher._checked_addresses(
                transport_target(f"http://localhost:{server.port}/"), "")
        finally:
            sender.close()
        assert server.paths() == ["/robots.txt", "/p/0", "/p/1", "/p/2"]
        assert order == (CHECKED, "127.0.0.3")


def test_when_every_checked_address_refuses_the_error_names_them(transport: Transport) -> None:
    """No checked address accepts: one TransportError (not a timeout) naming each tried."""
    with socket.socket() as probe:
        probe.bind(("127.0.0.1", 0))
        port = probe.getsockname()[1]
    target = replace(transport_target(f"http://localhost:{port}/x"),
                     addresses=("127.0.0.3", "127.0.0.4"))
    with pytest.raises(TransportError) as err:
        transport.get(target, HEADERS, connect_timeout=5.0, read_timeout=5.0)
    assert not isinstance(err.value, TransportTimeout)
    assert "tried 127.0.0.3, 127.0.0.4" in str(err.value)
