"""The overnight run behind ``collector gather``.

Sources are listed in their own threads; every candidate is registered in the ledger and its
licence decided *before* any image byte is requested. Work that needs the network goes into a
queue per host, served by that host's own worker threads (as many as its ``max_connections``),
so fifty slow hosts do not take fifty times as long while no host ever exceeds its budget: the
one fetcher enforces the budget, the queues only keep hosts independent. Local scans are
ingested in the source's thread.

Rerunning is resuming: items in a final state are not requested again; ``pending``, ``failed``
and ``deferred`` items are tried again, and licence/robots decisions are re-evaluated.
"""

from __future__ import annotations

import contextlib
import errno
import hashlib
import json
import os
import queue
import signal
import stat
import threading
import time
import traceback
from collections import Counter
from collections.abc import Callable, Iterator
from dataclasses import dataclass, field
from datetime import datetime, timedelta
from pathlib import Path
from typing import Any, BinaryIO, Protocol

from collector import __version__
from collector import sources as adapters
from collector.checks.images import ImageFacts, inspect_image
from collector.checks.licences import licence_allowed, normalise_licence, rights_conflict
from collector.config.recipe import Recipe, env_problems, parse_clock, parse_duration
from collector.errors import (
    CollectorError,
    FetchError,
    HostParked,
    ImageRejected,
    InternalError,
    LedgerError,
    RecipeError,
    RecipeProblem,
    RobotsDenied,
    StoreError,
    TooLarge,
    UnsafeURL,
)
from collector.safe_text import shown_name
from collector.schema import expand_env
from collector.storage.collection import Collection, Recovery, recover
from collector.storage.hashindex import HashIndex, NearMatch, to_signed
from collector.storage.ledger import Ledger, utc_now
from collector.storage.ledger_repair import RECOVERED_FLAG, backup_ledger
from collector.urls import (
    MIN_SECRET_LEN,
    header_secrets,
    host_key,
    is_secret_header,
    redact,
    scrub,
)

# States after which an item is not requested again.
FINAL_STATES = frozenset({"stored", "duplicate", "near_duplicate", "rejected"})
COPY_CHUNK = 1 << 20
# "Not Found" / "Gone" (RFC 9110 sections 15.5.5, 15.5.11) in this many runs ends the retries.
GONE_REASONS = frozenset({"http_404", "http_410"})
GONE_RUNS = 3


class Progress(Protocol):
    """Receives run events; the CLI renders them (live display, plain lines or JSON)."""

    def event(self, kind: str, **data: Any) -> None: ...


class NullProgress:
    """Progress sink that ignores everything (library use, tests)."""

    def event(self, kind: str, **data: Any) -> None:
        """Ignore the event."""


@dataclass(frozen=True)
class StopRules:
    """When a run stops on its own: an epoch deadline and/or a number of newly stored items."""

    deadline: float | None = None
    max_items: int = 0


def stop_rules(recipe: Recipe, *, until: str | None = None, duration: str | None = None,
               max_items: int | None = None, now: datetime | None = None) -> StopRules:
    """Combine the recipe's [stop] table with command-line options (options win)."""
    now = now or datetime.now().astimezone()
    deadlines: list[float] = []
    until = until if until is not None else recipe.stop.until
    duration = duration if duration is not None else recipe.stop.duration
    try:
        if until:
            at = datetime.combine(now.date(), parse_clock(until), tzinfo=now.tzinfo)
            if at <= now:
                at += timedelta(days=1)  # "--until 07:00" in the evening means tomorrow
            deadlines.append(at.timestamp())
        if duration:
            deadlines.append(now.timestamp() + parse_duration(duration))
    except ValueError as exc:
        raise RecipeError([RecipeProblem("command line", "--until/--for",
                                         f"cannot read {exc.args[0]!r}: use HH:MM and e.g. 8h")]
                          ) from exc
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


class Terminated(KeyboardInterrupt):
    """SIGTERM arrived: the run ends like a Ctrl-C (files in flight finished, run marked
    interrupted)."""


def _raise_terminated(signum: int, frame: Any) -> None:
    raise Terminated()


@dataclass
class Job:
    """One image to fetch for one item."""

    item_id: int
    url: str
    spdx_id: str | None
    secret_params: tuple[str, ...] = ()


class Gatherer:
    """One run of a recipe over a collection. Create, then call :meth:`run`."""

    def __init__(self, collection: Collection, recipe: Recipe, ledger: Ledger, fetcher: Any,
                 *, stop: StopRules = StopRules(), progress: Progress | None = None) -> None:
        self.collection, self.recipe, self.ledger, self.fetcher = (
            collection, recipe, ledger, fetcher)
        self.store = collection.store
        self.stop = stop
        self.progress = progress or NullProgress()
        attach = getattr(self.progress, "attach", None)
        if attach is not None:
            attach(self)  # a live view polls the per-host numbers
        self.stop_event = threading.Event()
        self.stop_reason = ""
        self.fatal: CollectorError | None = None
        self.counts: Counter[str] = Counter()
        self.hosts: dict[str, HostStats] = {}
        self.index = HashIndex.from_ledger(ledger)
        self._queues: dict[str, queue.Queue[Job | None]] = {}
        self._workers: list[threading.Thread] = []
        self._lock = threading.RLock()
        self._ingest_lock = threading.Lock()
        self._stored_this_run = 0
        self._scan_sha: dict[tuple[int, str], str] = {}
        self._source_ids = [ledger.source_id(src["name"], src["kind"], src)
                            for src in recipe.sources]
        self._source_rank = {sid: rank for rank, sid in enumerate(self._source_ids)}
        everywhere = tuple(recipe.network.secret_params)
        self._secret_params = {sid: (*(src.get("secret_params") or ()), *everywhere)
                               for src, sid in zip(recipe.sources, self._source_ids, strict=True)}
        self._secrets = secret_values(recipe)
        self._item_source: dict[int, int] = {}
        self.run_id = 0

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

    # -- the run -----------------------------------------------------------------------------
    def run(self, options: dict[str, Any] | None = None) -> RunResult:
        """Run every source to the end or until a stop rule fires. SIGTERM is handled like
        Ctrl-C while the run lasts (when called from the main thread)."""
        on_main = threading.current_thread() is threading.main_thread()
        previous = signal.signal(signal.SIGTERM, _raise_terminated) if on_main else None
        try:
            return self._run(options)
        finally:
            if on_main:
                signal.signal(signal.SIGTERM, previous)

    def _run(self, options: dict[str, Any] | None) -> RunResult:
        self.run_id = self.ledger.start_run(self.recipe.sha256, options or {}, __version__)
        if hasattr(self.fetcher, "run_id"):
            self.fetcher.run_id = self.run_id
        self.progress.event("run_started", run_id=self.run_id)
        threads = [threading.Thread(target=self._list_source, args=(src, sid), daemon=True,
                                    name=f"source-{src['name']}")
                   for src, sid in zip(self.recipe.sources, self._source_ids, strict=True)]
        outcome = "finished"
        terminated = False
        try:
            for t in threads:
                t.start()
            self._wait(threads)
            for q in list(self._queues.values()):
                q.put(None)  # no more work: each worker ends after its queue drains
            self._wait(self._workers)
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
                return
            except KeyboardInterrupt:
                continue

    def _internal_error(self, where: str, exc: BaseException, item_id: int | None = None) -> None:
        """A bug (not the archive's fault): the item in hand fails with reason
        ``internal_error``, the traceback goes to the ledger notes and the folder's error log,
        and the run stops and ends ``failed: internal error in <where>`` (exit 1)."""
        trace = "".join(traceback.format_exception(exc))
        if self._secrets:
            trace = scrub(trace, self._secrets)
        log_path = str(self.collection.error_log_path)
        error = InternalError(where, exc, log_path)
        with contextlib.suppress(Exception):  # reporting a bug must not hide it
            self.collection.append_error_log(
                f"--- {utc_now()} run {self.run_id}: internal error in {where}\n{trace}")
        with contextlib.suppress(Exception):
            self.ledger.add_note("internal_error", f"{error}\n{trace}", run_id=self.run_id)
        if item_id is not None:
            with contextlib.suppress(Exception):
                self._finish(item_id, "failed", "internal_error", str(error))
        with self._lock:
            if self.fatal is None:
                self.fatal = error
        self.request_stop(f"failed: {error}")

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
    def _list_source(self, source: dict[str, Any], source_id: int) -> None:

        def note(n: Any) -> None:
            self.ledger.add_note(n.kind, n.message, url=n.url, run_id=self.run_id,
                                 source_id=source_id)
            self.progress.event("note", source=source["name"], note=n.kind, message=n.message)

        try:
            for candidate in adapters.iter_candidates(source, self.fetcher, note,
                                                      self.collection.root):
                if self._should_stop():
                    break
                self._register(source_id, candidate)
        except HostParked as exc:
            note(_Note("host_parked", exc.url, str(exc)))
        except (StoreError, LedgerError) as exc:  # the disk or the ledger: nothing can go on
            self.fatal = exc
            self.request_stop(f"failed: {exc}")
        except FetchError as exc:
            note(_Note(exc.reason, exc.url, f"listing stopped: {exc}"))
        except CollectorError as exc:
            note(_Note("source_error", None, str(exc)))
        except Exception as exc:  # a bug, not the archive's fault: the run fails loudly
            self._internal_error(f"the listing of source {source['name']!r}", exc)

    def _register(self, source_id: int, c: Any) -> None:
        """Record a candidate and decide what happens to it before anything is downloaded."""
        licence = normalise_licence(c.licence_raw, c.licence_url)
        fields = {
            "image_url": c.image_url, "page_url": c.page_url, "title": c.title,
            "creator": c.creator, "licence_raw": c.licence_raw, "licence_url": c.licence_url,
            "spdx_id": licence.spdx_id, "date": c.date, "metadata": c.metadata or None,
            "crop_box": list(c.crop_box) if c.crop_box else None,
            "local_path": shown_name(str(c.local_path)) if c.local_path else None,
            "run_id": self.run_id,
        }
        # Servers echo API keys into the URLs and items they send back: keep them out of the
        # ledger (the job below still fetches the URL as given).
        fields = self._scrub(fields, self._secret_params.get(source_id, ()))
        row = self.ledger.item_by_key(source_id, c.source_key)
        if row and row["state"] in FINAL_STATES:
            self._count("already_done")
            if c.local_path and row.get("file_sha256"):
                self._scan_sha[(source_id, c.source_key)] = row["file_sha256"]
            return
        if row and self._gone_for_good(row):
            self._count("given_up")
            return
        if row:
            item_id = row["id"]
            self.ledger.update_item(item_id, **fields)
        else:
            item_id = self.ledger.add_item(source_id, c.source_key, fields)
        self._item_source[item_id] = source_id
        ok, reason = licence_allowed(licence.spdx_id, self.recipe.licences.allow,
                                     self.recipe.licences.allow_unknown)
        if not ok:
            detail = (f"licence {c.licence_raw or c.licence_url or '(none)'!r} "
                      + (f"is {licence.spdx_id}, not in the allowlist" if licence.spdx_id
                         else "could not be recognised"))
            self._finish(item_id, "skipped", reason, detail)
            return
        if c.content is not None or c.local_path is not None:
            self._ingest_local(source_id, item_id, c)
            return
        if not c.image_url:
            self._finish(item_id, "rejected", "no_image_url",
                         "the source gave no image URL for this item")
            return
        same = self.ledger.query(
            "SELECT id, file_sha256 FROM items WHERE image_url = ? AND id != ? AND state IN "
            "('stored', 'near_duplicate') AND file_sha256 IS NOT NULL LIMIT 1",
            (fields["image_url"], item_id))
        if same:
            with self._ingest_lock:
                if self._rank(item_id) < self._rank(same[0]["id"]):
                    self._take_over(item_id, same[0]["id"], same[0]["file_sha256"], {})
                else:
                    self._finish(item_id, "duplicate", "exact_duplicate",
                                 "same image URL as an item already stored; not fetched again",
                                 file_sha256=same[0]["file_sha256"], duplicate_of=same[0]["id"])
            return
        self._enqueue(Job(item_id, c.image_url, licence.spdx_id,
                          self._secret_params.get(source_id, ())))

    # -- per-host workers --------------------------------------------------------------------
    def _enqueue(self, job: Job) -> None:
        try:
            host = host_key(job.url)
        except CollectorError as exc:
            self._finish(job.item_id, "failed", "unsafe_url", str(exc))
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
            if self._should_stop():
                continue  # left pending: the next run picks it up
            if stats.parked:
                self._finish(job.item_id, "deferred", "host_parked",
                             f"{host} was parked earlier in this run")
                continue
            try:
                self._fetch_and_ingest(job)
            except HostParked as exc:
                stats.parked = True
                self._finish(job.item_id, "deferred", "host_parked", str(exc))
            except (StoreError, LedgerError) as exc:
                self.fatal = exc
                self.request_stop(f"failed: {exc}")
            except Exception as exc:  # a bug while handling this job: it fails, the run stops
                self._internal_error(f"the worker for host {host}", exc, item_id=job.item_id)
            stats.done += 1

    def _fetch_and_ingest(self, job: Job) -> None:
        try:
            download = self.fetcher.download(job.url, self.store.incoming_dir,
                                             item_id=job.item_id,
                                             secret_params=job.secret_params)
        except RobotsDenied as exc:
            self._finish(job.item_id, "blocked", exc.reason, str(exc))
            return
        except HostParked:
            raise
        except UnsafeURL as exc:
            self._finish(job.item_id, "failed", exc.reason, str(exc))
            return
        except TooLarge as exc:
            self._finish(job.item_id, "rejected", "too_large", str(exc))
            return
        except FetchError as exc:
            self.hosts[host_key(job.url)].errors += 1
            self._finish(job.item_id, "failed", exc.reason, str(exc))
            return
        self._ingest(job.item_id, job.spdx_id, download.path, download.sha256,
                     content_type=download.content_type, url=download.final_url)

    # -- local files (scans and crops) ---------------------------------------------------------
    def _ingest_local(self, source_id: int, item_id: int, c: Any) -> None:
        fd, tmp = self.store.new_temp()
        digest = hashlib.sha256()
        try:
            with os.fdopen(fd, "wb") as out:
                if c.content is not None:
                    out.write(c.content)
                    digest.update(c.content)
                else:
                    with open_regular(c.local_path) as src:
                        while chunk := src.read(COPY_CHUNK):
                            out.write(chunk)
                            digest.update(chunk)
                out.flush()
                os.fsync(out.fileno())
        except OSError as exc:
            tmp.unlink(missing_ok=True)
            shown = shown_name(str(c.local_path))
            if isinstance(exc, FileNotFoundError):
                self._finish(item_id, "failed", "file_missing", f"{shown}: {exc.strerror}")
                return
            if isinstance(exc, NotARegularFile):
                self._finish(item_id, "failed", "not_a_file", f"{shown}: {exc}")
                return
            if exc.filename is not None and Path(exc.filename) == c.local_path:
                self._finish(item_id, "failed", "unreadable_file", f"{shown}: {exc.strerror}")
                return
            raise StoreError(f"cannot copy {shown} into the store: {exc}",
                             errno=exc.errno) from exc
        sha = digest.hexdigest()
        extra: dict[str, Any] = {}
        if c.parent_key is not None:
            extra["parent_sha256"] = self._scan_sha.get((source_id, c.parent_key))
        else:
            self._scan_sha[(source_id, c.source_key)] = sha
        licence = normalise_licence(c.licence_raw, c.licence_url)
        self._ingest(item_id, licence.spdx_id, tmp, sha,
                     url=shown_name(str(c.local_path or "")), **extra)

    # -- ingest ------------------------------------------------------------------------------
    def _ingest(self, item_id: int, spdx_id: str | None, path: Path, sha: str, *,
                content_type: str | None = None, url: str | None = None,
                **extra: Any) -> None:
        """Check a complete temp file and store it, or record why not. Always consumes it."""
        try:
            if _explained(self.ledger.file(sha)):
                self._record_duplicate(item_id, sha, path, extra)
                return
            images = self.recipe.images
            try:
                facts = inspect_image(path, content_type=content_type, url=url,
                                      max_pixels=images.max_pixels,
                                      min_side=images.min_side,
                                      min_aspect=images.min_aspect,
                                      max_aspect=images.max_aspect, full_decode=False)
            except ImageRejected as exc:
                self._finish(item_id, "rejected", exc.reason, exc.detail, **extra)
                return
            with self._ingest_lock:
                row = self.ledger.file(sha)
                if _explained(row):
                    self._record_duplicate(item_id, sha, path, extra)
                    return
                self._store_new(item_id, spdx_id, path, sha, facts, extra,
                                recovered=row is not None)
        finally:
            with contextlib.suppress(OSError):
                path.unlink(missing_ok=True)

    def _gone_for_good(self, row: dict[str, Any]) -> bool:
        """A failed item whose image the server said is gone (404/410) in GONE_RUNS runs is
        not requested again: retrying a missing file every night only costs the archive."""
        if row["state"] != "failed" or row["reason"] not in GONE_REASONS:
            return False
        runs = self.ledger.scalar(
            "SELECT count(DISTINCT run_id) FROM fetches WHERE item_id = ? AND purpose = 'image' "
            "AND status IN (404, 410)", (row["id"],))
        return int(runs or 0) >= GONE_RUNS

    # Which item is "the original" must not depend on which download finished first: the
    # item listed first (recipe source order, then listing order) is the original. When a
    # later-listed item was stored first, the earlier one takes its place.
    def _rank(self, item_id: int) -> tuple[int, int]:
        source_id = self._item_source.get(item_id)
        if source_id is None:
            source_id = (self.ledger.item(item_id) or {}).get("source_id")
        return self._source_rank.get(source_id, len(self._source_rank)), item_id

    def _record_duplicate(self, item_id: int, sha: str, path: Path,
                          extra: dict[str, Any]) -> None:
        first = (self.ledger.file(sha) or {}).get("first_item_id")
        if first is not None and first != item_id and self._rank(item_id) < self._rank(first):
            self._take_over(item_id, first, sha, extra)
            return
        self._finish(item_id, "duplicate", "exact_duplicate",
                     "the same bytes are already stored", file_sha256=sha,
                     duplicate_of=first, **extra)

    def _take_over(self, new_id: int, old_id: int, sha: str, extra: dict[str, Any]) -> None:
        """``new_id`` brought the same bytes as ``old_id`` and was listed earlier: it becomes
        the item the file belongs to, and ``old_id`` its exact duplicate."""
        old = self.ledger.item(old_id) or {}
        with self.ledger.transaction():
            self._finish(new_id, old.get("state") or "stored", old.get("reason"),
                         old.get("detail"), file_sha256=sha,
                         duplicate_of=old.get("duplicate_of"),
                         near_distance=old.get("near_distance"),
                         near_mirrored=old.get("near_mirrored"), **extra)
            self.ledger.db.execute("UPDATE files SET first_item_id = ? WHERE sha256 = ?",
                                   [new_id, sha])
            self.ledger.db.execute("UPDATE items SET duplicate_of = ? WHERE duplicate_of = ?",
                                   [new_id, old_id])
            self.ledger.update_item(old_id, state="duplicate", reason="exact_duplicate",
                                    detail="the same bytes as an item listed earlier",
                                    duplicate_of=new_id, near_distance=None,
                                    near_mirrored=None)
        self._recount(old.get("state"), "duplicate")

    def _demote(self, original_id: int, new_id: int, match: NearMatch) -> None:
        """A stored original turns out to be a near copy of an earlier-listed item."""
        detail = (f"probably a {'mirrored' if match.mirrored else 'resized or re-encoded'} "
                  f"copy of item {new_id} (distance {match.distance})")
        drop = self.recipe.images.near_duplicates == "drop"
        with self.ledger.transaction():
            self.ledger.update_item(original_id, state="near_duplicate",
                                    reason="near_duplicate",
                                    detail=detail + ("; not kept (recipe: drop)" if drop else ""),
                                    duplicate_of=new_id, near_distance=match.distance,
                                    near_mirrored=match.mirrored)
            if drop:
                self.ledger.db.execute("UPDATE items SET file_sha256 = NULL "
                                       "WHERE file_sha256 = ?", [match.sha256])
                self.ledger.db.execute("DELETE FROM files WHERE sha256 = ?", [match.sha256])
                # Committed with the row's removal: a crash before the unlink below leaves
                # a file that recovery may remove because an intent names it.
                self.ledger.add_store_intent(match.sha256, None)
        if drop:
            self.index.remove(match.sha256)
            stored = self.store.find(match.sha256)
            if stored is not None:
                stored.unlink(missing_ok=True)
            self.ledger.drop_store_intent(match.sha256)
        self._recount("stored", "near_duplicate")

    def _store_new(self, item_id: int, spdx_id: str | None, path: Path, sha: str,
                   facts: ImageFacts, extra: dict[str, Any], *, recovered: bool = False) -> None:
        """Store a new file, or attach ``item_id`` to a file registered by rebuild-ledger
        (``recovered``: the bytes are already in the store, the row has no item yet)."""
        flags = list(facts.flags)
        conflict = rights_conflict(spdx_id, facts.rights)
        if conflict:
            flags.append("licence_conflict")
        near = [m for m in self.index.nearest(facts.phash, facts.phash_mirror,
                                              self.recipe.images.near_distance)
                if m.sha256 != sha]
        state, reason, detail = "stored", None, conflict
        demote: tuple[int, NearMatch] | None = None
        firsts = {m.sha256: (self.ledger.file(m.sha256) or {}).get("first_item_id")
                  for m in near}
        # A recovered file without an item yet is nobody's original: it makes no item a
        # near duplicate until a gather attaches it to the item that lists it.
        near = [m for m in near if firsts[m.sha256] is not None]
        if near:
            best = min(near, key=lambda m: (m.distance, self._rank(firsts[m.sha256] or 0)))
            original_id = firsts[best.sha256]
            original = self.ledger.item(original_id) if original_id else None
            if (original and original["state"] == "stored"
                    and self._rank(item_id) < self._rank(original_id)):
                demote = (original_id, best)
            else:
                extra = {**extra, "duplicate_of": original_id,
                         "near_distance": best.distance, "near_mirrored": best.mirrored}
                state, reason = "near_duplicate", "near_duplicate"
                detail = (f"probably a {'mirrored' if best.mirrored else 'resized or re-encoded'}"
                          f" copy of item {original_id} (distance {best.distance})")
                if self.recipe.images.near_duplicates == "drop":
                    self._finish(item_id, state, reason,
                                 detail + "; not stored (recipe: drop)", **extra)
                    return
        size = path.stat().st_size
        row = {
            "size": size, "ext": facts.ext, "format": facts.format,
            "mime": facts.mime, "width": facts.width, "height": facts.height,
            "mode": facts.mode, "bit_depth": facts.bit_depth, "alpha": facts.alpha,
            "frames": facts.frames, "orientation": facts.orientation,
            "phash": to_signed(facts.phash), "phash_mirror": to_signed(facts.phash_mirror),
            "hash_algo": facts.hash_algo, "first_item_id": item_id, "exif": facts.exif,
            "rights": facts.rights, "flags": flags,
        }
        if recovered:
            # The stored bytes are these bytes (same sha256): attach, do not store again.
            with self.ledger.transaction():
                self.ledger.update_file(sha, row)
                self._finish(item_id, state, reason, detail, file_sha256=sha, **extra)
        else:
            # Write-ahead: the intent is committed before the file appears in the store and
            # dropped in the transaction that adds its row, so recovery removes a stored
            # file without a row only when an intent says it was being placed.
            placing = self.store.find(sha) is None
            if placing:
                self.ledger.add_store_intent(sha, item_id)
            self.store.adopt(path, sha, facts.ext, synced=True)
            with self.ledger.transaction():
                self.ledger.add_file({"sha256": sha, **row})
                self._finish(item_id, state, reason, detail, file_sha256=sha, **extra)
                if placing:
                    self.ledger.drop_store_intent(sha)
            self.index.add(sha, facts.phash)
        if demote is not None:
            self._demote(demote[0], item_id, demote[1])
        with self._lock:
            self._stored_this_run += 1
            if self.stop.max_items and self._stored_this_run >= self.stop.max_items:
                self.request_stop(f"stopped: {self.stop.max_items} new items stored")

    def _scrub(self, fields: dict[str, Any], params: tuple[str, ...]) -> dict[str, Any]:
        """Item fields with secret params redacted from URLs and secret values from text."""
        out = dict(fields)
        for key in ("image_url", "page_url", "licence_url"):
            if out.get(key):
                out[key] = redact(out[key], params)
        if self._secrets:
            for key, value in out.items():
                if isinstance(value, str):
                    out[key] = scrub(value, self._secrets)
                elif key == "metadata" and value:
                    out[key] = json.loads(scrub(json.dumps(value, default=str), self._secrets))
        return out

    def _finish(self, item_id: int, state: str, reason: str | None, detail: str | None,
                **fields: Any) -> None:
        self.ledger.update_item(item_id, state=state, reason=reason, detail=detail,
                                run_id=self.run_id, **fields)
        self._count(state)
        self.progress.event("item", item_id=item_id, state=state, reason=reason)

    def _count(self, key: str) -> None:
        with self._lock:
            self.counts[key] += 1

    def _recount(self, was: str | None, now: str) -> None:
        with self._lock:
            if was:
                self.counts[was] -= 1
            self.counts[now] += 1


class NotARegularFile(OSError):
    """A local file turned out to be a FIFO, socket, device or folder when it was opened."""


def open_regular(path: Path) -> BinaryIO:
    """Open a local file for reading only if it is a regular file: opened non-blocking (a
    FIFO would otherwise block until a writer comes) and checked with fstat before any read."""
    fd = os.open(path, os.O_RDONLY | os.O_NONBLOCK)
    try:
        mode = os.fstat(fd).st_mode
        if not stat.S_ISREG(mode):
            raise NotARegularFile(errno.EINVAL, "not a regular file (FIFO, socket, device or "
                                                "folder); not read", str(path))
        os.set_blocking(fd, True)
        return os.fdopen(fd, "rb")
    except BaseException:
        os.close(fd)
        raise


def _explained(row: dict[str, Any] | None) -> bool:
    """A files row that already belongs to an item (not one rebuild-ledger recovered)."""
    return row is not None and not (row.get("first_item_id") is None
                                    and RECOVERED_FLAG in (row.get("flags") or []))


@dataclass(frozen=True)
class _Note:
    kind: str
    url: str | None
    message: str


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


def build_fetcher(recipe: Recipe, ledger: Ledger) -> Any:
    """The one polite fetcher, configured from the recipe."""
    from collector.fetching.fetcher import Fetcher, FetchSettings

    return Fetcher(FetchSettings.from_recipe(recipe), ledger)


@contextlib.contextmanager
def prepared_run(collection: Collection, *,
                 on_recovery: Callable[[Recovery], None] | None = None,
                 ) -> Iterator[tuple[Recipe, Ledger]]:
    """Lock the folder, load the recipe, open the ledger and recover from any crash.
    Stored files the ledger cannot explain are kept, noted in the ledger and passed to
    ``on_recovery`` with the rest of the :class:`Recovery`."""
    recipe = collection.recipe()
    if not recipe.sources:
        raise RecipeError([RecipeProblem(str(recipe.path), "sources",
                                         "no [[sources]] yet: add at least one source to "
                                         "gather from")])
    missing = env_problems(recipe)
    if missing:
        raise RecipeError(missing)
    with collection.gather_lock(), collection.ledger() as ledger:
        recovery = recover(collection, ledger)
        if recovery.unknown_files:
            ledger.add_note("unknown_files", unknown_files_message(collection,
                                                                   recovery.unknown_files))
        if on_recovery is not None:
            on_recovery(recovery)
        # We hold the lock, so a run still marked "running" was killed (power loss, SIGKILL).
        with ledger.transaction():
            ledger.db.execute("UPDATE runs SET outcome = 'killed: did not end cleanly' "
                              "WHERE outcome = 'running'")
        yield recipe, ledger


def unknown_files_message(collection: Collection, unknown: tuple[str, ...]) -> str:
    """The one line that reports stored files without a ledger row (kept, never deleted)."""
    return (f"{len(unknown)} stored files are unknown to the ledger (kept, not deleted); "
            f"'collector rebuild-ledger {collection.root}' registers them, or a gather "
            "attaches them when it lists their items again")


def gather(collection: Collection, *, stop: StopRules | None = None,
           progress: Progress | None = None, options: dict[str, Any] | None = None,
           fetcher_factory: Callable[[Recipe, Ledger], Any] = build_fetcher) -> RunResult:
    """Run the collection's recipe: list, decide, fetch, check, store, record."""
    with prepared_run(collection) as (recipe, ledger):
        fetcher = fetcher_factory(recipe, ledger)
        try:
            gatherer = Gatherer(collection, recipe, ledger, fetcher, stop=stop or StopRules(),
                                progress=progress)
            return gatherer.run(options)
        finally:
            close = getattr(fetcher, "close", None)
            if close:
                close()
