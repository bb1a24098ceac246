"""Pages kept in the ledger for re-use across runs: a source asks for it per request
(``Fetcher.get_page(keep_for=...)``), e.g. a IIIF image service's info.json, which changes
rarely and is otherwise asked again by every run. Only 2xx answers to requests without secret
parameters are kept; a kept answer older than ``keep_for`` seconds is asked again."""

from __future__ import annotations

from typing import Any

from requests.structures import CaseInsensitiveDict

from collector.fetching.answers import Page
from collector.storage import queries
from collector.storage.row_codec import epoch_of, iso_time

__all__ = ["keep_answer", "kept_answer"]


def kept_answer(ledger: Any, url: str, keep_for: float, now: float) -> Page | None:
    """The answer kept for ``url`` when younger than ``keep_for`` seconds at ``now``, else
    None (also without a ledger, or when nothing is to be kept)."""
    if keep_for <= 0 or ledger is None:
        return None
    kept = queries.kept_page(ledger, url)
    if kept is None:
        return None
    fetched = epoch_of(str(kept["fetched_at"]))
    if fetched is None or now - fetched >= keep_for:
        return None
    kind = kept["content_type"]
    headers = CaseInsensitiveDict({"Content-Type": kind} if kind else {})
    return Page(url, int(kept["status"]), headers, bytes(kept["body"] or b""), None)


def keep_answer(ledger: Any, url: str, page: Page, now: float) -> None:
    """Keep ``page`` (a 2xx answer to ``url``) for re-use from ``now`` on."""
    if ledger is None:
        return
    ledger.add_row("kept_pages", {"url": url, "fetched_at": iso_time(now), "status": page.status,
                                  "content_type": page.headers.get("Content-Type"),
                                  "body": page.body})
