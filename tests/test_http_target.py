"""The guard and the HTTP library agree on where a request goes (one URL reading).

The library's own decision is read from requests itself: ``PreparedRequest`` builds the URL it
sends and ``HTTPAdapter.build_connection_pool_key_attributes`` names the host and port its
connection pool connects to (the transport connects to exactly the target's host and port:
tests/test_transport.py). No test here opens a connection.
"""

from __future__ import annotations

import pytest
import requests
from hypothesis import given, settings
from hypothesis import strategies as st
from requests.adapters import HTTPAdapter
from urllib3.util import parse_url

from collector.errors import UnsafeURL
from collector.fetching.http_target import _library_target, _plain_target, transport_target
from collector.urls import split_checked

ALLOWED = "127.0.0.51"
UNLISTED = "127.0.0.59"


def library_connects_to(url: str) -> tuple[str, int]:
    """(host, port) the requests connection pool opens for ``url`` (requests 2.32+ API)."""
    prepared = requests.Request("GET", url).prepare()
    key, _ = HTTPAdapter().build_connection_pool_key_attributes(prepared, True, None)
    port = key["port"] or (443 if key["scheme"] == "https" else 80)
    return str(key["host"]).lower().strip("[]"), int(port)


@pytest.mark.parametrize("url", [
    rf"http://{UNLISTED}:8659\@{ALLOWED}:8651/x",       # the reported bypass
    rf"http://{ALLOWED}:8651\@{UNLISTED}:8659/x",
    rf"http://user\@{ALLOWED}/x",
    f"http://{UNLISTED}:8659\uff20{ALLOWED}:8651/x",   # full-width commercial at (NFKC: @)
    f"http://{ALLOWED}\uff0e1/x",                       # full-width full stop
    f"http://{ALLOWED}\t:8651/x",                       # urlsplit drops tabs, urllib3 does not
    f"http://{ALLOWED}\n/x",
    f"http://{ALLOWED}\x00.example/x",
    f"http://{ALLOWED}\u202e/x",                        # right-to-left override
    "http://[::1/img/x.png",                            # unclosed IPv6 literal
    "http://[::1]]/x",
    "http://127.0.0.51:99999/x",                        # port out of range
    "http://127.0.0.51:8a/x",
])
def test_urls_that_parsers_read_differently_are_refused(url: str) -> None:
    """Backslashes, control/bidi characters, NFKC-unstable text and URLs the library cannot
    prepare are refused with a reason, never passed on (common practice, no source: WHATWG
    URL treats '\\' as a path delimiter for http, RFC 3986 §3.2 does not)."""
    with pytest.raises(UnsafeURL) as caught:
        transport_target(url)
    assert caught.value.reason == "unsafe_url"
    assert caught.value.detail


@pytest.mark.parametrize(("url", "host", "port"), [
    ("http://127.0.0.51:8651/a/b.png", "127.0.0.51", 8651),
    ("https://Example.ORG/a", "example.org", 443),
    ("http://user:pw@127.0.0.51/x", "127.0.0.51", 80),
    ("http://[::1]:8080/x", "::1", 8080),
    ("http://b\u00fccher.example/\u00e4 b", "xn--bcher-kva.example", 80),  # RFC 5891 (IDNA)
    ("http://127.0.0.51:8651/a%5Cb?q=\\", "127.0.0.51", 8651),  # backslash outside the host
])
def test_ordinary_urls_name_the_host_the_library_connects_to(url: str, host: str,
                                                             port: int) -> None:
    """For ordinary URLs the target is the host and port requests connects to, and the URL
    sent is the one requests prepares."""
    target = transport_target(url)
    assert (target.host, target.port) == (host, port)
    assert library_connects_to(target.url) == (host, port)
    assert requests.Request("GET", target.url).prepare().url == target.url


AUTHORITY_PARTS = st.sampled_from([
    "@", "\\", "/", ":", "[", "]", "%", ".", "#", "?", "127.0.0.51", "127.0.0.59", "8651",
    "8659", "::1", "a", "x", "\uff20", "\u00e9", "\u0130", "\u2024", "%40", "%5C", " ",
])


@settings(max_examples=600, derandomize=True, deadline=None)
@given(st.lists(AUTHORITY_PARTS, min_size=1, max_size=8).map("".join))
def test_an_approved_host_is_the_host_the_library_connects_to(authority: str) -> None:
    """Property: for random authorities built from '@ \\ / : [ ] % .' and unicode, either
    the guard refuses the URL, or the host it approves is exactly the one the HTTP library's
    connection pool opens, and urllib.parse (the ledger's reading) names the same host."""
    url = f"http://{authority}/x"
    try:
        target = transport_target(url)
    except UnsafeURL:
        return
    assert library_connects_to(target.url) == (target.host, target.port)
    assert library_connects_to(url) == (target.host, target.port)
    _, ledger_host, ledger_port = split_checked(url)
    assert ledger_port == target.port
    assert ledger_host.encode("idna").decode().lower() == target.host or \
        ledger_host == target.host


# The quick reading of plain URLs (http_target._plain_target) against the library's own.
PLAIN_URLS = [
    "http://127.0.0.51:8651/a/b.png",
    "https://archive.example/iiif/2/plate-01/full/max/0/default.jpg",
    "http://127.0.0.51:8651/api/items?page=2&per_page=50",
    "http://127.0.0.51:8651/scans/Plate%2001%20(recto).jpg",
    "http://127.0.0.51:8651/a;v=1/b@c:d/~x_y-z.jpg?q=a,b;c=$1&d=(2)*'3'!",
    "http://h.example:1/x?y=/z?w",
]


@pytest.mark.parametrize("url", PLAIN_URLS)
def test_plain_urls_are_read_without_the_library_as_the_library_reads_them(url: str) -> None:
    """The common plain form takes the quick path, and its target is what requests prepares
    (the URL sent as written) and where its pool connects, with urllib3's request line."""
    quick = _plain_target(url)
    assert quick is not None
    assert quick == _library_target(url) == transport_target(url)
    assert requests.Request("GET", url).prepare().url == url
    assert library_connects_to(url) == (quick.host, quick.port)
    assert parse_url(url).request_uri == quick.request_uri


@pytest.mark.parametrize("url", [
    "HTTP://h/a", "http://H/a", "http://h", "http://h/a?", "http://h/a#f", "http://h/./a",
    "http://h/a/../b", "http://h:080/a", "http://h:99999/a", "http://u:p@h/a", "http://h./a",
    "http://h/%41", "http://h/%2f", "http://h/a b", "http://h/\u00e9", "http://a..b/x",
])
def test_urls_the_library_would_change_take_the_library_path(url: str) -> None:
    """Upper case, no path, an empty query, a fragment, dot segments, a padded or too large
    port, user information, an escaped unreserved character (RFC 3986 §2.3) or a lower-case
    escape, a space or non-ASCII text: read by the library itself."""
    assert _plain_target(url) is None


PLAIN_PARTS = st.sampled_from([
    "a", "Z", "0", "9", ".", "-", "_", "~", "/", "?", "#", "%", "%20", "%2F", "%2f", "%41",
    "%7E", "%E2%82%AC", "@", ":", ";", "=", "&", "+", "!", "$", "'", "(", "*", ",", " ",
    "\u00e9", "..", "/./", "/../", "[", "]", "\\", "|", "^", "`", "{", '"', "<",
])
HOST_PARTS = st.sampled_from(["a", "b", "0", "9", ".", "-", "..", "A", "h.example", "127.0.0.51"])


@settings(max_examples=1500, derandomize=True, deadline=None)
@given(st.sampled_from(["http", "https", "HTTP"]),
       st.lists(HOST_PARTS, min_size=1, max_size=4).map("".join),
       st.sampled_from(["", ":1", ":80", ":8651", ":080", ":65535", ":65536", ":"]),
       st.lists(PLAIN_PARTS, max_size=10).map("".join))
def test_the_quick_reading_never_differs_from_the_library(scheme: str, host: str, port: str,
                                                          rest: str) -> None:
    """Property: whenever the quick path takes a URL, requests sends it as written, connects
    where the quick reading says, and the library's own reading gives the same target."""
    url = f"{scheme}://{host}{port}/{rest}"
    quick = _plain_target(url)
    if quick is None:
        return
    assert quick == _library_target(url)
    assert requests.Request("GET", url).prepare().url == url
    assert library_connects_to(url) == (quick.host, quick.port)
    assert parse_url(url).request_uri == quick.request_uri
