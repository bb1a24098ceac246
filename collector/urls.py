"""URL checks for the fetcher: scheme, host keys, address safety and redaction of secrets.

Pure functions except :func:`check_address`, which resolves a host name through an injectable
resolver (``socket.getaddrinfo`` by default).
"""

from __future__ import annotations

import functools
import ipaddress
import json
import re
import socket
from collections.abc import Callable, Iterable, Mapping
from urllib.parse import quote, unquote_plus, urlencode, urlsplit, urlunsplit

from collector.errors import UnsafeURL

REDACTED = "REDACTED"
# The authority of a URI with a scheme (RFC 3986 §3.2: after "//", up to "/", "?" or "#").
_AUTHORITY = re.compile(r"[A-Za-z][A-Za-z0-9+.\-]*://([^/?#]*)")
_PAIR_SEPARATOR = re.compile(r"([&;])")
# Parts of header values shorter than this are not scrubbed: they would hide ordinary words,
# and real keys are long (common practice, no source).
MIN_SECRET_LEN = 6
ALLOWED_SCHEMES = ("http", "https")
DEFAULT_PORTS = {"http": 80, "https": 443}

Resolver = Callable[..., list]
IPAddress = ipaddress.IPv4Address | ipaddress.IPv6Address
IPNetwork = ipaddress.IPv4Network | ipaddress.IPv6Network


def split_checked(url: str) -> tuple[str, str, int]:
    """Return (scheme, host, port) of an http/https URL; raise UnsafeURL for anything else.

    They depend on the scheme and authority alone (``urllib.parse`` delimits the authority at
    the first ``/``, ``?`` or ``#``, after dropping tabs and line breaks, which stay inside
    it), so they are worked out once per ``scheme://authority``: a host's URLs are asked for
    twice a request (its budget key and its robots.txt)."""
    found = _AUTHORITY.match(url)
    if found is not None:
        try:
            return _split_authority(found.group())
        except UnsafeURL:
            pass  # refused again below, naming the whole URL
    return _split(url)


def _split(url: str) -> tuple[str, str, int]:
    try:
        parts = urlsplit(url)
        port = parts.port
    except ValueError as exc:
        raise UnsafeURL(url, "unsafe_url", detail=f"not a valid URL ({exc})") from None
    scheme = parts.scheme.lower()
    if scheme not in ALLOWED_SCHEMES:
        raise UnsafeURL(
            url, "unsafe_url", detail=f"scheme {scheme or '(none)'!r} is not http or https"
        )
    host = (parts.hostname or "").lower()
    if not host:
        raise UnsafeURL(url, "unsafe_url", detail="the URL has no host")
    return scheme, host, port if port is not None else DEFAULT_PORTS[scheme]


_split_authority = functools.lru_cache(maxsize=1024)(_split)


def host_key(url: str) -> str:
    """Budget and ledger key of a URL: ``host:port`` with the default port filled in."""
    _, host, port = split_checked(url)
    if ":" in host:  # IPv6 literal
        host = f"[{host}]"
    return f"{host}:{port}"


def origin(url: str) -> str:
    """``scheme://host:port`` — RFC 9309 §2.3: each scheme+host+port has its own robots.txt."""
    scheme, host, port = split_checked(url)
    if ":" in host:  # IPv6 literal (as host_key writes it)
        host = f"[{host}]"
    return f"{scheme}://{host}:{port}"


def robots_url(url: str) -> str:
    """The robots.txt URL for a URL's authority (RFC 9309 §2.3: top-level ``/robots.txt``)."""
    return origin(url) + "/robots.txt"


def add_params(url: str, params: Mapping[str, object] | None) -> str:
    """Append query parameters to a URL (values converted with ``str``)."""
    if not params:
        return url
    parts = urlsplit(url)
    extra = encode_query([(k, str(v)) for k, v in params.items()])
    query = f"{parts.query}&{extra}" if parts.query else extra
    return urlunsplit(parts._replace(query=query))


def encode_query(pairs: Iterable[tuple[str, str]]) -> str:
    """``urlencode(pairs)``; a value holding a lone surrogate (a cursor read from JSON) has no
    UTF-8 to percent-encode (RFC 3986 §2.5), so the pairs are then joined as they are and the
    fetcher's guard refuses the URL by name (``unsafe_url``) instead of a crash here."""
    pairs = list(pairs)
    try:
        return urlencode(pairs)
    except UnicodeEncodeError:
        return "&".join(f"{k}={v}" for k, v in pairs)


def redact(url: str, secret_params: Iterable[str] = ()) -> str:
    """Return ``url`` with the values of secret query parameters (and any password) replaced
    by ``REDACTED``; every other character stays as given, so the ledger records the URL that
    was asked for, byte for byte when it holds no secret.

    Split as RFC 3986 §3 reads a URI: the fragment from the first ``#`` (a ``?`` inside it is
    data, §3.5), the query from the first ``?`` before it (§3.4). An empty query or fragment
    keeps its ``?`` or ``#``: ``/a?`` is not the same URI as ``/a`` (§6.2.3: normalisation
    should not remove a delimiter of an empty component). Query pairs are split at ``&`` and
    at ``;`` (HTML 4.01 §B.2.2 asked servers to accept both), so a server reading either
    never gets a secret the record shows; names compare case-insensitively after form
    decoding (``KEY``, ``k%65y``). An empty value or password hides nothing and is kept.
    """
    before_fragment, hash_mark, fragment = url.partition("#")
    head, query_mark, query = before_fragment.partition("?")
    secrets = {s.lower() for s in secret_params}
    if secrets and query:
        pairs = _PAIR_SEPARATOR.split(query)  # separators kept at the odd places
        for n in range(0, len(pairs), 2):
            name, equals, value = pairs[n].partition("=")
            if equals and value and unquote_plus(name).lower() in secrets:
                pairs[n] = f"{name}={REDACTED}"
        query = "".join(pairs)
    authority = _AUTHORITY.match(head)
    if authority is not None:
        userinfo, at, hostport = authority.group(1).rpartition("@")
        user, _, password = userinfo.partition(":")
        if at and password:  # user:password@host: the password is always a secret
            start, end = authority.span(1)
            head = f"{head[:start]}{user}:{REDACTED}@{hostport}{head[end:]}"
    return f"{head}{query_mark}{query}{hash_mark}{fragment}"


def secret_values(url: str, secret_params: Iterable[str] = ()) -> list[str]:
    """The raw values of the secret parameters (and password) in ``url``, for :func:`scrub`."""
    secrets = {s.lower() for s in secret_params}
    try:
        parts = urlsplit(url)
    except ValueError:
        return []
    # The pairs as redact reads them (split at "&" and ";"), each value as sent and decoded.
    pairs = [p.partition("=") for p in _PAIR_SEPARATOR.split(parts.query)[::2]]
    found = [form for k, _, v in pairs if unquote_plus(k).lower() in secrets
             for form in dict.fromkeys((v, unquote_plus(v)))]
    if parts.password:
        found.append(parts.password)
    return [v for v in found if v]


# A header is secret when the recipe lists it in network.secret_headers, or when its name
# holds one of these words (Authorization, Proxy-Authorization, X-Api-Key, X-Auth-Token,
# Cookie, X-Session-Id, ...): common practice, no source.
SECRET_HEADER_WORDS = ("key", "token", "secret", "auth", "cookie", "session", "password")


def is_secret_header(name: str, listed: Iterable[str] = ()) -> bool:
    """Whether a header's value must never be written anywhere (see SECRET_HEADER_WORDS)."""
    lower = name.lower()
    return lower in {h.lower() for h in listed} or any(w in lower for w in SECRET_HEADER_WORDS)


def header_secrets(value: str) -> list[str]:
    """The secret parts of a secret header's value: the whole value, and its last word (the
    token of "Bearer <token>", the value of "session=<value>")."""
    last = (value.split() or [""])[-1]
    return [value, last, last.rpartition("=")[2]]


def secret_forms(secret: str) -> set[str]:
    """Every form in which a secret can reach a message: as it is, stripped of white space
    (a token read from a file with Windows line endings ends in CR), percent- and
    form-encoded (URLs), escaped as Python's repr and JSON write it (error texts, JSON
    columns)."""
    forms: set[str] = set()
    for value in {secret, secret.strip()}:
        if not value:
            continue
        forms |= {value, quote(value, safe=""), quote_plus_safe(value),
                  repr(value)[1:-1], value.encode("unicode_escape").decode("ascii"),
                  json.dumps(value)[1:-1], json.dumps(value, ensure_ascii=False)[1:-1]}
    return {f for f in forms if f}


def scrub(text: str, secrets: Iterable[str]) -> str:
    """Replace every form (:func:`secret_forms`) of each secret in ``text``, longest first."""
    forms = {form for s in secrets if s for form in secret_forms(s)}
    for form in sorted(forms, key=len, reverse=True):
        text = text.replace(form, REDACTED)
    return text


def quote_plus_safe(value: str) -> str:
    """Form-encoding of ``value`` as ``urlencode`` writes it (spaces as ``+``)."""
    return urlencode({"": value})[1:]


def parse_allow_list(entries: Iterable[str]) -> list[IPNetwork]:
    """Parse ``network.allow_addresses`` (addresses or CIDR blocks) into networks."""
    return [ipaddress.ip_network(e.strip(), strict=False) for e in entries]


def address_problem(addr: IPAddress) -> str | None:
    """Why an address may not be contacted (e.g. "loopback"), or None for a public address."""
    if isinstance(addr, ipaddress.IPv6Address) and addr.ipv4_mapped is not None:
        # ::ffff:127.0.0.1 reaches 127.0.0.1; judge the IPv4 address it maps to.
        return address_problem(addr.ipv4_mapped)
    for kind in ("loopback", "private", "link_local", "multicast", "reserved", "unspecified"):
        if getattr(addr, f"is_{kind}"):
            return kind.replace("_", "-")
    if not addr.is_global:
        return "not globally routable"
    return None


def check_address(
    host: str,
    port: int,
    allowed: Iterable[IPNetwork] = (),
    resolver: Resolver = socket.getaddrinfo,
    shown_url: str = "",
) -> list[IPAddress]:
    """Resolve ``host`` and refuse it if ANY of its addresses is not public and not allowed.

    Checking every address (not just the first) stops a name that resolves to both a public and
    a private address from slipping through. Raises UnsafeURL (carrying ``shown_url``, which
    must already be redacted); returns the checked addresses.
    """
    allowed = list(allowed)
    shown = shown_url or f"//{host}:{port}"
    try:
        literal: IPAddress | None = ipaddress.ip_address(host.strip("[]"))
    except ValueError:
        literal = None
    if literal is not None:
        addresses = [literal]
    else:
        try:
            infos = resolver(host, port, type=socket.SOCK_STREAM)
        except (OSError, UnicodeError) as exc:
            raise UnsafeURL(
                shown, "connection", detail=f"cannot resolve host {host!r}: {exc}"
            ) from exc
        addresses = []
        for info in infos:
            addr = ipaddress.ip_address(str(info[4][0]).split("%", 1)[0])
            if addr not in addresses:
                addresses.append(addr)
        if not addresses:
            raise UnsafeURL(shown, "connection", detail=f"{host!r} has no address")
    for addr in addresses:
        problem = address_problem(addr)
        if problem is None:
            continue
        plain = addr.ipv4_mapped if isinstance(addr, ipaddress.IPv6Address) else None
        if any((plain or addr) in net for net in allowed if (plain or addr).version == net.version):
            continue
        raise UnsafeURL(
            shown,
            "unsafe_url",
            detail=f"{host} resolves to {addr} ({problem}); add it to network.allow_addresses "
            "in the recipe if you really mean to contact it",
        )
    return addresses
