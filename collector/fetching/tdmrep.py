"""Each origin's ``/.well-known/tdmrep.json`` (W3C TDM Reservation Protocol final report, May
2024, "TDMRep"), fetched once per origin through the polite fetcher, like robots.txt.

TDMRep §4: an agent MUST check the file before it starts on the server's content and keep
it in cache. What each outcome means here:

- 2xx with a JSON array: the rules (:func:`collector.checks.reservations.parse_tdmrep`);
- 404 or another 4xx: no file, no rules ("failure to provide access to such a
  representation implies that the origin server does not implement this protocol", §3.1);
- 5xx, 429, a timeout or a broken connection: UNKNOWN. The file is asked for again after
  ``retry`` seconds (5 minutes, as for an unreachable robots.txt) and in every later run; the
  run decides what happens to the items meanwhile (``[reservations] when_unknown``);
- a body that is not a JSON array, over MAX_TDMREP_BYTES, with too many rules, or a redirect
  loop: UNUSABLE, treated as no file (§3.1 as above), and the ledger says so;
- robots.txt forbidding the file (or unreachable): NOT_READ, treated as no file and asked
  again like UNKNOWN (every request to that origin is judged by robots.txt anyway).

A known answer is kept for 24 hours (the robots.txt rule of RFC 9309 §2.4, common practice for
this file, no source) in memory and in the ledger's ``hosts`` row, so a resumed run does not
ask again.
"""

from __future__ import annotations

import threading
import time
from dataclasses import dataclass
from typing import Any
from urllib.parse import urlsplit, urlunsplit

from collector.checks.reservations import (
    MAX_TDMREP_BYTES,
    TdmFileUnusable,
    TdmRules,
    parse_tdmrep,
)
from collector.errors import FetchError, HostParked, RobotsDenied, TooLarge, UnsafeURL
from collector.storage.row_codec import epoch_of, iso_time
from collector.urls import host_key

TDMREP_PATH = "/.well-known/tdmrep.json"
TDMREP_TTL = 24 * 3600.0
UNKNOWN_RETRY = 300.0
RULES, NO_FILE, UNKNOWN, UNUSABLE = "rules", "no file", "unknown", "unusable"
NOT_READ = "not read"  # robots.txt kept us from it: no file for now, asked again later


@dataclass(frozen=True)
class TdmFile:
    """What one origin's tdmrep.json said when it was fetched."""

    url: str
    state: str  # RULES | NO_FILE | UNKNOWN | UNUSABLE
    fetched_at: float
    status: int | None = None
    detail: str = ""
    rules: TdmRules | None = None
    body: str | None = None

    def is_fresh(self, now: float) -> bool:
        """Whether the answer may still be used at epoch ``now``."""
        age = now - self.fetched_at
        return 0 <= age < (UNKNOWN_RETRY if self.state in (UNKNOWN, NOT_READ) else TDMREP_TTL)


def tdmrep_url(url: str) -> str:
    """The tdmrep.json URL of ``url``'s origin (scheme, host and port)."""
    parts = urlsplit(url)
    return urlunsplit((parts.scheme, parts.netloc.rsplit("@", 1)[-1], TDMREP_PATH, "", ""))


def classify(status: int | None, body: bytes | None, reason: str, url: str,
             now: float) -> TdmFile:
    """The TdmFile for one fetch outcome: a 2xx body, or the failure's status and reason."""
    if body is not None:
        try:
            rules = parse_tdmrep(body)
        except TdmFileUnusable as exc:
            return TdmFile(url, UNUSABLE, now, status, f"{exc}; treated as no file")
        text = body.decode("utf-8-sig", errors="replace")
        return TdmFile(url, RULES, now, status, f"{len(rules.rules)} rule(s)", rules, text)
    if reason == "too_large":
        return TdmFile(url, UNUSABLE, now, status,
                       f"over {MAX_TDMREP_BYTES:,} bytes; treated as no file")
    if reason.startswith("robots_"):
        # robots.txt forbids the file (or cannot be read): the origin's other requests are
        # judged by robots.txt as well; no file for now, asked again later.
        return TdmFile(url, NOT_READ, now, status, f"not read ({reason}); treated as no file")
    if reason in ("redirect_blocked", "unsafe_url"):
        return TdmFile(url, UNUSABLE, now, status, f"not readable ({reason}); treated as no file")
    if status is not None and 400 <= status < 500 and status != 429:
        return TdmFile(url, NO_FILE, now, status, f"HTTP {status}: no file")
    return TdmFile(url, UNKNOWN, now, status,
                   f"{reason}: could not be read; asked again later")


class TdmRepFiles:
    """The tdmrep.json of every origin a run touches; thread-safe, one fetch per origin."""

    def __init__(self, fetcher: Any, ledger: Any | None, clock: Any = time.time) -> None:
        self.fetcher, self.ledger, self.clock = fetcher, ledger, clock
        self._files: dict[str, TdmFile] = {}
        self._locks: dict[str, threading.Lock] = {}
        self._lock = threading.Lock()

    def for_url(self, url: str) -> TdmFile:
        """The tdmrep.json answer of ``url``'s origin (fetched when not fresh)."""
        target = tdmrep_url(url)
        with self._lock:
            lock = self._locks.setdefault(target, threading.Lock())
        with lock:
            now = self.clock()
            cached = self._files.get(target) or self._stored(url, target)
            if cached is not None and cached.is_fresh(now):
                self._files[target] = cached
                return cached
            found = self._fetch(target, now)
            self._files[target] = found
            self._store(url, found)
            return found

    def _fetch(self, target: str, now: float) -> TdmFile:
        try:
            page = self.fetcher.get_page(target, purpose="tdmrep", max_bytes=MAX_TDMREP_BYTES)
        except HostParked:
            raise  # the host itself is parked: its items are deferred anyway
        except TooLarge:
            return classify(None, None, "too_large", target, now)
        except RobotsDenied as exc:
            return classify(None, None, exc.reason, target, now)
        except UnsafeURL:
            return classify(None, None, "unsafe_url", target, now)
        except FetchError as exc:
            return classify(exc.status, None, exc.reason, target, now)
        return classify(page.status, page.body, "", target, now)

    def _stored(self, url: str, target: str) -> TdmFile | None:
        if self.ledger is None:
            return None
        row = self.ledger.get_host(host_key(url)) or {}
        fetched = epoch_of(row.get("tdmrep_fetched_at"))
        if row.get("tdmrep_url") != target or fetched is None:
            return None
        if row.get("tdmrep_state") not in (RULES, NO_FILE, UNUSABLE):
            return None  # unknown (or not ours): every new run asks again
        body = row.get("tdmrep_body")
        rules = None
        if row.get("tdmrep_state") == RULES:
            try:
                rules = parse_tdmrep((body or "").encode())
            except TdmFileUnusable:
                return None
        return TdmFile(target, row.get("tdmrep_state") or UNKNOWN, fetched,
                       row.get("tdmrep_status"), row.get("tdmrep_detail") or "", rules, body)

    def _store(self, url: str, found: TdmFile) -> None:
        if self.ledger is None:
            return
        self.ledger.put_host(host_key(url), tdmrep_url=found.url,
                             tdmrep_fetched_at=iso_time(found.fetched_at),
                             tdmrep_state=found.state, tdmrep_status=found.status,
                             tdmrep_detail=found.detail, tdmrep_body=found.body)
