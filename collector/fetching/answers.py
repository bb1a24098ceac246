"""What an HTTP answer says: status classes, HTTP dates, Retry-After, and the page and
download objects the fetcher hands back.

Pure data and parsing, no I/O: RFC 9110 (sections 5.6.7, 10.2.3, 15), RFC 6585 section 4 and
RFC 8288 (the Link header).
"""

from __future__ import annotations

import json as _json
import re
from collections.abc import Mapping
from dataclasses import dataclass, field
from datetime import UTC
from email.utils import parsedate_to_datetime
from pathlib import Path
from typing import Any

from requests.structures import CaseInsensitiveDict
from requests.utils import parse_header_links

from collector.safe_text import valid_unicode

# Retried statuses: 429 (RFC 6585 §4) and the temporary 5xx answers (RFC 9110 §15.6).
RETRY_STATUSES = frozenset({429, 500, 502, 503, 504})
# Statuses that ask the client to slow down: the host's budget is throttled too.
SLOW_DOWN_STATUSES = frozenset({429, 503})
REDIRECT_STATUSES = frozenset({301, 302, 303, 307, 308})
# Longest Retry-After delay taken literally, ~31.7 years (common practice, no source): any
# longer value parks the host just the same and keeps epoch arithmetic finite.
MAX_RETRY_DELAY = 1e9

_IMF = re.compile(r"^[A-Z][a-z]{2}, \d{2} [A-Z][a-z]{2} \d{4} \d{2}:\d{2}:\d{2} GMT$")
_RFC850 = re.compile(r"^[A-Z][a-z]+, \d{2}-[A-Z][a-z]{2}-\d{2} \d{2}:\d{2}:\d{2} GMT$")
_ASCTIME = re.compile(r"^[A-Z][a-z]{2} [A-Z][a-z]{2} [ \d]\d \d{2}:\d{2}:\d{2} \d{4}$")


def parse_http_date(value: str) -> float | None:
    """Epoch seconds of an HTTP-date in any of the three RFC 9110 §5.6.7 forms, else None.

    asctime carries no zone; email.utils returns it naive and §5.6.7 says it is UTC.
    """
    value = value.strip()
    if not (_IMF.match(value) or _RFC850.match(value) or _ASCTIME.match(value)):
        return None
    try:
        when = parsedate_to_datetime(value)
    except (TypeError, ValueError):
        return None
    if when.tzinfo is None:
        when = when.replace(tzinfo=UTC)
    return when.timestamp()


def parse_retry_after(value: str | None, now: float) -> tuple[float | None, str | None]:
    """(seconds to wait, note) for a Retry-After value received at epoch ``now``.

    RFC 9110 §10.2.3: ``HTTP-date / delay-seconds`` with ``delay-seconds = 1*DIGIT``. Anything
    else ("-1", "1.5", "120s", garbage) is ignored and a note says so; a date in the past
    means "no wait".
    """
    if value is None:
        return None, None
    text = value.strip()
    if text.isascii() and text.isdigit():
        # float() of the digits, not int(): int() refuses more than 4300 digits and float(int)
        # overflows past ~309; a hostile value stays a finite (parking) delay.
        return min(float(text), MAX_RETRY_DELAY), None
    when = parse_http_date(text)
    if when is None:
        return None, f"Retry-After {value[:40]!r} ignored (not delay-seconds or an HTTP-date)"
    return max(0.0, when - now), None


@dataclass
class Page:
    """A fetched page. ``url`` is the final URL (unredacted: the caller may need its params)."""

    url: str
    status: int
    headers: CaseInsensitiveDict
    body: bytes
    encoding: str | None = None

    def _decode(self, default: str) -> str:
        try:
            text = self.body.decode(self.encoding or default, errors="replace")
        except LookupError:  # the server named a charset that does not exist (or not text)
            text = self.body.decode(default, errors="replace")
        # A codec can make lone surrogates of bytes (UTF-7, RFC 2152, encodes UTF-16 code
        # units, unchecked): bad bytes too, replaced like the others.
        return valid_unicode(text)[0]

    @property
    def text(self) -> str:
        """The body decoded with the response charset (UTF-8 if none or unknown), bad bytes
        (and lone surrogates a codec made of them) replaced by U+FFFD."""
        return self._decode("utf-8")

    def json(self) -> Any:
        """The body parsed as JSON (raises ValueError on bad JSON, nesting too deep included)."""
        try:
            return _json.loads(self._decode("utf-8-sig"))
        except RecursionError:  # e.g. 100,000 nested arrays from a hostile server
            raise ValueError("JSON nested too deeply to read") from None

    @property
    def links(self) -> dict[str, str]:
        """RFC 8288 Link header as {rel: url}; a link with several relation types
        (``rel="next last"``, RFC 8288 section 3.3) is listed under each of them."""
        out: dict[str, str] = {}
        header = self.headers.get("Link")
        if header:
            for link in parse_header_links(header):
                url = link.get("url", "").strip()
                for rel in (link.get("rel") or "").lower().split():
                    if url:
                        out.setdefault(rel, url)
        return out


@dataclass
class Download:
    """A downloaded body in a temp file of ``dest_dir`` (None on 304); the caller adopts it."""

    url: str
    final_url: str
    status: int
    path: Path | None
    sha256: str | None
    size: int
    content_type: str | None
    etag: str | None
    last_modified: str | None
    not_modified: bool = False
    # The response's header fields (reservation signals are read from them, see
    # collector.checks.reservations).
    headers: Mapping[str, str] = field(default_factory=dict)
