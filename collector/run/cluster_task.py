"""The worker side of a cluster run: one short task fetches a batch of one host's images.

A task runs on a Dask worker (:mod:`collector.run.cluster` submits it; at most one task per
host is in flight across the cluster, so the host's budget lives in exactly one fetcher at a
time). It builds its own :class:`collector.fetching.fetcher.Fetcher` from the recipe's
settings, so the address guard, robots.txt, budgets, retries and parking apply on every worker
exactly as on one machine. It never opens the ledger: :class:`TaskLedger` stands in for the
four ledger methods the fetcher calls, answers from the host's stored row and last contact
that the coordinator passed in (so robots.txt is not fetched again each batch), and records
``fetches`` rows and host facts, which the task returns for the coordinator to write.

Dask reruns a task whose worker died, and the dead worker's requests never reached the
ledger. With a shared folder a task keeps a journal (:mod:`collector.run.cluster_journal`):
a rerun finds the journal of the earlier attempt, takes the images it finished (no request
again) and waits one full interval before its first request (scale.md lesson 2). A task that
is not a rerun and reads the same clock as the times it was given (``BatchSpec.clock``)
spaces its first request exactly from the host's last contact: the previous task's end
(``HostCarry.not_before``) or the coordinator's own request on record. Otherwise (no shared
folder, another machine's clock, a task lost before) it treats its own start as a contact
and waits one full interval first.

Files go into the collection's incoming folder when the worker sees it (a shared folder:
the coordinator's token file is there), else into a temp folder of the worker and back to the
coordinator as bytes.
"""

from __future__ import annotations

import contextlib
import math
import os
import tempfile
import time
from dataclasses import dataclass, field
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

from collector.errors import (
    FetchError,
    HostParked,
    RobotsDenied,
    StoreError,
    TooLarge,
    UnsafeURL,
)
from collector.fetching.fetcher import Fetcher, FetchSettings
from collector.run.cluster_journal import Journal, clock_id
from collector.storage.row_codec import epoch_of

# A batch is bounded by count and by time (scale.md lesson 3: <= 50 URLs or a few minutes).
MAX_BATCH = 50
BATCH_SECONDS = 10.0  # aimed-at length of a batch at the host's interval
TASK_SECONDS = 120.0  # a task takes no new image after this long (slow downloads, waits)


class OtherHost(Exception):
    """A redirect leads to another host: that host's own task follows it (its budget lives
    there), so the task stops before the hop."""

    def __init__(self, url: str) -> None:
        self.url = url
        super().__init__(url)


def keep_to(host: str) -> Any:
    """A fetcher host check that stops every request to another host than ``host`` (robots.txt
    redirects excepted: RFC 9309 §2.3.1.2 follows them as part of reading the rules)."""

    def check(hk: str, url: str, purpose: str) -> None:
        if hk != host and purpose != "robots":
            raise OtherHost(url)

    return check


def batch_size(interval: float) -> int:
    """How many images one task asks for: about BATCH_SECONDS of the host's interval, 1-50."""
    if interval <= 0:
        return MAX_BATCH
    return max(1, min(MAX_BATCH, math.ceil(BATCH_SECONDS / interval)))


@dataclass(frozen=True)
class HostCarry:
    """What a host's budget learned in earlier tasks of the run and must keep: how often it
    said "slow down" (the interval doubles each time) and when it may be asked again."""

    slowdowns: int = 0
    not_before: float = 0.0  # epoch s: Retry-After, or the interval after the last request
    clock: str | None = None  # the clock not_before is on (clock_id); None: no task yet


@dataclass(frozen=True)
class BatchSpec:
    """One task: a batch of one host's images and what its fetcher needs to know."""

    host: str
    jobs: tuple[tuple[int, str, tuple[str, ...]], ...]  # (item id, image URL, secret params)
    settings: FetchSettings
    run_id: int
    host_row: dict[str, Any] | None  # the ledger's hosts row (robots.txt, parking)
    last_contact: str | None  # the ledger's last contact with the host (ISO 8601 UTC)
    incoming_dir: str
    token: str  # a file in incoming_dir that the coordinator made: the folder is shared
    carry: HostCarry = HostCarry()
    stop_at: float | None = None  # epoch s: the run's time limit; no image is started after
    force_bytes: bool = False  # return files as bytes even when the folder is shared
    journal: str = ""  # the journal's file name in incoming_dir ("": none)
    clock: str = ""  # the clock the given times are on when exact spacing is allowed, else ""


@dataclass
class JobResult:
    """How one image request ended. ``kind``: "file" (downloaded), "finish" (the item's
    state, reason and detail), "parked" (the host is parked), "store" (the disk failed),
    "moved" (redirected to another host: ``final_url`` is the next hop) or "skipped" (not
    attempted: the task ran out of time, or the run's time limit passed)."""

    item_id: int
    kind: str
    state: str | None = None
    reason: str | None = None
    detail: str = ""
    path: str | None = None
    data: bytes | None = None
    sha256: str | None = None
    content_type: str | None = None
    final_url: str | None = None
    headers: dict[str, str] = field(default_factory=dict)  # the image answer's header fields


@dataclass
class BatchResult:
    """What a task returns: per-job outcomes, the ledger writes it owes, the host's carry."""

    host: str
    results: list[JobResult]
    fetches: list[dict[str, Any]]
    host_updates: list[tuple[str, dict[str, Any]]]
    carry: HostCarry
    shared: bool
    worker: str = ""
    seconds: float = 0.0


@dataclass
class TaskLedger:
    """The ledger as a task's fetcher sees it: reads from what the coordinator passed in,
    writes recorded for the coordinator (the one writer of the ledger)."""

    host: str
    host_row: dict[str, Any] | None
    started: float  # epoch s: the task's start counts as a contact (see the module doc)
    last: str | None = None
    exact: bool = False  # the task's host: its last contact only, not the task's start
    fetches: list[dict[str, Any]] = field(default_factory=list)
    host_updates: list[tuple[str, dict[str, Any]]] = field(default_factory=list)

    def get_host(self, host: str) -> dict[str, Any] | None:
        return dict(self.host_row) if host == self.host and self.host_row else None

    def last_contact(self, host: str) -> str | None:
        """The later of the ledger's last contact and the task's start (every host; the
        task's own host without its start when its spacing is exact)."""
        last = epoch_of(self.last) if host == self.host else None
        own = 0.0 if host == self.host and self.exact else self.started
        moment = max(own, last or 0.0)
        if moment <= 0:
            return None
        return datetime.fromtimestamp(moment, UTC).isoformat().replace("+00:00", "Z")

    def put_host(self, host: str, **fields: Any) -> None:
        self.host_updates.append((host, fields))
        if host == self.host:
            self.host_row = {**(self.host_row or {}), **fields}

    def record_fetch(self, **fields: Any) -> int:
        self.fetches.append(fields)
        return len(self.fetches)


def fetch_batch(spec: BatchSpec) -> BatchResult:
    """The task: fetch the batch's images politely; never touches the ledger."""
    began = time.time()
    shared = not spec.force_bytes and os.path.exists(os.path.join(spec.incoming_dir, spec.token))
    journal = Journal(Path(spec.incoming_dir, spec.journal) if shared and spec.journal
                      else None)
    exact = journal.path is not None and not journal.rerun and spec.clock == clock_id() != ""
    ledger = TaskLedger(spec.host, spec.host_row, began, spec.last_contact, exact)
    fetcher = Fetcher(spec.settings, ledger, run_id=spec.run_id)
    fetcher.host_check = keep_to(spec.host)
    _restore(fetcher, spec)
    try:
        with contextlib.ExitStack() as stack:
            dest = (Path(spec.incoming_dir) if shared else
                    Path(stack.enter_context(tempfile.TemporaryDirectory(prefix="collector-"))))
            results = _fetch_jobs(spec, fetcher, ledger, journal, dest, shared, began)
    finally:
        fetcher.close()
        journal.close()
    return BatchResult(spec.host, results, ledger.fetches, ledger.host_updates,
                       _carry(fetcher, spec.host), shared, _worker_name(),
                       time.time() - began)


def _fetch_jobs(spec: BatchSpec, fetcher: Fetcher, ledger: TaskLedger, journal: Journal,
                dest: Path, shared: bool, began: float) -> list[JobResult]:
    """The batch's images in order: taken from an earlier attempt's journal, or fetched and
    journaled; skipped after the host is parked or once the task is late."""
    results: list[JobResult] = []
    parked = False
    for item_id, url, secrets in spec.jobs:
        late = (time.time() - began > TASK_SECONDS
                or (spec.stop_at is not None and time.time() >= spec.stop_at))
        earlier = journal.taken(item_id)
        if earlier is not None:
            ledger.fetches.extend(earlier.fetches)
            ledger.host_updates.extend(earlier.host_updates)
            result = earlier.result
        elif parked or late or journal.collected():
            result = JobResult(item_id, "skipped")
        else:
            rows, hosts = len(ledger.fetches), len(ledger.host_updates)
            result = fetch_one(fetcher, item_id, url, secrets, dest, shared)
            journal.add(result, ledger.fetches[rows:], ledger.host_updates[hosts:])
        parked = parked or result.kind == "parked"
        results.append(result)
    return results


def fetch_one(fetcher: Fetcher, item_id: int, url: str, secrets: tuple[str, ...],
              dest: Path, shared: bool) -> JobResult:
    """One image: the file, or the item's outcome in the words the local run uses
    (collector.run.scheduling.Gatherer._fetch_and_ingest)."""
    try:
        download = fetcher.download(url, dest, item_id=item_id, secret_params=secrets)
    except OtherHost as exc:
        return JobResult(item_id, "moved", final_url=exc.url)
    except RobotsDenied as exc:
        return JobResult(item_id, "finish", "blocked", exc.reason, exc.item_detail())
    except HostParked as exc:
        return JobResult(item_id, "parked", "deferred", "host_parked", exc.item_detail())
    except UnsafeURL as exc:
        return JobResult(item_id, "finish", "failed", exc.reason, exc.item_detail())
    except TooLarge as exc:
        return JobResult(item_id, "finish", "rejected", "too_large",
                         f"{exc.size_text or 'the body'}, above network.max_image_bytes"
                         f" = {exc.limit:,}: {exc.url}")
    except FetchError as exc:
        return JobResult(item_id, "finish", "failed", exc.reason, exc.item_detail())
    except StoreError as exc:
        return JobResult(item_id, "store", detail=str(exc))
    if download.path is None or download.sha256 is None:
        raise RuntimeError(f"the fetcher returned no file for {url}")
    result = JobResult(item_id, "file", sha256=download.sha256,
                       content_type=download.content_type, final_url=download.final_url,
                       headers=dict(download.headers))
    if shared:
        result.path = str(download.path)
    else:
        result.data = download.path.read_bytes()
        download.path.unlink(missing_ok=True)
    return result


def _restore(fetcher: Fetcher, spec: BatchSpec) -> None:
    """Give the new fetcher's budget what earlier tasks learned about the host."""
    for _ in range(spec.carry.slowdowns):
        fetcher.budgets.throttle(spec.host, None, slow_down=True)
    ahead = spec.carry.not_before - time.time()
    if ahead > 0:
        fetcher.budgets.throttle(spec.host, time.monotonic() + ahead, slow_down=False)


def _carry(fetcher: Fetcher, host: str) -> HostCarry:
    """What the next task for the host must keep (see :class:`HostCarry`)."""
    slowdown = float(fetcher.budgets.effective(host).get("slowdown", 1.0))
    slowdowns = round(math.log2(slowdown)) if slowdown > 1.0 else 0
    ahead = fetcher.budgets.wait_time(host)
    return HostCarry(slowdowns, time.time() + ahead if ahead > 0 else 0.0, clock_id())


def _worker_name() -> str:
    """The address of the Dask worker running this task ("" outside a worker)."""
    try:
        from distributed import get_worker

        return str(get_worker().address)
    except (ImportError, ValueError):
        return ""


def worker_facts() -> dict[str, str]:
    """What the coordinator checks on every worker before the run: the same versions."""
    from collector import __version__

    try:
        import distributed
        dask_version = str(distributed.__version__)
    except ImportError:  # pragma: no cover - a worker without distributed cannot run this
        dask_version = ""
    return {"collector": __version__, "distributed": dask_version}
