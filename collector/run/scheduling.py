"""The scheduling of one run: listing threads, per-host queues and workers, stop rules, the
run loop (SIGTERM, drain) and how the run ended.

Sources are listed in their own threads; every candidate goes through
:meth:`collector.run.ingest.Ingest.admit` (registered, licence decided) *before* any image byte
is requested. Work that needs the network goes into a queue per host, served by that host's
own worker threads (as many as its ``max_connections``), so fifty slow hosts do not take fifty
times as long while no host ever exceeds its budget: the one fetcher enforces the budget, the
queues only keep hosts independent. Local scans are ingested in the source's thread.

Any exception that is not the archive's fault, in any thread, ends the run
``failed: internal error in <where>`` (exit 1), with the traceback in the ledger notes and in
the collection folder's error log; never ``finished``.
"""

from __future__ import annotations

import contextlib
import hashlib
import json
import queue
import signal
import threading
import time
import traceback
from collections import Counter
from collections.abc import Iterable, Mapping
from dataclasses import dataclass, field
from datetime import datetime, timedelta
from pathlib import Path
from typing import Any, Protocol

from collector import __version__
from collector import sources as adapters
from collector.config.recipe import Recipe
from collector.config.stop_times import check_stop_options, parse_clock, parse_duration
from collector.errors import (
    CollectorError,
    FetchError,
    HostParked,
    InternalError,
    LedgerError,
    RobotsDenied,
    StoreError,
    TooLarge,
    UnsafeURL,
)
from collector.run.ingest import Ingest, Job
from collector.run.listed import AdmissionFailed, ListedGroup
from collector.run.record import NullProgress, Progress, RunRecord, secret_values
from collector.run.reservations import ReservationGate
from collector.sources.base import ListingState, PageFetcher
from collector.storage import queries
from collector.storage.collection import Collection
from collector.storage.ledger import Ledger, utc_now
from collector.storage.ledger_repair import backup_ledger
from collector.urls import host_key


class Downloaded(Protocol):
    """What the run reads of a finished download (see collector.fetching.fetcher.Download)."""

    final_url: str
    path: Path | None
    sha256: str | None
    content_type: str | None


class ImageFetcher(PageFetcher, Protocol):
    """The one polite fetcher as the run uses it: pages for the adapters (PageFetcher) and
    image downloads into the store's incoming folder. A fetcher with a ``run_id`` attribute
    gets the run's id (its fetches rows name the run)."""

    def download(self, url: str, dest_dir: Path, *, item_id: int | None = None,
                 etag: str | None = None, last_modified: str | None = None,
                 secret_params: Iterable[str] = ()) -> Downloaded: ...

    def close(self) -> None: ...


class HostDispatch(Protocol):
    """Where image jobs go instead of the local per-host workers: a cluster
    (collector.run.cluster.ClusterDispatch). ``attach`` is called by the Gatherer it serves;
    ``put`` hands over a job of a host; ``finish`` waits until every job put is settled."""

    def attach(self, gatherer: Gatherer) -> None: ...

    def put(self, host: str, job: Job) -> None: ...

    def finish(self) -> None: ...


@dataclass(frozen=True)
class StopRules:
    """When a run stops on its own: an epoch deadline and/or a number of newly stored items."""

    deadline: float | None = None
    max_items: int = 0


def stop_rules(recipe: Recipe, *, until: str | None = None, duration: str | None = None,
               max_items: int | None = None, now: datetime | None = None) -> StopRules:
    """Combine the recipe's [stop] table with command-line options (options win). Unreadable
    options raise StopOptionsError (the recipe's own values were checked when it loaded)."""
    check_stop_options(until, duration, max_items)
    now = now or datetime.now().astimezone()
    deadlines: list[float] = []
    until = until if until is not None else recipe.stop.until
    duration = duration if duration is not None else recipe.stop.duration
    if until:
        at = datetime.combine(now.date(), parse_clock(until), tzinfo=now.tzinfo)
        if at <= now:
            at += timedelta(days=1)  # "--until 07:00" in the evening means tomorrow
        deadlines.append(at.timestamp())
    if duration:
        deadlines.append(now.timestamp() + parse_duration(duration))
    limit = max_items if max_items is not None else recipe.stop.max_items
    return StopRules(min(deadlines) if deadlines else None, int(limit or 0))


@dataclass
class HostStats:
    """Live counters of one host for the progress display."""

    queued: int = 0
    done: int = 0
    errors: int = 0
    parked: bool = False


@dataclass
class RunResult:
    """How a run ended."""

    run_id: int
    outcome: str  # finished | stopped: <why> | interrupted | failed: <why>
    counts: Counter[str] = field(default_factory=Counter)
    terminated: bool = False  # interrupted by SIGTERM rather than Ctrl-C (SIGINT)
    backup: Path | None = None  # the ledger backup written at the end of the run
    backup_error: str | None = None  # why no backup could be written

    @property
    def exit_code(self) -> int:
        """0 finished or stopped by a rule, 130 interrupted (Ctrl-C), 143 terminated
        (SIGTERM; 128 + signal number, common practice, no source), 1 failed."""
        if self.outcome == "interrupted":
            return 143 if self.terminated else 130
        return 1 if self.outcome.startswith("failed") else 0


def config_sha256(source: Mapping[str, Any]) -> str:
    """SHA-256 of a source table's canonical JSON: what a remembered listing state belongs to."""
    text = json.dumps(source, sort_keys=True, separators=(",", ":"), default=str)
    return hashlib.sha256(text.encode("utf-8")).hexdigest()


class Terminated(KeyboardInterrupt):
    """SIGTERM arrived: the run ends like a Ctrl-C (files in flight finished, run marked
    interrupted)."""


def _raise_terminated(signum: int, frame: Any) -> None:
    raise Terminated()


@dataclass(frozen=True)
class _Note:
    kind: str
    url: str | None
    message: str


def _import_before_threads() -> None:
    """Import the scipy submodules the run's threads use (the pHash's DCT, the scan
    splitter's ndimage and spatial) here, before any thread starts: first imports of two scipy
    submodules from two threads at once can fail inside scipy ("partially initialized module",
    its submodules import each other), which ended demo gathers as internal errors."""
    import scipy.fft
    import scipy.ndimage
    import scipy.spatial  # noqa: F401


class Gatherer:
    """One run of a recipe over a collection. Create, then call :meth:`run`."""

    def __init__(self, collection: Collection, recipe: Recipe, ledger: Ledger,
                 fetcher: ImageFetcher | None, *, stop: StopRules = StopRules(),
                 progress: Progress | None = None, dispatch: HostDispatch | None = None,
                 ) -> None:
        self.collection, self.recipe, self.ledger, self.fetcher = (
            collection, recipe, ledger, fetcher)
        self.store = collection.store
        self.stop = stop
        self.progress: Progress = progress or NullProgress()
        attach = getattr(self.progress, "attach", None)
        if attach is not None:
            attach(self)  # a live view polls the per-host numbers
        self.stop_event = threading.Event()
        self.stop_reason = ""
        self.fatal: CollectorError | None = None
        self.hosts: dict[str, HostStats] = {}
        self._queues: dict[str, queue.Queue[Job | None]] = {}
        self._workers: list[threading.Thread] = []
        self._lock = threading.RLock()
        self._stored_this_run = 0
        self._reached: dict[int, str] = {}  # source id -> what its complete listing remembered
        self._source_ids = [ledger.source_id(src["name"], src["kind"], src,
                                             tuple(src.get("former_names") or ()))
                            for src in recipe.sources]
        self._config_sha = {sid: config_sha256(src)
                            for src, sid in zip(recipe.sources, self._source_ids, strict=True)}
        self.record = RunRecord(ledger, self.progress, secret_values(recipe))
        self.gate = ReservationGate(recipe, ledger, fetcher, self.record, self._source_ids)
        self.ingest = Ingest(collection, recipe, ledger, self.record, self._source_ids,
                             on_stored=self._stored_one, gate=self.gate)
        self.dispatch = dispatch
        if dispatch is not None:
            dispatch.attach(self)

    @property
    def run_id(self) -> int:
        """The ledger id of this run (0 before :meth:`run` starts it)."""
        return self.record.run_id

    @run_id.setter
    def run_id(self, value: int) -> None:
        self.record.run_id = value

    @property
    def counts(self) -> Counter[str]:
        """Items by outcome in this run (plus "already_done" and "given_up")."""
        return self.record.counts

    # -- stopping ----------------------------------------------------------------------------
    def request_stop(self, why: str) -> None:
        """Ask every thread to finish what it holds and stop taking new work."""
        with self._lock:
            if not self.stop_event.is_set():
                self.stop_reason = why
                self.stop_event.set()
                self.progress.event("stopping", why=why)

    def _should_stop(self) -> bool:
        if self.stop.deadline is not None and time.time() >= self.stop.deadline:
            self.request_stop("stopped: the time limit was reached")
        return self.stop_event.is_set()

    def _stored_one(self) -> None:
        """A file was stored: the max-items rule may fire."""
        with self._lock:
            self._stored_this_run += 1
            if self.stop.max_items and self._stored_this_run >= self.stop.max_items:
                self.request_stop(f"stopped: {self.stop.max_items} new items stored")

    # -- the run -----------------------------------------------------------------------------
    def run(self, options: dict[str, Any] | None = None) -> RunResult:
        """Run every source to the end or until a stop rule fires. SIGTERM is handled like
        Ctrl-C while the run lasts (when called from the main thread)."""
        self._start(options)  # a SIGTERM before the handler ends the process as usual
        on_main = threading.current_thread() is threading.main_thread()
        previous = signal.signal(signal.SIGTERM, _raise_terminated) if on_main else None
        try:
            return self._run()
        finally:
            if on_main:
                signal.signal(signal.SIGTERM, previous)

    def _start(self, options: dict[str, Any] | None) -> None:
        """The slow first imports and the run's row (and its recipe text), before SIGTERM is
        handled: one arriving now ends the process, and the next run marks this one killed."""
        _import_before_threads()
        self.run_id = self.ledger.start_run(self.recipe.sha256, options or {}, __version__)
        if self.recipe.text:  # recipe history: the text once per sha256, secrets hidden
            self.ledger.add_row("recipes", {"sha256": self.recipe.sha256,
                                            "text": self.recipe.kept_text(),
                                            "first_used_at": utc_now()})
        if self.fetcher is not None and hasattr(self.fetcher, "run_id"):
            self.fetcher.run_id = self.run_id  # its fetches rows name the run

    def _run(self) -> RunResult:
        threads: list[threading.Thread] = []
        outcome = "finished"
        terminated = False
        try:  # first: a SIGTERM from here on ends the run like Ctrl-C
            self.progress.event("run_started", run_id=self.run_id)
            threads = [threading.Thread(target=self._list_source, args=(src, sid),
                                        daemon=True, name=f"source-{src['name']}")
                       for src, sid in zip(self.recipe.sources, self._source_ids,
                                           strict=True)]
            for t in threads:
                t.start()
            self._wait(threads)
            if self.dispatch is not None:
                self.dispatch.finish()
            for q in list(self._queues.values()):
                q.put(None)  # no more work: each worker ends after its queue drains
            self._wait(self._workers)
            self._keep_listing_states()
        except KeyboardInterrupt as exc:
            terminated = isinstance(exc, Terminated)
            self.request_stop("interrupted")
            self._drain(threads)
        except Exception as exc:
            self._internal_error("the run's main thread", exc)
            self._drain(threads)
        if self.fatal is not None:
            outcome = f"failed: {self.fatal}"
        elif self.stop_event.is_set():
            outcome = self.stop_reason
        self.ledger.end_run(self.run_id, outcome)
        backup, backup_error = self._backup()
        self.progress.event("run_ended", outcome=outcome)
        return RunResult(self.run_id, outcome, self.counts, terminated=terminated,
                         backup=backup, backup_error=backup_error)

    def _drain(self, threads: list[threading.Thread]) -> None:
        """After a stop: let every worker finish what it holds, then return."""
        for q in list(self._queues.values()):
            q.put(None)
        while True:  # a signal arriving now must not leave threads behind
            try:
                self._wait(self._workers + threads, interruptible=False)
                if self.dispatch is not None:
                    self.dispatch.finish()
                return
            except KeyboardInterrupt:
                continue

    def _internal_error(self, where: str, exc: BaseException, item_id: int | None = None) -> None:
        """A bug (not the archive's fault): the item in hand fails with reason
        ``internal_error``, the traceback goes to the ledger notes and the folder's error log,
        and the run stops and ends ``failed: internal error in <where>`` (exit 1)."""
        trace = self.record.scrubbed("".join(traceback.format_exception(exc)))
        log_path = str(self.collection.error_log_path)
        error = InternalError(where, exc, log_path)
        with contextlib.suppress(Exception):  # reporting a bug must not hide it
            self.collection.append_error_log(
                f"--- {utc_now()} run {self.run_id}: internal error in {where}\n{trace}")
        with contextlib.suppress(Exception):
            self.ledger.add_note("internal_error", f"{error}\n{trace}", run_id=self.run_id)
        if item_id is not None:
            with contextlib.suppress(Exception):
                self.record.finish(item_id, "failed", "internal_error", str(error))
        with self._lock:
            if self.fatal is None:
                self.fatal = error
        self.request_stop(f"failed: {error}")

    def _fail(self, exc: CollectorError) -> None:
        """The disk or the ledger failed: nothing can go on."""
        self.fatal = exc
        self.request_stop(f"failed: {exc}")

    def _backup(self) -> tuple[Path | None, str | None]:
        """Copy the ledger into ledger-backups/ (whatever the outcome); a failure is a note,
        not a failed run: the run's own records are already committed."""
        try:
            return backup_ledger(self.collection, self.ledger, self.run_id), None
        except (CollectorError, OSError) as exc:
            message = f"no ledger backup was written: {exc}"
            with contextlib.suppress(CollectorError):
                self.ledger.add_note("backup_failed", message, run_id=self.run_id)
            self.progress.event("note", source="ledger", note="backup_failed", message=message)
            return None, message

    @staticmethod
    def _wait(threads: list[threading.Thread], *, interruptible: bool = True) -> None:
        for t in threads:
            while t.is_alive():
                t.join(0.2 if interruptible else None)

    # -- listing -----------------------------------------------------------------------------
    def _list_source(self, source: Mapping[str, Any], source_id: int) -> None:

        def note(n: Any) -> None:
            self.ledger.add_note(n.kind, n.message, url=n.url, run_id=self.run_id,
                                 source_id=source_id)
            self.progress.event("note", source=source["name"], note=n.kind, message=n.message)

        state = ListingState(queries.listing_state(self.ledger, source_id,
                                                  self._config_sha[source_id]))
        try:
            # The page fetcher notes reservation signals; candidates are admitted in groups.
            listed = ListedGroup(self, source_id, self.gate.watching(self.fetcher, source_id))
            try:
                for candidate in adapters.iter_candidates(source, listed.fetcher, note,
                                                          self.collection.root, state):
                    if self._should_stop():
                        break
                    listed.add(candidate)
                else:
                    if state.reached is not None:
                        with self._lock:
                            self._reached[source_id] = state.reached
            except AdmissionFailed as failed:
                raise failed.args[0] from None
            except CollectorError as exc:
                if not isinstance(exc, (StoreError, LedgerError)):
                    listed.flush()  # what was listed before the listing stopped is admitted
                raise
            listed.flush()
        except HostParked as exc:
            note(_Note("host_parked", exc.url, str(exc)))
        except (StoreError, LedgerError) as exc:  # the disk or the ledger: nothing can go on
            self._fail(exc)
        except FetchError as exc:
            note(_Note(exc.reason, exc.url, f"listing stopped: {exc}"))
        except CollectorError as exc:
            note(_Note("source_error", None, str(exc)))
        except Exception as exc:  # a bug, not the archive's fault: the run fails loudly
            self._internal_error(f"the listing of source {source['name']!r}", exc)

    def _keep_listing_states(self) -> None:
        """After every worker is done: keep what each complete listing remembered (see
        sources.base.ListingState), unless the run is stopping or items of the source are
        left to try again, which a listing of changes only would not bring back."""
        if self.stop_event.is_set() or self.fatal is not None:
            return
        for source_id, value in self._reached.items():
            left = queries.unsettled_items(self.ledger, source_id, self.run_id)
            if left:
                self.ledger.add_note(
                    "listing_state_kept", f"{left} item(s) of this source are to be tried "
                    "again, so the next run lists from the same point as this one",
                    run_id=self.run_id, source_id=source_id)
                continue
            self.ledger.set_listing_state(source_id, value, self._config_sha[source_id],
                                          self.run_id)

    def _register(self, source_id: int, c: Any) -> None:
        """Admit one candidate (:meth:`Ingest.admit`); an image to fetch goes to its host."""
        job = self.ingest.admit(source_id, c)
        if job is not None:
            self._enqueue(job)

    # -- per-host workers --------------------------------------------------------------------
    def _enqueue(self, job: Job) -> None:
        try:
            host = host_key(job.url)
        except CollectorError as exc:
            self.record.finish(job.item_id, "failed", "unsafe_url", str(exc))
            self.ingest.settle(job)
            return
        if self.dispatch is not None:  # a cluster serves the hosts
            with self._lock:
                self.hosts.setdefault(host, HostStats()).queued += 1
            self.dispatch.put(host, job)
            return
        with self._lock:
            q = self._queues.get(host)
            if q is None:
                q = self._queues[host] = queue.Queue()
                self.hosts[host] = HostStats()
                for n in range(self.recipe.budget_for(host).max_connections):
                    t = threading.Thread(target=self._host_worker, args=(host, q), daemon=True,
                                         name=f"host-{host}-{n}")
                    self._workers.append(t)
                    t.start()
            self.hosts[host].queued += 1
        q.put(job)

    def _host_worker(self, host: str, q: queue.Queue[Job | None]) -> None:
        try:
            self._serve_host(host, q)
        except Exception as exc:  # a bug outside any one job: the run fails loudly
            self._internal_error(f"the worker for host {host}", exc)

    def _serve_host(self, host: str, q: queue.Queue[Job | None]) -> None:
        stats = self.hosts[host]
        while True:
            job = q.get()
            if job is None:
                q.put(None)  # let the host's other workers see the end too
                return
            stats.queued -= 1
            try:
                self._serve_job(host, stats, job)
            finally:
                self.ingest.settle(job)  # items listing the same image URL take its outcome

    def _serve_job(self, host: str, stats: HostStats, job: Job) -> None:
        if self._should_stop():
            return  # left pending: the next run picks it up
        if stats.parked:
            self.record.finish(job.item_id, "deferred", "host_parked",
                               f"{host} was parked earlier in this run")
            return
        try:
            self._fetch_and_ingest(job)
        except HostParked as exc:
            stats.parked = True
            self.record.finish(job.item_id, "deferred", "host_parked", exc.item_detail())
        except (StoreError, LedgerError) as exc:
            self._fail(exc)
        except Exception as exc:  # a bug while handling this job: it fails, the run stops
            self._internal_error(f"the worker for host {host}", exc, item_id=job.item_id)
        stats.done += 1

    def _fetch_and_ingest(self, job: Job) -> None:
        if self.fetcher is None:
            raise RuntimeError("this run has no fetcher, yet an image needs one")
        refusal = self.gate.before_image(job.item_id, job.url)  # before any image byte
        if refusal is not None:
            self.record.finish(job.item_id, refusal.state, refusal.reason, refusal.detail,
                               reservation_checks=self.gate.checks(job.item_id))
            return
        try:
            download = self.fetcher.download(job.url, self.store.incoming_dir,
                                             item_id=job.item_id,
                                             secret_params=job.secret_params)
        except RobotsDenied as exc:
            self.record.finish(job.item_id, "blocked", exc.reason, exc.item_detail())
            return
        except HostParked:
            raise
        except UnsafeURL as exc:
            self.record.finish(job.item_id, "failed", exc.reason, exc.item_detail())
            return
        except TooLarge as exc:
            self.record.finish(job.item_id, "rejected", "too_large",
                               f"{exc.size_text or 'the body'}, above network.max_image_bytes"
                               f" = {exc.limit:,}: {exc.url}")
            return
        except FetchError as exc:
            self.hosts[host_key(job.url)].errors += 1
            self.record.finish(job.item_id, "failed", exc.reason, exc.item_detail())
            return
        if download.path is None or download.sha256 is None:
            raise RuntimeError(f"the fetcher returned no file for {job.url}")
        refusal = self.gate.after_download(job.item_id, download.final_url,
                                           getattr(download, "headers", {}))
        if refusal is not None:  # reserved in the image's own header fields: not kept
            download.path.unlink(missing_ok=True)
            self.record.finish(job.item_id, refusal.state, refusal.reason, refusal.detail,
                               reservation_checks=self.gate.checks(job.item_id))
            return
        self.ingest.ingest_file(job.item_id, job.spdx_id, download.path, download.sha256,
                                content_type=download.content_type, url=download.final_url,
                                reservation_checks=self.gate.checks(job.item_id))
