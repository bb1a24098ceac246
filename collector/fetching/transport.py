"""Sending one GET and handing back its answer: the standard library's ``http.client`` with a
small keep-alive connection cache of our own.

The fetcher decides everything around a request (guard, robots.txt, budget, retries, the
ledger row); this module only sends it. It first went through ``requests.Session.send``, then
through urllib3's connection pools used directly; both layers cost CPU the fetcher did not use
(it follows redirects itself, hop by hop, sends only the headers the recipe names and retries
by its own policy). Measured at one host's pace (10 requests/s, ``bench/politeness.py``):
urllib3's pool alone 0.63-0.84 ms of CPU a request, ``http.client`` alone 0.35-0.49 ms, and
urllib3 itself sends and parses through ``http.client``. So this module now drives
``http.client`` directly (0.45-0.67 ms a request through :meth:`Transport.get`, 0.68-0.82
through the urllib3 version) and keeps idle connections itself: per (scheme, address, port,
host name), at most ``per_pool`` idle connections, at most ``pools`` such keys (the least
recently used closed first), one lock around the cache only, never around network I/O.

What stays as it was under requests and urllib3:

- TLS: certificates verified (``CERT_REQUIRED``, host name checked) against certifi's CA
  bundle, as requests verifies them, with SNI;
- no proxies, none from the environment;
- ``Accept: */*`` and ``Connection: keep-alive`` are sent beside the fetcher's headers (the
  defaults requests added), and header names and values are checked as requests checks them
  (no CR or LF can split a header: ``requests.utils.check_header_validity``), before anything
  is sent; the request line and the headers go out in the order and with the values urllib3
  sent (``tests/test_transport.py`` compares them with requests' on the wire);
- credentials in a URL (``user:pass@``) become a Basic ``Authorization`` header (RFC 7617)
  in place of any other, as requests made it;
- keep-alive: an answer read to its end gives its connection back for the next request to the
  same host; one closed before its end closes it. An idle connection the server has dropped
  (readable with nothing asked: its close is waiting) is not used, as urllib3 checked;
- ``gzip`` and ``deflate`` bodies (RFC 9110 §8.4.1; deflate as a zlib stream or raw, as
  urllib3 accepted both) are decoded as they are read, never more than the bytes asked for at
  once (a decompression bomb is stopped by the fetcher's cap, not held in memory);
- errors: a timeout connecting or waiting for the answer is :class:`TransportTimeout`, every
  other failure to connect, send or read (refused, reset, TLS, a malformed answer, a body
  shorter than its ``Content-Length``, truncated compressed data) :class:`TransportError`.
  Messages name the failure as urllib3 named it where it had a name of its own
  (``NewConnectionError``, ``ConnectTimeoutError``, ``ReadTimeoutError``), else as the
  standard library's exception (``IncompleteRead``, ``SSLCertVerificationError``...).

What changed on purpose:

- the connection goes to an address the guard checked. ``check_address`` resolves a name
  just before each request; the transport then connects to those addresses, in the fetcher's
  order, each in turn while connecting fails (as ``socket.create_connection`` tries a name's
  addresses; nothing has been sent then), instead of letting the connection resolve the name
  again, so a name whose answer changes between the check and the connection (DNS
  rebinding) cannot lead the request elsewhere. ``Host`` names the host as in the URL; over
  TLS the name is still sent as SNI and the certificate checked against it
  (``server_hostname``). Connections are kept per address and name.
- no cookie jar. A ``Set-Cookie`` from an archive is never sent back (requests kept one per
  session and replayed it); a cookie an archive requires goes in the recipe's ``[network]
  headers``, where it is a secret header and never reaches the ledger. Every request is
  exactly what the recipe and the fetcher say.
- a request sent on a kept connection that the server closed in the meantime (the send fails,
  or the connection ends before any byte of the answer) is sent once more on a new
  connection: it is a GET, and no answer came (urllib3 left that to a retry policy the
  fetcher had turned off, so such a request failed).
- a body nobody read (the fetcher reads none of a redirect or a 429/503), of a known length
  of at most ``DRAIN_MAX`` bytes that arrives within ``DRAIN_SECONDS``, is read and dropped
  on close, so its connection is kept: an archive that redirects every image URL no longer
  gets a new connection (and TLS handshake) per redirect, as it did under urllib3 and
  requests, which closed such a connection;
- a ``Content-Encoding`` other than ``gzip``, ``x-gzip``, ``deflate`` or ``identity`` (``br``,
  ``zstd``, several codings stacked) is passed through undecoded: urllib3 decoded br and zstd
  only when optional packages were installed, which are not dependencies; the fetcher asks
  for ``gzip`` alone. No ``User-Agent`` is added when the caller sends none (urllib3 added its
  own; the fetcher always sends the recipe's).
"""

from __future__ import annotations

import base64
import http.client
import select
import socket
import ssl
import threading
import time
import zlib
from collections import OrderedDict
from collections.abc import Mapping
from types import TracebackType
from typing import Any, NamedTuple

import certifi
from requests.structures import CaseInsensitiveDict
from requests.utils import check_header_validity, get_auth_from_url, get_encoding_from_headers

from collector.fetching.http_target import Target
from collector.urls import DEFAULT_PORTS

# Sent with every request unless the fetcher's headers name them (as requests' defaults were).
DEFAULT_HEADERS = {"Accept": "*/*", "Connection": "keep-alive"}
READ_SIZE = 65536  # decoded bytes :meth:`Answer.read` asks for at a time
# A body nobody read (a redirect's or a 429/503's short note, RFC 9110 §15.4, §15.6.4) of at
# most this many bytes is read and dropped on close, within DRAIN_SECONDS, so that the
# connection is kept for the next request to the host: no new TCP (and TLS) handshake per
# redirect. Our own values (common practice, no source).
DRAIN_MAX = 65536
DRAIN_SECONDS = 1.0
_GZIP = 16 + zlib.MAX_WBITS  # a gzip member (RFC 1952)
_ZLIB = zlib.MAX_WBITS  # a zlib stream (RFC 1950), the "deflate" of RFC 9110 §8.4.1.2
_RAW = -zlib.MAX_WBITS  # bare deflate data (RFC 1951), which some servers send as "deflate"
_CODINGS = {"gzip": _GZIP, "x-gzip": _GZIP, "deflate": _ZLIB}
_FIRST_MAX = 65536  # "deflate" input kept for a raw retry while no output came, at most
# A kept connection the server closed: the send fails or the answer ends before its first byte.
_STALE = (BrokenPipeError, ConnectionResetError, ConnectionAbortedError,
          http.client.RemoteDisconnected)

_Key = tuple[str, str, int, str]  # scheme, address connected to, port, host named


class TransportError(Exception):
    """The request could not be sent or its answer not read (refused, reset, TLS, protocol)."""


class TransportTimeout(TransportError):
    """Connecting or waiting for the answer's head took longer than its timeout."""


class _Stale(Exception):
    """A kept connection turned out closed before anything of the answer came."""


class _Inflater:
    """Decodes a gzip or deflate body as it arrives, ``limit`` bytes at most per call.

    zlib's ``max_length`` keeps the input it did not get to in ``unconsumed_tail``; that tail
    is fed again before more is read from the network, so the output per call stays bounded
    whatever the compression ratio. Gzip members that follow each other are all decoded;
    bytes after a member that are not another member are dropped (urllib3 allowed that
    trailing garbage too). Deflate is tried as a zlib stream first, then as raw deflate."""

    __slots__ = ("_first", "_obj", "_wbits", "_yielded", "members", "started")

    def __init__(self, wbits: int) -> None:
        self._wbits = wbits
        self._obj = zlib.decompressobj(wbits)
        self._first: bytes | None = b"" if wbits == _ZLIB else None  # input until output
        self.members = 1
        self.started = False  # any compressed byte fed
        self._yielded = False  # the current member gave output

    @property
    def finished(self) -> bool:
        """The compressed data ended where its format says it ends (a few bytes after the
        last gzip member that never made one are trailing garbage, as above)."""
        return self._obj.eof or self.members == 0 or (self.members > 1 and not self._yielded)

    def feed(self, data: bytes, limit: int) -> bytes:
        """Up to ``limit`` decoded bytes from what is pending and ``data``."""
        self.started = self.started or bool(data)
        if self.members == 0:  # trailing garbage after the last gzip member
            return b""
        if self._obj.eof:  # what follows may be the next gzip member
            data = self._obj.unused_data + data
            if not data or self._wbits != _GZIP:
                return b""
            self._obj = zlib.decompressobj(_GZIP)
            self.members += 1
            self._yielded = False
        try:
            if self._first is not None:
                self._first += data
            out = self._obj.decompress(self._obj.unconsumed_tail + data, limit)
        except zlib.error:
            if self._first is not None:  # not a zlib stream: raw deflate, from its start
                self._obj, first, self._first = zlib.decompressobj(_RAW), self._first, None
                return self._obj.decompress(first, limit)
            if self.members > 1:  # not another gzip member: trailing bytes, ignored
                self.members = 0
                return b""
            raise
        if out:
            self._first, self._yielded = None, True
        elif self._first is not None and len(self._first) > _FIRST_MAX:
            self._first = None  # a zlib header that long without output: no raw retry
        return out


class Answer:
    """One answer's status and headers, with its body still to be read.

    :meth:`read1` gives decoded bytes as they arrive (``b""`` at the end). Close it (or use
    ``with``): a body read to its end gives the connection back for the next request, and so
    does a short one nobody read (:data:`DRAIN_MAX`, read and dropped); one left partly read
    closes it.
    """

    __slots__ = ("_conn", "_done", "_inflater", "_key", "_last", "_owner", "_response",
                 "_touched", "address", "headers", "status_code")

    def __init__(self, response: http.client.HTTPResponse,
                 conn: http.client.HTTPConnection | None, owner: Transport, key: _Key,
                 address: str | None = None) -> None:
        self._response, self._conn, self._owner, self._key = response, conn, owner, key
        self.address = address  # the checked address it came from (None: the host itself)
        self.status_code = response.status
        self.headers: CaseInsensitiveDict[str] = _headers(response.msg)
        coding = (self.headers.get("Content-Encoding") or "").strip().lower()
        self._inflater = _Inflater(_CODINGS[coding]) if coding in _CODINGS else None
        self._done = False  # the body was read to its end
        self._touched = False  # a read of the body was asked for
        self._last = 0  # size of the last decoded output (a full one may have more behind)

    @property
    def encoding(self) -> str | None:
        """The charset of the answer's Content-Type, read as requests reads it."""
        return get_encoding_from_headers(self.headers)

    def read1(self, n: int = READ_SIZE) -> bytes:
        """At most ``n`` bytes of the body, decoded, from what has arrived (waiting for more
        only when nothing is there); ``b""`` at its end. Raises :class:`TransportTimeout` when
        nothing arrives within the read timeout, :class:`TransportError` for a broken
        connection, a body shorter than its ``Content-Length`` or corrupt compressed data."""
        return self._read(n, once=False)

    def read_some(self, n: int = READ_SIZE) -> bytes:
        """:meth:`read1`, but back after each read from the network even when the compressed
        data read so far decoded to nothing: ``b""`` is the end only when :attr:`ended`.
        Compressed data can yield nothing for as long as a server sends it (empty deflate
        blocks, RFC 1951 §3.2.4), so a caller with a deadline reads with this and checks its
        deadline between calls."""
        return self._read(n, once=True)

    @property
    def ended(self) -> bool:
        """The body was read to its end."""
        return self._done

    def _read(self, n: int, *, once: bool) -> bytes:
        try:
            if self._inflater is None:
                return self._plain(n)
            return self._decoded(max(n, 1), self._inflater, once)
        except TimeoutError:
            where = f"{self._key[1]}:{self._key[2]}"
            raise TransportTimeout(f"ReadTimeoutError: {where}: read timed out") from None
        except zlib.error as exc:
            raise TransportError(f"DecodeError: the {self.headers.get('Content-Encoding')} "
                                 f"body cannot be decoded: {exc}") from None
        except (OSError, http.client.HTTPException, ValueError) as exc:
            raise TransportError(f"{type(exc).__name__}: {exc}") from None

    def read(self) -> bytes:
        """The rest of the body, decoded."""
        chunks = []
        while chunk := self.read1(READ_SIZE):
            chunks.append(chunk)
        return b"".join(chunks)

    def _plain(self, n: int) -> bytes:
        self._touched = True
        response = self._response
        chunk = response.read1(n)
        if not chunk and not self._done:
            if not response.chunked and response.length:  # the server closed too early
                raise http.client.IncompleteRead(b"", response.length)
            self._done = True
        return chunk

    def _decoded(self, n: int, inflater: _Inflater, once: bool) -> bytes:
        # zlib may hold output it had no room for: take it before reading more
        if self._last == n and (out := inflater.feed(b"", n)):
            self._last = len(out)
            return out
        while True:
            data = self._plain(n)
            out = inflater.feed(data, n)
            self._last = len(out)
            if out:
                return out
            if not data:
                if inflater.started and not inflater.finished:
                    raise zlib.error("it ends before its compressed data does (truncated)")
                return b""
            if once:  # nothing decoded from what arrived: back to the caller's deadline
                return b""

    def close(self) -> None:
        """Give the connection back if the body was read to its end, else close it."""
        conn, self._conn = self._conn, None
        if conn is None:
            return
        response = self._response
        ended = (self._done or (not response.chunked and response.length == 0)
                 or (not self._touched and _drained(response, conn)))
        response.close()
        if ended and not response.will_close and conn.sock is not None:
            self._owner._keep(self._key, conn)
        else:
            conn.close()

    def __enter__(self) -> Answer:
        return self

    def __exit__(self, exc_type: type[BaseException] | None, exc: BaseException | None,
                 tb: TracebackType | None) -> None:
        self.close()


def _drained(response: http.client.HTTPResponse, conn: http.client.HTTPConnection) -> bool:
    """Whether an unread body of a known length of at most DRAIN_MAX bytes was read to its
    end (and dropped) within DRAIN_SECONDS. A longer body, one of unknown length or one
    that does not come at once is not waited for: its connection is closed instead."""
    if response.chunked or response.length is None or response.length > DRAIN_MAX:
        return False
    if conn.sock is None:
        return False
    deadline = time.monotonic() + DRAIN_SECONDS
    try:
        conn.sock.settimeout(DRAIN_SECONDS)
        while response.length:
            if not response.read1(response.length) or time.monotonic() > deadline:
                return False
    except (OSError, http.client.HTTPException):
        return False
    return True


def _headers(message: http.client.HTTPMessage) -> CaseInsensitiveDict[str]:
    """The answer's header fields; a field given more than once joined with ", " (RFC 9110
    §5.3), as urllib3 joined them."""
    fields: CaseInsensitiveDict[str] = CaseInsensitiveDict()
    for name, value in message.items():
        if name in fields:
            fields[name] = f"{fields[name]}, {value}"
        else:
            fields[name] = value
    return fields


def _dropped(conn: http.client.HTTPConnection) -> bool:
    """An idle connection the server has closed (or sent something unasked on): readable
    without waiting (urllib3's ``is_connection_dropped``)."""
    sock = conn.sock
    if sock is None:
        return True
    if not hasattr(select, "poll"):  # Windows: select() (its 512-socket limit is per call)
        return bool(select.select([sock], [], [], 0)[0])
    poller = select.poll()
    poller.register(sock, select.POLLIN)
    return bool(poller.poll(0))


def _host_field(target: Target) -> str:
    """The ``Host`` header: the URL's host, its port when not the scheme's default, an IPv6
    address in brackets (RFC 9110 §7.2, RFC 3986 §3.2.2)."""
    name = f"[{target.host}]" if ":" in target.host else target.host
    return name if target.port == DEFAULT_PORTS.get(target.scheme) else f"{name}:{target.port}"


class _Request(NamedTuple):
    """What :meth:`Transport._exchange` sends: the request line's target, the headers in
    order (no ``Host``), the ``Host`` to send first when connecting to the host itself (the
    caller's if it named one, as http.client puts its own first), the ``Host`` to send last
    when connecting to a checked address (always ours, as urllib3 was given it), whether
    the caller named an Accept-Encoding, and the read timeout."""

    uri: str
    headers: dict[str, str]
    host_first: str
    host_last: str
    skip_accept_encoding: bool
    read_timeout: float


def _request(target: Target, headers: Mapping[str, str], read_timeout: float) -> _Request:
    """The request for ``target``; ValueError for a header that cannot be sent."""
    sent = _request_headers(target, headers)
    names = [name.lower() for name in sent]
    ours = _host_field(target)
    theirs = [value for name, value in zip(names, sent.values(), strict=True) if name == "host"]
    if theirs:
        sent = {k: v for k, v in sent.items() if k.lower() != "host"}
    return _Request(target.request_uri, sent, theirs[-1] if theirs else ours, ours,
                    "accept-encoding" in names, read_timeout)


# The requests made last, by their headers and host: a fetcher sends the same headers to a
# host request after request, and checking and ordering them again cost more than the rest
# of the request's making. Bounded: cleared whole when full.
_MADE: dict[tuple[Any, ...], _Request] = {}
_MADE_MAX = 512


def _request_for(target: Target, headers: Mapping[str, str], read_timeout: float) -> _Request:
    """:func:`_request`, made once for the same headers, host, port and timeout (a URL
    with credentials is made every time: its Authorization header comes from the URL)."""
    if target.credentials:
        return _request(target, headers, read_timeout)
    key = (tuple(headers.items()), target.scheme, target.host, target.port, read_timeout)
    try:
        made = _MADE.get(key)
    except TypeError:  # a value that is no text (refused by _request with its reason)
        return _request(target, headers, read_timeout)
    if made is None:
        made = _request(target, headers, read_timeout)
        if len(_MADE) >= _MADE_MAX:
            _MADE.clear()
        _MADE[key] = made
    return made._replace(uri=target.request_uri)


def _request_headers(target: Target, headers: Mapping[str, str]) -> dict[str, str]:
    """The headers to send, in order: requests' defaults, the caller's, Basic auth from URL
    credentials. Raises ValueError for one that cannot be sent."""
    sent = {**DEFAULT_HEADERS, **headers}
    if target.credentials:  # in the URL: Basic auth (RFC 7617), as requests sends it
        user, password = get_auth_from_url(target.url)  # percent-decoded
        if user or password:
            sent = {k: v for k, v in sent.items() if k.lower() != "authorization"}
            token = base64.b64encode(f"{user}:{password}".encode("latin-1")).decode()
            sent["Authorization"] = f"Basic {token}"
    for item in sent.items():
        check_header_validity(item)  # raises requests' InvalidHeader, a ValueError
    return sent


class Transport:
    """Kept connections for the fetcher: idle ones for ``pools`` keys (scheme, address, port,
    host) at most, the least recently used closed first, up to ``per_pool`` a key."""

    def __init__(self, *, pools: int, per_pool: int = 10, ca_certs: str | None = None) -> None:
        self.pools, self.per_pool = pools, per_pool
        self._tls = ssl.create_default_context(cafile=ca_certs or certifi.where())
        self._tls.check_hostname = True
        self._tls.verify_mode = ssl.CERT_REQUIRED
        self._tls.set_alpn_protocols(["http/1.1"])  # as urllib3 offered it
        self._idle: OrderedDict[_Key, list[http.client.HTTPConnection]] = OrderedDict()
        self._lock = threading.Lock()

    def get(self, target: Target, headers: Mapping[str, str], *, connect_timeout: float,
            read_timeout: float) -> Answer:
        """Send a GET of ``target`` (made and checked by :func:`http_target.transport_target`:
        its host, port and request line) with ``headers`` and return its answer, body unread.
        The connection goes to ``target.addresses`` (the IP addresses the guard checked for
        ``target.host``) when there are any: the first one that accepts a connection.

        Raises :class:`TransportTimeout` or :class:`TransportError` when no answer came, and
        ``ValueError`` for a header that cannot be sent (a CR or LF in it, a leading space)."""
        request = _request_for(target, headers, read_timeout)
        addresses: tuple[str | None, ...] = target.addresses or (None,)
        for n, address in enumerate(addresses):
            where = address or target.host
            key = (target.scheme, where, target.port, target.host)
            conn = self._kept(key)
            if conn is not None:
                try:
                    return Answer(self._exchange(conn, request, where != target.host,
                                                 fresh=False), conn, self, key, address)
                except _Stale:
                    pass  # sent again below on a new connection
            try:
                conn = self._connect(target, where, connect_timeout)
            except OSError as exc:  # TCP connect: nothing was sent, the next address may do
                if n + 1 < len(addresses):
                    continue
                raise _connect_error(exc, target, where, connect_timeout, addresses, n) from None
            return Answer(self._exchange(conn, request, where != target.host, fresh=True),
                          conn, self, key, address)
        raise AssertionError("unreachable: the loop returns or raises")

    def _connect(self, target: Target, where: str,
                 connect_timeout: float) -> http.client.HTTPConnection:
        """A new connection to ``where`` (TLS with the URL's host name for https). OSError
        when the TCP connection fails; TransportError when the TLS handshake does."""
        sock = socket.create_connection((where, target.port), timeout=connect_timeout)
        sock.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)  # as http.client does
        if target.scheme == "https":
            try:
                sock = self._tls.wrap_socket(sock, server_hostname=target.host)
            except TimeoutError:
                sock.close()
                raise TransportTimeout(f"ConnectTimeoutError: TLS handshake with {where}:"
                                       f"{target.port} timed out (connect timeout="
                                       f"{connect_timeout})") from None
            except (OSError, ValueError) as exc:  # ssl.SSLError is an OSError
                sock.close()
                raise TransportError(f"{type(exc).__name__}: {exc}") from None
        conn = http.client.HTTPConnection(where, target.port)
        conn.sock, conn.auto_open = sock, 0  # never reconnects by itself
        return conn

    def _exchange(self, conn: http.client.HTTPConnection, request: _Request, pinned: bool,
                  fresh: bool) -> http.client.HTTPResponse:
        """Send ``request`` on ``conn`` (``pinned``: connected to a checked address, not to
        the host itself) and read the answer's head. On a kept connection a failure before
        any byte of the answer raises _Stale (the caller sends it again)."""
        read_timeout = request.read_timeout
        try:
            assert conn.sock is not None
            if conn.sock.gettimeout() != read_timeout:  # a kept one has it already (a syscall)
                conn.sock.settimeout(read_timeout)
            conn.putrequest("GET", request.uri, skip_host=True,
                            skip_accept_encoding=request.skip_accept_encoding)
            if not pinned:
                conn.putheader("Host", request.host_first)
            for name, value in request.headers.items():
                conn.putheader(name, value)
            if pinned:
                conn.putheader("Host", request.host_last)
            conn.endheaders()
            return conn.getresponse()
        except TimeoutError:
            conn.close()
            raise TransportTimeout(f"ReadTimeoutError: {conn.host}:{conn.port}: read timed out"
                                   f" (read timeout={read_timeout})") from None
        except _STALE as exc:
            conn.close()
            if not fresh:
                raise _Stale() from None
            raise TransportError(f"{type(exc).__name__}: {exc}") from None
        except (OSError, http.client.HTTPException) as exc:
            conn.close()
            raise TransportError(f"{type(exc).__name__}: {exc}") from None
        except BaseException:
            conn.close()
            raise

    def _kept(self, key: _Key) -> http.client.HTTPConnection | None:
        """An idle kept connection for ``key`` that the server has not dropped, or None."""
        while True:
            with self._lock:
                idle = self._idle.get(key)
                if not idle:
                    return None
                conn = idle.pop()
                if not idle:
                    del self._idle[key]
            if not _dropped(conn):
                return conn
            conn.close()

    def _keep(self, key: _Key, conn: http.client.HTTPConnection) -> None:
        """Keep ``conn`` idle for the next request to ``key`` (an answer read to its end)."""
        closing = []
        with self._lock:
            idle = self._idle.setdefault(key, [])
            self._idle.move_to_end(key)
            if len(idle) < self.per_pool:
                idle.append(conn)
            else:
                closing.append(conn)
            while len(self._idle) > self.pools:
                closing.extend(self._idle.popitem(last=False)[1])
        for old in closing:
            old.close()

    def close(self) -> None:
        """Close every kept connection."""
        with self._lock:
            kept = [conn for idle in self._idle.values() for conn in idle]
            self._idle.clear()
        for conn in kept:
            conn.close()


def _connect_error(exc: OSError, target: Target, where: str, connect_timeout: float,
                   addresses: tuple[str | None, ...], n: int) -> TransportError:
    """The error for the last address failing to connect (naming every address tried)."""
    tried = f" (tried {', '.join(map(str, addresses))})" if n else ""
    if isinstance(exc, TimeoutError):
        return TransportTimeout(f"ConnectTimeoutError: connection to {where}:{target.port} "
                                f"timed out (connect timeout={connect_timeout}){tried}")
    return TransportError(f"NewConnectionError: failed to establish a new connection to "
                          f"{where}:{target.port}: {exc}{tried}")
