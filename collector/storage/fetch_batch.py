"""Fetch rows committed in batches: the bookkeeping of :meth:`Ledger.record_fetch`.

A ``fetches`` row is written for every request. Committed one by one, the row cost more than
the request itself at a host's pace (a SQLite commit after 100 ms idle, caches cold: about
0.3 ms of the 1.2 ms a request cost at 10 requests/s). So rows are committed in batches:

- the first row of a batch is committed at once, and with it the ledger fact
  :data:`BATCH_FACT` is set to the time (ISO 8601 UTC);
- the rows recorded after it, until :data:`FLUSH_S` seconds after that first row (and at most
  :data:`BATCH_MAX` of them), wait in memory;
- they are committed when the batch is over (a timer), before any other write or read of the
  same ledger (a run's own questions always see every row it made), and at close;
- a clean close removes the fact.

So a killed process loses at most the rows of the :data:`FLUSH_S` seconds after the time in
the fact. The next run reads the fact when it opens the ledger, and :meth:`Ledger.last_contact`
gives every host at least that batch's end: the fetcher (and a cluster task) spaces a host's
first request a full interval after it, so a host whose last request was never recorded still
gets a full interval. ``collector status`` run from another
process sees a running gather's rows at most :data:`FLUSH_S` seconds late.

The ledger calls this class under its lock; it holds no SQL (that stays in ledger.py).
"""

from __future__ import annotations

import threading
import time
from collections.abc import Callable
from datetime import UTC, datetime, timedelta
from typing import Any

FLUSH_S = 1.0  # a row waits in memory at most this long after its batch's first row
BATCH_MAX = 256  # rows kept in memory at most (a busy many-host run commits more often)
BATCH_FACT = "fetch_batch_open_since"  # ledger_facts: when the open batch's first row was made


class FetchBatch:
    """The rows waiting in memory and the open batch's time (not locked: the ledger locks)."""

    def __init__(self, due: Callable[[], None]) -> None:
        self.rows: list[dict[str, Any]] = []
        self.since: float | None = None  # time.monotonic() of the open batch's first row
        self.marked = False  # this ledger set BATCH_FACT (a clean close removes it)
        self._due = due  # called by the timer when the batch is over
        self._timer: threading.Timer | None = None

    def keeps(self, now: float) -> bool:
        """Whether a row recorded at ``now`` may wait in memory: a batch is open, younger
        than FLUSH_S and not full."""
        return (self.since is not None and now - self.since < FLUSH_S
                and len(self.rows) < BATCH_MAX)

    def opened(self, now: float) -> None:
        """A batch's first row was committed at ``now``: the timer ends it FLUSH_S later."""
        self.since = now
        self.marked = True
        if self._timer is None:
            self._start(FLUSH_S)

    def timer_fired(self, now: float) -> None:
        """The timer's end of a batch (after its rows were committed): a batch opened after the
        timer started gets the rest of its time, else the next row opens a new batch."""
        self._timer = None
        if self.since is not None and now - self.since < FLUSH_S:
            self._start(self.since + FLUSH_S - now)
        else:
            self.since = None

    def stop(self) -> None:
        """The ledger closes: no timer outlives it."""
        if self._timer is not None:
            self._timer.cancel()
            self._timer = None
        self.since = None

    def _start(self, seconds: float) -> None:
        timer = threading.Timer(seconds, self._due)
        timer.daemon = True  # a process that exits without closing its ledger does not wait
        self._timer = timer
        timer.start()


def lost_until(opened: str | None) -> str | None:
    """The end (ISO 8601 UTC, the ledger's format) of the batch whose first row was made at
    ``opened`` (the :data:`BATCH_FACT` an earlier process left), or None when there is none."""
    if not opened:
        return None
    try:
        since = datetime.fromisoformat(opened.replace("Z", "+00:00"))
    except ValueError:
        return None
    return ((since + timedelta(seconds=FLUSH_S)).astimezone(UTC)
            .isoformat(timespec="milliseconds").replace("+00:00", "Z"))


def now() -> float:
    """The batches' clock (monotonic, never the injected clock of a test's fetcher)."""
    return time.monotonic()
