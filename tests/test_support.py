"""The test support package behaves: the loopback server serves and logs, and the fake fetcher
fails exactly the way collector.fetching.fetcher.Fetcher does."""

from __future__ import annotations

from collections.abc import Callable, Iterator
from typing import Any

import pytest
from support.fetcher import FakeFetcher
from support.server import LoopbackServer, json_answer, on_query, send

from collector.demo_site.requestlog import max_in_window
from collector.errors import FetchError, UnsafeURL
from collector.fetching.fetcher import Fetcher, FetchSettings


@pytest.fixture
def srv() -> Iterator[LoopbackServer]:
    """A loopback server with an allow-all robots.txt."""
    with LoopbackServer() as server:
        server.route("/robots.txt", (200, b"User-agent: *\nAllow: /\n"))
        yield server


def real_fetcher() -> Fetcher:
    """collector.fetching.fetcher.Fetcher for 127.0.0.1 without waits or retries."""
    return Fetcher(FetchSettings.from_recipe({
        "contact": "tests@example.org", "budgets": {"min_interval": 0.0, "max_attempts": 1},
        "network": {"allow_addresses": ["127.0.0.1"]}}), None)


def test_loopback_server_serves_routes_and_logs_requests() -> None:
    """The test server answers a configured route on 127.0.0.1 and logs the request target."""
    with LoopbackServer() as srv:
        srv.route("/x", on_query(lambda q: json_answer({"q": q})))
        page = FakeFetcher().get_page(f"{srv.base}/x", params={"a": "1"})
        assert page.json() == {"q": {"a": "1"}}
        assert srv.targets() == ["/x?a=1"]
        assert srv.paths() == ["/x"]


def test_loopback_server_matches_target_then_path_then_prefix_then_fallback() -> None:
    """Lookup order: exact target, path, longest prefix, fallback; nothing matching is 404."""
    with LoopbackServer() as srv:
        srv.route("/a?x=1", (200, b"target"))
        srv.route("/a", (200, b"path"))
        srv.prefixes.update({"/p/": (200, b"short"), "/p/q/": (200, b"long")})
        fetcher = FakeFetcher()
        got = [fetcher.get_page(srv.url(t)).body for t in ("/a?x=1", "/a?x=2", "/p/q/r", "/p/z")]
        assert got == [b"target", b"path", b"long", b"short"]
        with pytest.raises(FetchError):
            fetcher.get_page(srv.url("/elsewhere"))
        srv.fallback = (200, b"fallback")
        assert fetcher.get_page(srv.url("/elsewhere")).body == b"fallback"


def test_loopback_server_refuses_a_non_loopback_address() -> None:
    """The server only binds loopback addresses (no traffic leaves 127.0.0.0/8)."""
    with pytest.raises(ValueError, match="loopback"):
        LoopbackServer("192.0.2.1")  # TEST-NET-1, RFC 5737 §3: never bound, only checked


def test_fake_fetcher_exposes_rfc8288_link_header_as_links() -> None:
    """The fake fetcher maps a Link header's rel="next" to page.links, unresolved (RFC 8288 §3)."""
    with LoopbackServer() as srv:
        srv.route("/p", json_answer([], headers={"Link": '</p?page=2>; rel="next"'}))
        page = FakeFetcher().get_page(f"{srv.base}/p")
        assert page.links == {"next": "/p?page=2"}


def redirect_to(target: str) -> Callable[[Any], None]:
    """A route answering 302 to target."""
    return lambda h: send(h, 302, headers={"Location": target})


@pytest.mark.parametrize("path", ["/gone", "/teapot", "/busy", "/loop?key=s3cret"])
def test_fake_fetcher_fails_like_the_real_fetcher(srv: LoopbackServer, path: str) -> None:
    """For 404, 418, 503 and a redirect loop, the fake raises the same FetchError (reason,
    status, redacted URL) as collector.fetching.fetcher.Fetcher against the same server."""
    srv.route("/teapot", (418, b"short and stout"))
    srv.route("/busy", (503, b"later"))
    srv.route("/loop", redirect_to("/loop?key=s3cret"))
    errors = []
    for fetcher in (real_fetcher(), FakeFetcher()):
        with pytest.raises(FetchError) as err:
            fetcher.get_page(srv.url(path), secret_params=["key"])
        fetcher.close()
        errors.append((type(err.value), err.value.reason, err.value.status, err.value.url))
    assert errors[0] == errors[1]
    assert "s3cret" not in str(errors[1])


def test_fake_fetcher_follows_redirects_like_the_real_fetcher(srv: LoopbackServer) -> None:
    """A 302 chain ends on the final page; page.url is the final URL for both fetchers."""
    srv.route("/old", redirect_to("/new"))
    srv.route("/new", json_answer({"ok": True}))
    pages = [f.get_page(srv.url("/old")) for f in (real_fetcher(), FakeFetcher())]
    want = (srv.url("/new"), 200, {"ok": True})
    assert [(p.url, p.status, p.json()) for p in pages] == [want, want]


def test_fake_fetcher_in_memory_answers_and_refuses_other_schemes() -> None:
    """From memory: known URLs answer (query order ignored), unknown ones raise http_404, and
    a non-http URL raises UnsafeURL like the real fetcher."""
    fetcher = FakeFetcher({"http://127.0.0.1:9/a?y=2&x=1": json_answer([1])})
    assert fetcher.get_page("http://127.0.0.1:9/a", params={"x": "1", "y": "2"}).json() == [1]
    with pytest.raises(FetchError) as err:
        fetcher.get_page("http://127.0.0.1:9/b")
    assert (err.value.reason, err.value.status) == ("http_404", 404)
    with pytest.raises(UnsafeURL):
        fetcher.get_page("ftp://127.0.0.1:9/a")
    assert [c.url for c in fetcher.calls] == ["http://127.0.0.1:9/a", "http://127.0.0.1:9/b",
                                              "ftp://127.0.0.1:9/a"]


def test_max_in_window_counts_the_busiest_half_open_window() -> None:
    """Stamps 0, 0.5, 0.99, 1.0, 1.2: [0.5, 1.5) holds four; with 0.5 s, [0.99, 1.49) holds
    three, and [0.5, 1.0) only two because the window is half-open (hand-counted)."""
    stamps = [1.2, 0.0, 0.99, 0.5, 1.0]
    assert max_in_window(stamps, 1.0) == 4
    assert max_in_window(stamps, 0.5) == 3
    assert max_in_window([0.0, 0.5], 0.5) == 1
    assert max_in_window([], 1.0) == 0
