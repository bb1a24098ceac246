"""A run on a Dask cluster: the ``gather`` process stays the coordinator and the only writer of
the ledger; workers fetch images in short per-host tasks (:mod:`collector.run.cluster_task`).

What the coordinator does is the local run (:class:`collector.run.scheduling.Gatherer`):
listing threads, admission (:meth:`collector.run.ingest.Ingest.admit`), stop rules; only the
per-host worker threads are replaced by :class:`ClusterDispatch`. The lessons of
``scale.md`` (measured) shape it:

- the unit of distribution is the host, and at most one task per host is in flight across the
  cluster, so a host's budget lives in one fetcher at a time and needs no shared limiter;
- a task is a batch of at most 50 of the host's images, about 10 s at its interval;
- a task keeps a journal in the shared folder (:mod:`collector.run.cluster_journal`): a
  rerun takes the images its dead attempt finished and waits one full interval before its
  first request; any other task on the coordinator's clock spaces its first request exactly
  from the host's last contact (the previous task's end, or the coordinator's own request);
- a result is fetched from the worker as soon as its task ends and its future released at
  once (a result held only by a dead worker would be computed again);
- workers return ``fetches`` rows, host facts and file facts; the coordinator writes them,
  then checks, de-duplicates and stores the files as a local run does (``Ingest.ingest_file``);
- a worker that dies mid-batch: Dask runs the task again elsewhere; after repeated deaths
  (``KilledWorker``) the host is degraded: its items are deferred and the run goes on;
- resuming is a plain local resume from the ledger, never from the engine's state.

A host the coordinator also lists pages from is shared through :meth:`ClusterDispatch.gated`:
a listing request waits until no task of that host is in flight (and keeps a full interval
after the task's last contact), and no task starts while a listing request is under way.
"""

from __future__ import annotations

import contextlib
import hashlib
import os
import queue
import threading
import time
import uuid
from collections import deque
from collections.abc import Callable, Iterator
from dataclasses import dataclass, field, replace
from functools import partial
from pathlib import Path
from typing import Any

from collector.errors import CollectorError, LedgerError, StoreError
from collector.fetching.fetcher import FetchSettings
from collector.run.cluster_gate import GatedFetcher
from collector.run.cluster_journal import SUFFIX, clock_id, journal_name, mark_collected
from collector.run.cluster_task import (
    BatchResult,
    BatchSpec,
    HostCarry,
    JobResult,
    batch_size,
    fetch_batch,
)
from collector.run.ingest import Job
from collector.storage.row_codec import epoch_of
from collector.urls import host_key

STOP_GRACE = 60.0  # s after a stop that tasks in flight may take to come back
TASK_LIMIT = 600.0  # s after which a task that has not come back is given up (left pending)


@dataclass(frozen=True)
class _Work:
    """A job on its way: the URL to ask next (a redirect to another host moves it to that
    host's lane) and the redirect hops so far."""

    job: Job
    url: str
    hops: int = 0


_Ready = tuple[tuple[_Work, ...], list[tuple[_Work, tuple[str, str] | None]]]


@dataclass
class _Lane:
    """One host's place in the cluster run."""

    pending: deque[_Work] = field(default_factory=deque)
    in_flight: tuple[_Work, ...] = ()
    listing: int = 0  # listing requests of the coordinator under way
    wanting: int = 0  # listing requests waiting for the host's task to end
    last_end: float | None = None  # epoch s the host's latest task ended
    coord_end: float | None = None  # epoch s the coordinator's latest request to it ended
    carry: HostCarry = field(default_factory=HostCarry)
    degraded: str | None = None  # why the host gets no more tasks in this run
    batches: int = 0


class ClusterDispatch:
    """Serves a run's image jobs on a Dask cluster (see the module doc). Create it with a
    connected client, pass it to the Gatherer (which calls :meth:`attach`), and wrap the
    coordinator's own fetcher with :meth:`gated`."""

    def __init__(self, client: Any, settings: FetchSettings, *, force_bytes: bool = False,
                 on_batch: Callable[[BatchResult], None] | None = None) -> None:
        self.client, self.settings, self.force_bytes = client, settings, force_bytes
        self.on_batch = on_batch  # a bench hook: every batch result as it arrives
        self._cond = threading.Condition()
        self._lanes: dict[str, _Lane] = {}
        self._open = 0  # jobs put and not yet settled
        self._handlers: list[threading.Thread] = []
        self._token: Path | None = None
        # The futures in flight with their host, batch and submission time, kept until
        # handled: a future nobody holds lets Dask forget its task.
        self._futures: dict[str, tuple[Any, str, tuple[_Work, ...], float]] = {}
        # Batches whose task is done and whose result is not yet fetched from the worker
        # (a worker lost now takes the result with it: Dask runs the task again).
        self._collecting: dict[str, tuple[_Work, ...]] = {}
        self._stopped_at: float | None = None
        self._clock = clock_id()
        self._gates: dict[str, queue.Queue[_Work | None]] = {}  # host -> jobs to admit
        self._gate_threads: list[threading.Thread] = []
        self._spawn: queue.Queue[tuple[str, queue.Queue[_Work | None]] | None] = queue.Queue()
        self._spawner: threading.Thread | None = None
        self.g: Any = None

    # -- set-up --------------------------------------------------------------------------------
    def attach(self, gatherer: Any) -> None:
        """Called by the Gatherer it serves."""
        self.g = gatherer

    def gated(self, fetcher: Any) -> GatedFetcher:
        """The coordinator's fetcher, taking turns with the tasks of the host it asks."""
        return GatedFetcher(fetcher, self)

    def _start(self) -> None:
        """On the first job: the token file that tells a worker the folder is shared."""
        fd, self._token = self.g.store.new_temp()
        os.close(fd)
        self._spawner = threading.Thread(target=self._spawn_loop, daemon=True,
                                         name="cluster-gates")
        self._spawner.start()

    def _spawn_loop(self) -> None:
        """Starts each host's gate thread (Thread.start waits until the new thread runs: not
        on the listing thread, which admits the next items meanwhile)."""
        while (item := self._spawn.get()) is not None:
            t = threading.Thread(target=self._gate_loop, args=item, daemon=True,
                                 name=f"cluster-gate-{item[0]}")
            with self._cond:
                self._gate_threads.append(t)
            t.start()

    # -- jobs in -------------------------------------------------------------------------------
    def put(self, host: str, job: Job) -> None:
        """A job for ``host`` (called by the Gatherer instead of its host queue)."""
        with self._cond:
            if self._token is None:
                self._start()
            self._open += 1
            gate = self._gates.get(host)
            if gate is None:
                gate = self._gates[host] = queue.Queue()
                self._spawn.put((host, gate))
        gate.put(_Work(job, job.url))

    def _gate_loop(self, host: str, gate: queue.Queue[_Work | None]) -> None:
        """A host's jobs through the reservation gate, on a thread of the host's own (as the
        local run's host workers): the first asks the coordinator's fetcher for the origin's
        tdmrep.json, which waits for the host's interval, and the listing thread goes on
        meanwhile."""
        while (work := gate.get()) is not None:
            try:
                if not self._refused(host, work):
                    # Jobs still waiting at the gate join the same batch: a task is submitted
                    # when the gate is drained (a host's first batch is not one image).
                    self._put(host, work, launch=gate.empty())
                elif gate.empty() and host in hosts_of(self._lanes, self._cond):
                    self._poke(host)  # jobs that passed before this one go now
            except Exception as exc:  # a bug on the gate thread: the run fails loudly
                self.g._internal_error(f"the cluster admission for host {host}", exc,
                                       item_id=work.job.item_id)

    def _refused(self, host: str, w: _Work) -> bool:
        """Before any image byte, as the local run (Gatherer._fetch_and_ingest): a stopping
        run leaves the job pending; the reservation gate may refuse the image (True)."""
        item_id = w.job.item_id
        refusal = None
        try:
            if not self.g._should_stop():
                refusal = self.g.gate.before_image(item_id, w.job.url)
                if refusal is None:
                    return False
                self.g.record.finish(item_id, refusal.state, refusal.reason, refusal.detail,
                                     reservation_checks=self.g.gate.checks(item_id))
        except (StoreError, LedgerError) as exc:
            self.g._fail(exc)
        except Exception as exc:
            self.g._internal_error(f"the cluster admission for host {host}", exc,
                                   item_id=item_id)
        self._settled(w)
        return True

    def _put(self, host: str, work: _Work, launch: bool = True) -> None:
        with self._cond:
            lane = self._lanes.setdefault(host, _Lane())
            lane.pending.append(work)
            if not launch:
                return
            ready = self._take(host, lane)
        self._launch(host, ready)

    def finish(self) -> None:
        """No more jobs come: wait until every job put is settled (after a stop, pending
        jobs are left for the next run and the tasks in flight come back, or are given up
        STOP_GRACE s after the stop: their jobs stay pending)."""
        with self._cond:
            hosts = list(self._lanes)
        for host in hosts:
            self._poke(host)
        while True:
            with self._cond:
                if self._open <= 0:
                    break
                self._cond.wait(0.2)
            if self.g._should_stop():
                for host in hosts_of(self._lanes, self._cond):
                    self._poke(host)
            self._expire()
        with self._cond:
            gates, self._gates = list(self._gates.values()), {}
        for gate in gates:
            gate.put(None)  # every job put is settled: the gate threads end
        if self._spawner is not None:
            self._spawn.put(None)
            self._spawner.join(STOP_GRACE)
            self._spawner = None
        with self._cond:
            threads, self._gate_threads = self._gate_threads, []
        for t in [*threads, *self._handlers]:
            t.join(STOP_GRACE)
        self._handlers.clear()
        if self._token is not None:
            for journal in self._token.parent.glob(f"collector-{self.g.run_id}-*{SUFFIX}"):
                journal.unlink(missing_ok=True)
            self._token.unlink(missing_ok=True)
            self._token = None

    def _expire(self) -> None:
        """Give up tasks that have not come back: TASK_LIMIT s after their submission, or
        STOP_GRACE s after the run was asked to stop. Their jobs are settled without an
        outcome (left pending: the next run asks again)."""
        now = time.monotonic()
        if self.g.stop_event.is_set() and self._stopped_at is None:
            self._stopped_at = now
        late = self._stopped_at is not None and now - self._stopped_at > STOP_GRACE
        with self._cond:
            expired = [(k, entry) for k, entry in self._futures.items()
                       if late or now - entry[3] > TASK_LIMIT]
            for key, _ in expired:
                self._futures.pop(key, None)
        for _, (future, host, batch, _at) in expired:
            with contextlib.suppress(Exception):
                future.cancel()
            self._forget(future)
            self._release(host, batch, None)

    def batches(self, keys: Any) -> dict[str, list[tuple[int, str]]]:
        """(item id, URL) of the images of the tasks with these keys that have not come back
        or are being collected (a bench asks what a killed worker held)."""
        with self._cond:
            held = {**{k: e[2] for k, e in self._futures.items()}, **self._collecting}
            return {k: [(w.job.item_id, w.url) for w in batch] for k, batch in held.items()
                    if k in keys}

    def contacted(self, host: str) -> None:
        """The coordinator's own request to ``host`` ended now (under :meth:`listing`)."""
        with self._cond:
            self._lanes.setdefault(host, _Lane()).coord_end = time.time()

    def _poke(self, host: str) -> None:
        with self._cond:
            ready = self._take(host, self._lanes[host])
        self._launch(host, ready)

    def _take(self, host: str, lane: _Lane) -> _Ready:
        """Under the lock: the next batch for ``host`` (empty when one is in flight, the
        coordinator is listing from it or waits to, or nothing waits), and jobs to settle at
        once with (reason, detail) of their deferral, or None (left for the next run)."""
        if lane.in_flight or lane.listing or lane.wanting or not lane.pending:
            return (), []
        stats = self.g.hosts.get(host)
        jobs = list(lane.pending)
        if self.g._should_stop():
            lane.pending.clear()
            return (), [(w, None) for w in jobs]
        if lane.degraded or (stats is not None and stats.parked):
            why = (("host_degraded", lane.degraded) if lane.degraded else
                   ("host_parked", f"{host} was parked earlier in this run"))
            lane.pending.clear()
            return (), [(w, why) for w in jobs]
        budget = self.settings.host_budgets.get(host, self.settings.budget)
        size = min(batch_size(float(budget.min_interval)), len(lane.pending))
        lane.in_flight = tuple(lane.pending.popleft() for _ in range(size))
        return lane.in_flight, []

    def _launch(self, host: str, ready: _Ready) -> None:
        """Submit a batch; settle jobs that get no task (stop: left pending; a parked or
        degraded host: deferred)."""
        batch, settle = ready
        for w, why in settle:
            if why is not None:
                self._guarded(host, w, partial(self.g.record.finish, w.job.item_id,
                                               "deferred", why[0], why[1]))
            self._settled(w)
        if batch:
            try:
                self._submit(host, batch)
            except Exception as exc:  # the engine refused the task: a bug, the run fails
                self.g._internal_error(f"the cluster submission for host {host}", exc)
                self._release(host, batch, None)

    def _submit(self, host: str, batch: tuple[_Work, ...]) -> None:
        ledger = self.g.ledger
        with self._cond:
            lane = self._lanes[host]
            lane.batches += 1
            carry, number, ours = lane.carry, lane.batches, lane.coord_end
        assert self._token is not None
        last = ledger.last_contact(host)
        # A key of its own for every submission: Dask treats two tasks with one key as one.
        key = f"collector-{self.g.run_id}-{host}-{number}-{uuid.uuid4().hex}"
        spec = BatchSpec(host, tuple((w.job.item_id, w.url, w.job.secret_params)
                                     for w in batch),
                         self.settings, self.g.run_id, ledger.get_host(host), last,
                         str(self._token.parent), self._token.name, carry,
                         self.g.stop.deadline, self.force_bytes, journal_name(key),
                         self._clock if self._exact(carry, last, ours) else "")
        future = self.client.submit(fetch_batch, spec, pure=False, key=key, retries=0)
        with self._cond:
            self._futures[key] = (future, host, batch, time.monotonic())
        future.add_done_callback(self._arrived)

    def _exact(self, carry: HostCarry, last: str | None, ours: float | None) -> bool:
        """May the host's next task space its first request exactly from the times it is
        given? Only on the coordinator's clock: after a task of this run that ended normally
        on it, or for the host's first task when the latest contact on record is the
        coordinator's own request in this run (a host with an earlier attempt on record, or
        after a lost task: a full interval first)."""
        if not self._clock:
            return False
        if carry.clock is not None:
            return carry.clock == self._clock
        moment = epoch_of(last)
        return ours is not None and moment is not None and moment <= ours

    def _arrived(self, future: Any) -> None:
        """A task came back (called on Dask's callback thread): handled on a thread of its
        own, so a result that waits for a host (a coordinator request through
        :meth:`listing`) never holds up the results it waits for."""
        with self._cond:
            entry = self._futures.pop(future.key, None)
            if entry is None:
                return  # given up already (_expire)
            self._collecting[future.key] = entry[2]
            t = threading.Thread(target=self._handle_safely, args=(entry[1], entry[2], future),
                                 daemon=True, name=f"cluster-{entry[1]}")
            self._handlers = [h for h in self._handlers if h.is_alive()]
            self._handlers.append(t)
        t.start()

    # -- results -------------------------------------------------------------------------------
    def _handle_safely(self, host: str, batch: tuple[_Work, ...], future: Any) -> None:
        try:
            self._handle(host, batch, future)
        except Exception as exc:  # a bug while handling a result: the run fails loudly
            self.g._internal_error(f"the cluster results of host {host}", exc)
            self._release(host, batch, None)

    def _handle(self, host: str, batch: tuple[_Work, ...], future: Any) -> None:
        from distributed import KilledWorker
        from distributed.utils import CancelledError

        try:
            try:
                result: BatchResult = future.result(timeout=STOP_GRACE)
            finally:
                with self._cond:
                    self._collecting.pop(future.key, None)
                self._forget(future)
        except KilledWorker as exc:
            self._degrade(host, batch, exc)
            return
        except (TimeoutError, CancelledError):  # its result was lost, or it was cancelled
            self._release(host, (), None, list(batch))  # asked again (at least once)
            return
        except Exception as exc:  # the task raised: a bug, or a worker that cannot run it
            self.g._internal_error(f"the cluster task for host {host}", exc)
            self._release(host, batch, None)
            return
        if self.on_batch is not None:
            self.on_batch(result)
        ledger = self.g.ledger
        with ledger.transaction():  # one commit for the batch's requests and host facts
            for row in result.fetches:
                ledger.record_fetch(**row)
            for hk, fields in result.host_updates:
                ledger.put_host(hk, **fields)
        works = {w.job.item_id: w for w in batch}
        parked = any(r.kind == "parked" for r in result.results)
        again = [works[r.item_id] for r in result.results if r.kind == "skipped"
                 and not parked and not self.g._should_stop()]
        self._release(host, (), result.carry, again)
        for r in result.results:
            w = works[r.item_id]
            if w in again:
                continue
            if r.kind == "moved" and self._moved(host, w, r):
                continue
            self._guarded(host, w, partial(self._outcome, host, w.job, r))
            self._settled(w)

    def _forget(self, future: Any) -> None:
        """The task's result is here (or lost): release the future at once, so Dask does not
        compute it again, and mark its journal collected (an attempt Dask runs anyway, the
        release not yet heard by the scheduler, asks nothing)."""
        with contextlib.suppress(Exception):
            future.release()
        if self._token is not None and not self.force_bytes:  # no journals without the folder
            with contextlib.suppress(OSError):
                mark_collected(self._token.parent / journal_name(future.key))

    def _moved(self, host: str, w: _Work, r: JobResult) -> bool:
        """A redirect to another host: the job goes to that host's lane (True), unless it
        has used up the redirects or the new URL is not one to ask (False: it fails)."""
        assert r.final_url is not None
        if w.hops >= self.settings.max_redirects:
            r.kind, r.state, r.reason = "finish", "failed", "redirect_blocked"
            r.detail = f"more than {self.settings.max_redirects} redirects: {w.job.url}"
            return False
        try:
            target = host_key(r.final_url)
        except CollectorError as exc:
            r.kind, r.state, r.reason, r.detail = "finish", "failed", "unsafe_url", str(exc)
            return False
        with self.g._lock:
            self.g.hosts.setdefault(target, type(self.g.hosts[host])())
        self._put(target, _Work(w.job, r.final_url, w.hops + 1))
        return True

    def _release(self, host: str, settle: tuple[_Work, ...], carry: HostCarry | None,
                 again: list[_Work] | None = None) -> None:
        """The host's task is over: the next batch may go (``again``: jobs the task did not
        reach go first)."""
        with self._cond:
            lane = self._lanes[host]
            lane.in_flight = ()
            lane.last_end = time.time()
            # No carry: the task was lost or failed and may have asked the host; the next
            # task waits a full interval first (HostCarry.clock "": no exact spacing).
            lane.carry = carry if carry is not None else replace(lane.carry, clock="")
            lane.pending.extendleft(reversed(again or []))
            ready = self._take(host, lane)
            self._cond.notify_all()
        for w in settle:
            self._settled(w)
        self._launch(host, ready)

    def _degrade(self, host: str, batch: tuple[_Work, ...], exc: BaseException) -> None:
        """KilledWorker: the workers running this host's task died too often. The host gets
        no more tasks in this run; its items are deferred (the next run tries again)."""
        why = (f"the cluster lost the worker fetching from {host} repeatedly (Dask "
               f"KilledWorker); its images are tried again by the next run")
        with self._cond:
            self._lanes[host].degraded = why
        self.g.progress.event("note", source="cluster", note="host_degraded", message=why)
        with contextlib.suppress(CollectorError):
            self.g.ledger.add_note("host_degraded", f"{why} ({exc})", run_id=self.g.run_id)
        for w in batch:
            self._guarded(host, w, partial(self.g.record.finish, w.job.item_id, "deferred",
                                           "host_degraded", why))
        self._release(host, batch, None)

    def _outcome(self, host: str, job: Job, r: JobResult) -> None:
        """Record one job's outcome as the local run does; a file goes through ingest."""
        stats = self.g.hosts[host]
        if r.kind == "finish":
            if r.state == "failed":
                stats.errors += 1
            self.g.record.finish(job.item_id, r.state, r.reason, r.detail)
        elif r.kind == "parked":
            stats.parked = True
            self.g.record.finish(job.item_id, "deferred", "host_parked", r.detail)
        elif r.kind == "skipped":
            if stats.parked:
                self.g.record.finish(job.item_id, "deferred", "host_parked",
                                     f"{host} was parked earlier in this run")
        elif r.kind == "store":
            raise StoreError(r.detail)
        elif r.kind == "file":
            self._file(job, r)
        stats.done += 1

    def _file(self, job: Job, r: JobResult) -> None:
        """A downloaded image: the reservation signals of its answer's header fields first
        (as the local run), then the checks and the store (Ingest.ingest_file)."""
        assert r.sha256 is not None and r.final_url is not None
        gate = self.g.gate
        refusal = gate.after_download(job.item_id, r.final_url, r.headers)
        if refusal is not None:  # reserved in the image's own header fields: not kept
            if r.path is not None:
                Path(r.path).unlink(missing_ok=True)
            self.g.record.finish(job.item_id, refusal.state, refusal.reason, refusal.detail,
                                 reservation_checks=gate.checks(job.item_id))
            return
        path = Path(r.path) if r.path is not None else self._write(r)
        self.g.ingest.ingest_file(job.item_id, job.spdx_id, path, r.sha256,
                                  content_type=r.content_type, url=r.final_url,
                                  reservation_checks=gate.checks(job.item_id))

    def _write(self, r: JobResult) -> Path:
        """A file returned as bytes, written into the store's incoming folder (fsynced)."""
        data = r.data or b""
        if hashlib.sha256(data).hexdigest() != r.sha256:
            raise StoreError(f"the bytes of {r.final_url} changed on their way from the worker")
        return self.g.store.write_temp(data, f"writing a file from {r.final_url}")

    def _guarded(self, host: str, w: _Work, step: Callable[[], None]) -> None:
        """Run one job's step as the local worker does (Gatherer._serve_job)."""
        try:
            step()
        except (StoreError, LedgerError) as exc:
            self.g._fail(exc)
        except Exception as exc:
            self.g._internal_error(f"the cluster results of host {host}", exc,
                                   item_id=w.job.item_id)

    def _settled(self, w: _Work) -> None:
        try:
            self.g.ingest.settle(w.job)
        finally:
            with self._cond:
                self._open -= 1
                self._cond.notify_all()
            stats = self.g.hosts.get(host_key(w.job.url))
            if stats is not None:
                stats.queued = max(0, stats.queued - 1)

    # -- the coordinator's own requests ---------------------------------------------------------
    @contextlib.contextmanager
    def listing(self, host: str) -> Iterator[float | None]:
        """Hold ``host`` for a request of the coordinator: wait until no task of the host is
        in flight, keep new tasks back meanwhile; yields when its latest task ended."""
        with self._cond:
            lane = self._lanes.setdefault(host, _Lane())
            lane.wanting += 1
            try:
                while lane.in_flight:
                    self._cond.wait(0.2)
                    self._cond.release()
                    try:
                        self._expire()  # a task that never comes back is given up
                    finally:
                        self._cond.acquire()
            finally:
                lane.wanting -= 1
            lane.listing += 1
            last_end = lane.last_end
        try:
            yield last_end
        finally:
            with self._cond:
                lane.listing -= 1
                ready = self._take(host, lane) if self.g is not None else ((), [])
            self._launch(host, ready)


def hosts_of(lanes: dict[str, _Lane], lock: threading.Condition) -> list[str]:
    """The hosts with a lane, read under the dispatch's lock."""
    with lock:
        return list(lanes)


def run_on_cluster(collection: Any, recipe: Any, ledger: Any, client: Any, *,
                   force_bytes: bool = False,
                   on_batch: Callable[[BatchResult], None] | None = None,
                   **kwargs: Any) -> Any:
    """One run inside :func:`collector.run.gather.prepared_run` with its images fetched on
    the cluster behind ``client``; ``kwargs`` go to :func:`collector.run.gather.run_prepared`
    (stop, progress, options, fetcher_factory)."""
    from collector.run.gather import run_prepared

    dispatch = ClusterDispatch(client, FetchSettings.from_recipe(recipe),
                               force_bytes=force_bytes, on_batch=on_batch)
    return run_prepared(collection, recipe, ledger, dispatch=dispatch, **kwargs)
