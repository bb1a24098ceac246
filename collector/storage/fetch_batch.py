"""Fetch rows committed in batches: the bookkeeping of :meth:`Ledger.record_fetch`.

A ``fetches`` row is written for every request. Committed one by one, the row cost a quarter
of a request's CPU at a host's pace (a SQLite commit after 100 ms idle, caches cold: about
0.3 ms of the 1.2 ms a request cost at 10 requests/s). So rows are committed in batches:

- the first row of a batch is committed at once, and with it the ledger fact
  :data:`BATCH_FACT` is set to the time (ISO 8601 UTC);
- the rows recorded after it, until :data:`FLUSH_S` seconds after that first row (and at most
  :data:`BATCH_MAX` of them), wait in memory;
- they are committed when the batch is over (by the ledger's batch thread), before any other
  write or read of the same ledger (a run's own questions always see every row it made), and
  at close;
- a clean close removes the fact.

So a killed process loses at most the rows of the :data:`FLUSH_S` seconds after the time in
the fact. The next run reads the fact when it opens the ledger, and :meth:`Ledger.last_contact`
gives every host at least that batch's end: the fetcher (and a cluster task) spaces a host's
first request a full interval after it, so a host whose last request was never recorded still
gets a full interval. ``collector status`` run from another process sees a running gather's
rows at most :data:`FLUSH_S` seconds late.

The ledger calls this class under its lock; it holds no SQL (that stays in ledger.py).
"""

from __future__ import annotations

import threading
import time
from collections.abc import Callable
from typing import Any

from collector.storage.row_codec import epoch_of, iso_time

FLUSH_S = 1.0  # a row waits in memory at most this long after its batch's first row
BATCH_MAX = 256  # rows kept in memory at most (a busy many-host run commits more often)
BATCH_FACT = "fetch_batch_open_since"  # ledger_facts: when the open batch's first row was made


class FetchBatch:
    """The rows waiting in memory and the open batch's time (not locked: the ledger locks),
    and the thread that ends each batch on time (one per ledger, started with its first
    batch: a thread made per batch cost more than the commits it saved)."""

    def __init__(self, due: Callable[[], None]) -> None:
        self.rows: list[dict[str, Any]] = []
        self.since: float | None = None  # time.monotonic() of the open batch's first row
        self.marked = False  # this ledger set BATCH_FACT (a clean close removes it)
        self._due = due  # the ledger's end of a batch: commit the rows, then call ended()
        self._opened = threading.Event()  # a batch opened: wakes the thread
        self._stopped = threading.Event()
        self._thread: threading.Thread | None = None

    def keeps(self, now: float) -> bool:
        """Whether a row recorded at ``now`` may wait in memory: a batch is open, younger
        than FLUSH_S and not full."""
        return (self.since is not None and now - self.since < FLUSH_S
                and len(self.rows) < BATCH_MAX)

    def opened(self, now: float) -> None:
        """A batch's first row was committed at ``now``: the thread ends it FLUSH_S later."""
        self.since = now
        self.marked = True
        if self._thread is None:
            # daemon: a process that exits without closing its ledger does not wait for it
            self._thread = threading.Thread(target=self._run, name="collector-request-rows",
                                            daemon=True)
            self._thread.start()
        self._opened.set()

    def ended(self, now: float) -> None:
        """The batch's rows were committed at its end: the next row opens a new batch, unless
        one opened meanwhile (a full or late batch): that one keeps its time."""
        if self.since is not None and now - self.since >= FLUSH_S:
            self.since = None

    def stop(self) -> None:
        """The ledger closes: the thread ends."""
        self.since = None
        self._stopped.set()
        self._opened.set()

    def _run(self) -> None:
        while not self._stopped.is_set():
            self._opened.wait()
            self._opened.clear()
            while not self._stopped.is_set():
                since = self.since  # read without the lock: only how long to sleep
                if since is None:
                    break
                left = since + FLUSH_S - now()
                if left > 0:
                    self._stopped.wait(left)
                    continue
                self._due()
                if self.since == since:  # not ended (the ledger closed): never spin on it
                    break


def lost_until(opened: str | None) -> str | None:
    """The end (ISO 8601 UTC, the ledger's format) of the batch whose first row was made at
    ``opened`` (the :data:`BATCH_FACT` an earlier process left), or None when there is none."""
    since = epoch_of(opened)
    return None if since is None else iso_time(since + FLUSH_S)


def now() -> float:
    """The batches' clock (monotonic, never the injected clock of a test's fetcher)."""
    return time.monotonic()
