"""The transport sends what requests sent, keeps one connection per host, keeps no cookies.

Every test talks to a real loopback server (collector.demo_site.loopback). The reference for
"what is sent" is requests itself (``Session.get`` of the same URL and headers, which the
fetcher used before), compared on what the server received.
"""

from __future__ import annotations

import socket
import time
from collections.abc import Iterator

import pytest
import requests

from collector.demo_site.loopback import Answer, Handler, LoopbackServer
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
         read_timeout: float = 10.0) -> tuple[int, bytes]:
    with transport.get(transport_target(url), HEADERS if headers is None else headers,
                       connect_timeout=5.0, read_timeout=read_timeout) as answer:
        return answer.status_code, answer.raw.read(decode_content=True)


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
