"""The one fake page fetcher for adapter tests.

``FakeFetcher`` keeps the contract of ``collector.fetching.fetcher.Fetcher.get_page`` that adapters
depend on and leaves out its politeness (robots.txt, budgets, retries, ledger rows):

* params are added to the URL the way the real fetcher adds them
(``collector.urls.add_params``,
  ``${NAME}`` filled by the real fetcher's own function); a URL that is not http/https
  raises ``UnsafeURL``;
* redirects (301/302/303/307/308 with Location) are followed, at most ``max_redirects`` hops,
  then ``FetchError`` reason ``redirect_blocked``;
* a final status outside 2xx raises ``FetchError`` with reason ``http_<status>`` and ``status``
  set, the URL redacted with the secret params: adapters never see an error page;
* the answer is a real ``collector.fetching.answers.Page`` (case-insensitive headers, charset-aware
text,
  ``json()``, RFC 8288 ``links``) whose ``url`` is the final URL.

Answers come from memory (``FakeFetcher(pages)``, keyed by URL with the query sorted; unknown
URLs answer 404) or, with no pages, over HTTP from a loopback server (``FakeFetcher()``).
``collect`` runs one source to the end with a fetcher.
"""

from __future__ import annotations

from collections.abc import Iterable, Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import Any
from urllib.parse import parse_qsl, urlencode, urljoin, urlsplit

import requests
from requests.structures import CaseInsensitiveDict
from requests.utils import get_encoding_from_headers

from collector import sources
from collector.demo_site.loopback import Answer
from collector.errors import FetchError
from collector.fetching.answers import REDIRECT_STATUSES, Page
from collector.fetching.fetcher import filled_from_env
from collector.sources import SourceNote
from collector.urls import add_params, redact, split_checked


@dataclass
class Call:
    """One get_page call as the fake fetcher received it."""

    url: str
    purpose: str
    params: dict[str, str] | None
    secret_params: tuple[str, ...]


class FakeFetcher:
    """A PageFetcher that fails like ``collector.fetching.fetcher.Fetcher`` (see the module
    docstring)."""

    def __init__(self, pages: Mapping[str, Answer] | None = None, *,
                 max_redirects: int = 10) -> None:
        self.pages = None if pages is None else {self.key(k): v for k, v in pages.items()}
        self.max_redirects = max_redirects
        self.calls: list[Call] = []
        self.session = requests.Session() if pages is None else None

    @staticmethod
    def key(url: str) -> str:
        """Canonical form of a URL: its query sorted."""
        parts = urlsplit(url)
        return parts._replace(query=urlencode(sorted(parse_qsl(parts.query)))).geturl()

    def _answer(self, url: str, headers: Mapping[str, str]) -> tuple[int, dict[str, str], bytes]:
        if self.session is None:
            status, body, *rest = (self.pages or {}).get(self.key(url), (404, b"not found"))
            return status, dict(rest[0] if rest else {}), body
        host = urlsplit(url).hostname or ""
        assert host.startswith("127."), f"the fake fetcher only talks to loopback, not {url}"
        r = self.session.get(url, headers=dict(headers), allow_redirects=False, timeout=10)
        return r.status_code, dict(r.headers), r.content

    def get_page(self, url: str, *, purpose: str = "listing", item_id: int | None = None,
                 params: Mapping[str, str] | None = None, headers: Mapping[str, str] | None = None,
                 secret_params: Iterable[str] = (), keep_for: float = 0.0) -> Page:
        """The page at url (params added), after redirects; FetchError unless 2xx. Nothing
        is kept between calls (``keep_for`` is the real fetcher's ledger cache)."""
        secrets = tuple(secret_params)
        self.calls.append(Call(url, purpose, dict(params) if params else None, secrets))
        # ${NAME} filled (or refused as unset_variable) exactly as the real fetcher does.
        params = filled_from_env(params or {}, url, secrets) or None
        headers = filled_from_env(headers or {}, url, secrets)
        current = add_params(url, params)
        hops = 0
        while True:
            split_checked(current)  # UnsafeURL for a scheme other than http/https
            status, got, body = self._answer(current, headers or {})
            hdr: CaseInsensitiveDict[str] = CaseInsensitiveDict(got)
            location = hdr.get("Location")
            if status not in REDIRECT_STATUSES or not location:
                break
            if hops >= self.max_redirects:
                raise FetchError(redact(current, secrets), "redirect_blocked", status,
                                 f"more than {self.max_redirects} redirects")
            hops += 1
            current = urljoin(current, location)
        if not 200 <= status < 300:
            raise FetchError(redact(current, secrets), f"http_{status}", status)
        ctype = (hdr.get("Content-Type") or "").lower()
        encoding = get_encoding_from_headers(hdr) if "charset" in ctype else None
        return Page(current, status, hdr, body, encoding)

    def close(self) -> None:
        """Close the HTTP session, if any."""
        if self.session is not None:
            self.session.close()


def collect(source: dict[str, Any], fetcher: Any, base_dir: Path | str = ".",
            ) -> tuple[list[sources.Candidate], list[SourceNote]]:
    """Run ``sources.iter_candidates`` to the end; return its candidates and notes."""
    notes: list[SourceNote] = []
    cands = list(sources.iter_candidates(source, fetcher, notes.append, Path(base_dir)))
    return cands, notes
