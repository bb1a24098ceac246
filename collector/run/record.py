"""What a run writes down about itself: item outcomes, counts and progress events, with the
recipe's secrets kept out of all of them.

Shared by the scheduling (:mod:`collector.run.scheduling`) and the ingest
(:mod:`collector.run.ingest`): both finish items through one :class:`RunRecord`.
"""

from __future__ import annotations

import json
import threading
from collections import Counter
from typing import Any, Protocol

from collector.config.recipe import Recipe
from collector.errors import CollectorError, FetchError, HostParked, LedgerError
from collector.safe_text import escaped_surrogates
from collector.schema import expand_env
from collector.storage.ledger import Ledger
from collector.urls import (
    MIN_SECRET_LEN,
    header_secrets,
    is_secret_header,
    redact,
    scrub,
)


class Progress(Protocol):
    """Receives run events; the CLI renders them (live display, plain lines or JSON)."""

    def event(self, kind: str, **data: Any) -> None: ...


class NullProgress:
    """Progress sink that ignores everything (library use, tests)."""

    def event(self, kind: str, **data: Any) -> None:
        """Ignore the event."""


class RunRecord:
    """The run's id, its counts by state and its progress sink; every item outcome of the run
    goes through :meth:`finish`. Thread-safe."""

    def __init__(self, ledger: Ledger, progress: Progress, secrets: list[str]) -> None:
        self.ledger, self.progress, self.secrets = ledger, progress, secrets
        self.run_id = 0
        self.counts: Counter[str] = Counter()
        self._lock = threading.Lock()

    def finish(self, item_id: int, state: str, reason: str | None, detail: str | None,
               **fields: Any) -> None:
        """Record an item's outcome in this run, count it and tell the progress sink."""
        self.ledger.update_item(item_id, state=state, reason=reason, detail=detail,
                                run_id=self.run_id, **fields)
        self.count(state)
        self.progress.event("item", item_id=item_id, state=state, reason=reason)

    def not_admitted(self, source_id: int, source_key: str, exc: Exception,
                     keep: frozenset[str]) -> None:
        """Admitting one listed candidate raised ``exc``: its item gets the state and reason
        :func:`admission_outcome` gives (a row holding only its key when it had none), so
        the next run tries it again; an item already in a state of ``keep`` (stored, ...)
        keeps it and a ``not_admitted`` note says why it was not looked at again."""
        state, reason, detail = admission_outcome(exc)
        detail = self.scrubbed(detail)
        row = self.ledger.item_by_key(source_id, source_key)
        if row is not None and row["state"] in keep:
            self.ledger.add_note("not_admitted", f"item {row['id']} ({source_key}) keeps its "
                                 f"state {row['state']}: {detail}", run_id=self.run_id,
                                 source_id=source_id)
            return
        item_id = (row["id"] if row is not None
                   else self.ledger.add_item(source_id, source_key, {"run_id": self.run_id}))
        self.finish(item_id, state, reason, detail)

    def count(self, key: str) -> None:
        """Add one to a count (a state, or "already_done", "given_up")."""
        with self._lock:
            self.counts[key] += 1

    def recount(self, was: str | None, now: str) -> None:
        """An item counted under ``was`` changed to ``now``."""
        with self._lock:
            if was:
                self.counts[was] -= 1
            self.counts[now] += 1

    def scrubbed(self, text: str) -> str:
        """``text`` with the recipe's secret values replaced."""
        return scrub(text, self.secrets) if self.secrets else text

    def scrubbed_fields(self, fields: dict[str, Any], params: tuple[str, ...]) -> dict[str, Any]:
        """Item fields with secret params redacted from URLs and secret values from text."""
        out = dict(fields)
        for key in ("image_url", "page_url", "licence_url"):
            if out.get(key):
                out[key] = redact(out[key], params)
        if self.secrets:
            for key, value in out.items():
                if isinstance(value, str):
                    out[key] = scrub(value, self.secrets)
                elif key == "metadata" and value:
                    out[key] = json.loads(scrub(json.dumps(value, default=str), self.secrets))
        return out


def admission_outcome(exc: Exception) -> tuple[str, str, str]:
    """(state, reason, detail) of an item whose admission raised ``exc``: deferred when its
    host is parked, failed with the request's reason, ``ledger_error`` (its row could not be
    written), ``not_admitted`` (another error collector explains) or ``internal_error`` (a
    bug: the run fails after the item's group is admitted)."""
    if isinstance(exc, HostParked):
        state, reason, detail = "deferred", "host_parked", exc.item_detail()
    elif isinstance(exc, FetchError):
        state, reason, detail = "failed", exc.reason, exc.item_detail()
    elif isinstance(exc, LedgerError):
        state, reason, detail = "failed", "ledger_error", f"its row could not be written: {exc}"
    elif isinstance(exc, CollectorError):
        state, reason, detail = "failed", "not_admitted", str(exc)
    else:
        state, reason, detail = "failed", "internal_error", (
            f"internal error while admitting it ({type(exc).__name__}: {exc}); the run "
            "failed, its traceback is in the folder's errors.log")
    # An error may quote the bad value itself (a lone surrogate): kept storable as text.
    return state, reason, escaped_surrogates(detail)[0]


def secret_values(recipe: Recipe) -> list[str]:
    """The run-time values of the recipe's secrets: params listed in a source's
    secret_params, and secret headers (also their last word, so "Bearer <token>" hides the
    token)."""
    found: list[str] = []
    listed = tuple(recipe.network.secret_headers)
    everywhere = list(recipe.network.secret_params)
    for src in recipe.sources:
        params = src.get("params") or {}
        found += [expand_env(str(params[n]))
                  for n in [*(src.get("secret_params") or ()), *everywhere] if n in params]
    for headers in [recipe.network.headers,
                    *(src.get("headers") or {} for src in recipe.sources)]:
        for name, value in headers.items():
            if is_secret_header(name, listed):
                found += header_secrets(expand_env(str(value)))
    return sorted({v for v in found if len(v) >= MIN_SECRET_LEN}, key=len, reverse=True)
