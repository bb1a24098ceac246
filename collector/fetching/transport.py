"""Sending one GET and handing back its answer: urllib3's connection pools, used directly.

The fetcher decides everything around a request (guard, robots.txt, budget, retries, the
ledger row); this module only sends it. It used to go through ``requests.Session.send``, whose
own steps (hooks, cookie jars, redirect bookkeeping, building a ``Response``) cost about as
much CPU as the HTTP exchange itself and bought nothing the fetcher used: it follows
redirects itself, hop by hop, and sends only the headers the recipe names. ``requests``
itself calls ``HTTPConnectionPool.urlopen`` with these same arguments (``redirect=False``,
``preload_content=False``, ``decode_content=False``, ``retries`` off, ``assert_same_host``
off); the pools are kept per scheme, host and port by urllib3's ``PoolManager``, one
keep-alive connection reused while a host is being asked.

What stays as it was under requests:

- TLS: certificates verified (``CERT_REQUIRED``) against certifi's CA bundle, as requests
  verifies them, with SNI and the host name checked by urllib3;
- no proxies, none from the environment;
- ``Accept: */*`` and ``Connection: keep-alive`` are sent beside the fetcher's headers (the
  defaults requests added), and header names and values are checked as requests checks them
  (no CR or LF can split a header: ``requests.utils.check_header_validity``);
- credentials in a URL (``user:pass@``) become a Basic ``Authorization`` header (RFC 7617)
  in place of any other, as requests made it;
- errors: urllib3's timeouts become :class:`TransportTimeout`, every other failure to connect
  or read (a refused connection too, though urllib3 files ``NewConnectionError`` under its
  connect timeouts, as requests also tells them apart) :class:`TransportError`, both with
  urllib3's message.

What changed on purpose:

- the connection goes to an address the guard checked. ``check_address`` resolves a name
  just before each request; the transport then connects to those addresses, in the fetcher's
  order, each in turn while connecting fails (as ``socket.create_connection`` tries a name's
  addresses; nothing has been sent then), instead of letting the connection resolve the name
  again, so a name whose
  answer changes between the check and the connection (DNS rebinding) cannot lead the request
  elsewhere. ``Host`` names the host as in the URL; over TLS the name is still sent as SNI and
  the certificate checked against it (urllib3's ``server_hostname`` and ``assert_hostname``).
  A pool is kept per address and name.
- no cookie jar. A ``Set-Cookie`` from an archive is never sent back
(requests kept one per session and replayed it); a cookie an archive requires goes in the
recipe's ``[network] headers``, where it is a secret header and never reaches the ledger.
Every request is exactly what the recipe and the fetcher say.
"""

from __future__ import annotations

from collections.abc import Mapping
from types import TracebackType

import certifi
import urllib3
from requests.structures import CaseInsensitiveDict
from requests.utils import check_header_validity, get_auth_from_url, get_encoding_from_headers
from urllib3.exceptions import ConnectTimeoutError, NewConnectionError
from urllib3.exceptions import HTTPError as Urllib3Error
from urllib3.exceptions import TimeoutError as Urllib3Timeout
from urllib3.util import make_headers

from collector.fetching.http_target import Target

# Sent with every request unless the fetcher's headers name them (as requests' defaults were).
DEFAULT_HEADERS = {"Accept": "*/*", "Connection": "keep-alive"}


class TransportError(Exception):
    """The request could not be sent or its answer not read (refused, reset, TLS, protocol)."""


class TransportTimeout(TransportError):
    """Connecting or waiting for the answer's head took longer than its timeout."""


class Answer:
    """One answer's status and headers, with its body still to be read from :attr:`raw`.

    ``raw`` is urllib3's response (``read1(n, decode_content=True)`` gives decoded bytes as
    they arrive). Close it (or use ``with``): a body read to its end gives the connection back
    to its pool for the next request; one left unread closes the connection.
    """

    __slots__ = ("address", "headers", "raw", "status_code")

    def __init__(self, raw: urllib3.BaseHTTPResponse, address: str | None = None) -> None:
        self.raw = raw
        self.address = address  # the checked address it came from (None: the host itself)
        self.status_code = raw.status
        self.headers: CaseInsensitiveDict[str] = CaseInsensitiveDict(raw.headers)

    @property
    def encoding(self) -> str | None:
        """The charset of the answer's Content-Type, read as requests reads it."""
        return get_encoding_from_headers(self.headers)

    def close(self) -> None:
        self.raw.close()
        self.raw.release_conn()

    def __enter__(self) -> Answer:
        return self

    def __exit__(self, exc_type: type[BaseException] | None, exc: BaseException | None,
                 tb: TracebackType | None) -> None:
        self.close()


class Transport:
    """Connection pools for the fetcher: ``pools`` kept at most (least recently used closed
    first), each holding up to ``per_pool`` idle connections."""

    def __init__(self, *, pools: int, per_pool: int = 10, ca_certs: str | None = None) -> None:
        self._manager = urllib3.PoolManager(
            num_pools=pools, maxsize=per_pool, block=False, retries=False,
            cert_reqs="CERT_REQUIRED", ca_certs=ca_certs or certifi.where())

    def get(self, target: Target, headers: Mapping[str, str], *, connect_timeout: float,
            read_timeout: float) -> Answer:
        """Send a GET of ``target`` (made and checked by :func:`http_target.transport_target`:
        its host, port and request line exactly as urllib3 reads its URL) with ``headers`` and
        return its answer, body unread. The connection goes to ``target.addresses`` (the IP
        addresses the guard checked for ``target.host``) when there are any: the first one
        that accepts a connection.

        Raises :class:`TransportTimeout` or :class:`TransportError` when no answer came, and
        ``ValueError`` for a header that cannot be sent (a CR or LF in it, a leading space)."""
        sent = {**DEFAULT_HEADERS, **headers}
        if target.credentials:  # in the URL: Basic auth (RFC 7617), as requests sends it
            user, password = get_auth_from_url(target.url)  # percent-decoded
            if user or password:
                sent = {k: v for k, v in sent.items() if k.lower() != "authorization"}
                sent["Authorization"] = make_headers(
                    basic_auth=f"{user}:{password}")["authorization"]
        for item in sent.items():
            check_header_validity(item)  # raises requests' InvalidHeader, a ValueError
        timeout = urllib3.Timeout(connect=connect_timeout, read=read_timeout)
        addresses: tuple[str | None, ...] = target.addresses or (None,)
        for n, address in enumerate(addresses):
            try:
                raw = self._pool(target, address, sent).urlopen(
                    "GET", target.request_uri, headers=sent, redirect=False,
                    assert_same_host=False, preload_content=False, decode_content=False,
                    retries=False, timeout=timeout)
            except ConnectTimeoutError as exc:  # NewConnectionError too: nothing was sent
                if n + 1 < len(addresses):
                    continue
                tried = f" (tried {', '.join(map(str, addresses))})" if n else ""
                kind = TransportError if isinstance(exc, NewConnectionError) else TransportTimeout
                raise kind(f"{type(exc).__name__}: {exc}{tried}") from None
            except Urllib3Timeout as exc:
                raise TransportTimeout(f"{type(exc).__name__}: {exc}") from None
            except (Urllib3Error, OSError) as exc:
                raise TransportError(f"{type(exc).__name__}: {exc}") from None
            return Answer(raw, address)
        raise AssertionError("unreachable: the loop returns or raises")

    def _pool(self, target: Target, address: str | None,
              sent: dict[str, str]) -> urllib3.HTTPConnectionPool:
        """The pool for ``target``, connecting to ``address`` when that is not the host itself
        (then ``sent`` gets the ``Host`` header the URL's host would have given)."""
        if address is None or address == target.host:
            return self._manager.connection_from_host(target.host, target.port, target.scheme)
        default = 443 if target.scheme == "https" else 80
        name = f"[{target.host}]" if ":" in target.host else target.host  # IPv6: RFC 3986 §3.2.2
        sent["Host"] = name if target.port == default else f"{name}:{target.port}"
        return self._manager.connection_from_host(
            address, target.port, target.scheme,
            pool_kwargs={"server_hostname": target.host, "assert_hostname": target.host})

    def close(self) -> None:
        """Close every kept connection."""
        self._manager.clear()
