"""What happens to one candidate: registered and its licence decided before any image byte is
requested (:meth:`Ingest.admit`), then its bytes inspected, de-duplicated, stored and recorded
(:meth:`Ingest.ingest_file`). Local scans and crops are copied into a temp file first
(:meth:`Ingest.ingest_local`, regular files only).

Which item is the original is decided by :mod:`collector.run.dedup`; this module looks up
what it needs in the ledger and applies the answer. A new file is placed write-ahead: a store
intent is committed before the file appears in the store and dropped in the transaction that
adds its row, so crash recovery removes a stored file without a row only when an intent says
it was being placed.
"""

from __future__ import annotations

import contextlib
import hashlib
import os
import threading
from collections.abc import Callable, Iterator, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from collector.checks.conditions import compile_condition, item_view
from collector.checks.images import ImageFacts, inspect_image
from collector.checks.licences import (
    licence_allowed,
    licence_detail,
    normalise_licence,
    rights_conflict,
)
from collector.checks.likeness import IMAGE_ERRORS, Confirmed, Look, confirm, look_at_file
from collector.checks.pixel_rules import PixelRules
from collector.checks.rights_statements import find_statement
from collector.config.recipe import Recipe
from collector.errors import CollectorError, ImageRejected, StoreError
from collector.run import dedup
from collector.run.dedup import Demote, Keep, NearCandidate, NearCopy, TakeOver
from collector.run.record import RunRecord
from collector.run.reservations import ReservationGate
from collector.safe_text import shown_name
from collector.sources.base import unusable_image_url
from collector.storage import queries, upkeep_queries
from collector.storage.collection import Collection
from collector.storage.hashindex import HashIndex
from collector.storage.ledger import Ledger
from collector.storage.ledger_repair import RECOVERED_FLAG
from collector.storage.safe_paths import NotARegularFile, open_regular

# The archive itself withdrew the record (e.g. an OAI-PMH deleted record): not the curator's
# withdrawal; the item keeps its file and provenance.
WITHDRAWN_BY_ARCHIVE = "withdrawn_by_archive"
# States after which an item is not requested again.
FINAL_STATES = frozenset({"stored", "duplicate", "near_duplicate", "rejected",
                          WITHDRAWN_BY_ARCHIVE})
COPY_CHUNK = 1 << 20
# "Not Found" / "Gone" (RFC 9110 sections 15.5.5, 15.5.11) in this many runs ends the retries.
GONE_REASONS = frozenset({"http_404", "http_410"})
GONE_RUNS = 3
# Outcomes of an image request that the other items listing the same image URL in the run
# take as they are (a kept file is shared as a duplicate instead; see Ingest.settle). A failed
# request is not repeated for them: they fail with it and are retried by the next run, again
# with one request for all of them.
URL_OUTCOMES_TAKEN = frozenset({"duplicate", "near_duplicate", "rejected", "failed", "blocked",
                                "deferred"})


@dataclass
class Job:
    """One image to fetch for one item."""

    item_id: int
    url: str
    spdx_id: str | None
    secret_params: tuple[str, ...] = ()


def _explained(row: dict[str, Any] | None) -> bool:
    """A files row that already belongs to an item (not one rebuild-ledger recovered)."""
    return row is not None and not (row.get("first_item_id") is None
                                    and RECOVERED_FLAG in (row.get("flags") or []))


class Ingest:
    """The item side of one run: admission, inspection, de-duplication, storing, recording.
    Called from the listing threads and the host workers; thread-safe."""

    def __init__(self, collection: Collection, recipe: Recipe, ledger: Ledger,
                 record: RunRecord, source_ids: Sequence[int],
                 on_stored: Callable[[], None] = lambda: None,
                 gate: ReservationGate | None = None) -> None:
        self.recipe, self.ledger, self.record = recipe, ledger, record
        self.gate = gate or ReservationGate(recipe, ledger, None, record, source_ids)
        self.store = collection.store
        self.index = HashIndex.from_ledger(ledger)
        self._on_stored = on_stored
        self._lock = threading.Lock()  # one de-duplication decision at a time
        # One request per image URL in a run: the URLs queued or in flight, each with the
        # items that listed it meanwhile, and the URLs whose request ended without a kept
        # file (their later items take that outcome). A kept file is found in the ledger.
        self._url_lock = threading.Lock()
        self._waiting: dict[str, list[int]] = {}
        self._settled: dict[str, int] = {}
        self._scan_sha: dict[tuple[int, str], str] = {}
        self._item_source: dict[int, int] = {}
        self._source_order = {sid: rank for rank, sid in enumerate(source_ids)}
        recipe_wide = ([("[items]", compile_condition(recipe.items.keep_if))]
                       if recipe.items.keep_if else [])
        self._conditions = {
            sid: [*recipe_wide, *([(f"source {src['name']!r}",
                                    compile_condition(src["keep_if"]))]
                                  if src.get("keep_if") else [])]
            for src, sid in zip(recipe.sources, source_ids, strict=True)}
        self._source_names = {sid: src["name"]
                              for src, sid in zip(recipe.sources, source_ids, strict=True)}
        self._pixel_rules = PixelRules(recipe.pixel_rules)  # a file failing one is set aside
        everywhere = tuple(recipe.network.secret_params)
        self._secret_params = {sid: (*(src.get("secret_params") or ()), *everywhere)
                               for src, sid in zip(recipe.sources, source_ids, strict=True)}

    # -- admission: before any byte is requested -----------------------------------------------
    def admit(self, source_id: int, c: Any) -> Job | None:
        """Record a candidate and decide its way before anything is downloaded: the image to
        fetch, or None when decided here (done, skipped, stored locally, same image URL)."""
        (job,) = self.admit_group(source_id, [c])  # to the end: a bug is raised after it
        return job

    def admit_group(self, source_id: int, group: Sequence[Any]) -> Iterator[Job | None]:
        """:meth:`admit` for candidates listed one after another (no source key twice), one
        answer each, in order: their rows written in ONE transaction, committed before any is
        decided (so before any image request); inside it only ledger reads and writes and the
        counter lock, no wait for a thread holding the URL lock or a tdmrep.json origin lock.
        One whose admission raises gets its own state and reason (RunRecord.not_admitted), the
        others go on; a store error ends the group, a bug fails the run after it."""
        failed: dict[int, Exception] = {}
        registered: list[Any] = [None] * len(group)
        with self.ledger.transaction() as still_open:
            for n, c in enumerate(group):
                try:  # one row written, in one statement: all of it or nothing
                    if not getattr(c, "withdrawn", None):
                        registered[n] = self._register(source_id, c)
                except Exception as exc:
                    if any(registered) and not still_open():
                        raise  # SQLite undid the group's rows itself: nothing can go on
                    failed[n] = exc
        for n, (c, r) in enumerate(zip(group, registered, strict=True)):
            try:
                job = None if n in failed else self._decide(source_id, c, r)
            except Exception as exc:
                if isinstance(exc, StoreError):
                    raise
                failed[n], job = exc, None
            if n in failed:
                self.record.not_admitted(source_id, c.source_key, failed[n], FINAL_STATES)
            yield job
        if bugs := [e for e in failed.values() if not isinstance(e, CollectorError)]:
            raise bugs[0]

    def _decide(self, source_id: int, c: Any,
                registered: tuple[int, str | None, Any] | None) -> Job | None:
        """The rest of :meth:`admit` once the candidate's row is committed."""
        if getattr(c, "withdrawn", None):
            self._withdrawn_by_archive(source_id, c)
            return None
        if registered is None:
            return None
        item_id, spdx_id, image_url = registered
        statement = None if spdx_id else find_statement(c.licence_raw, c.licence_url)
        ok, reason = licence_allowed(spdx_id, self.recipe.licences.allow,
                                     self.recipe.licences.allow_unknown, statement)
        if not ok:
            detail = (f"licence {c.licence_raw or c.licence_url!r} is the rights statement "
                      f"{statement.code} ({statement.name}), not in the allowlist (add "
                      f"\"rs:{statement.code}\" to allow it)" if statement and not spdx_id
                      else licence_detail(c.licence_raw, c.licence_url, spdx_id))
            self.record.finish(item_id, "skipped", reason, detail)
            return None
        unmet = self._unmet_condition(source_id, c, spdx_id)
        if unmet is not None:
            self.record.finish(item_id, "skipped", "condition_not_met", unmet)
            return None
        if c.content is not None or c.local_path is not None:
            self.ingest_local(source_id, item_id, c)
            return None
        if (unusable := unusable_image_url(c)) is not None:  # none, or not valid Unicode
            self.record.finish(item_id, *unusable)
            return None
        refusal = self.gate.admission(source_id, item_id, c.page_url)
        if refusal is not None:  # reserved on the listing or detail page: nothing requested
            self.record.finish(item_id, refusal.state, refusal.reason, refusal.detail,
                               reservation_checks=self.gate.checks(item_id))
            return None
        with self._url_lock:
            if c.image_url in self._waiting:  # queued or in flight for an earlier item
                self._waiting[c.image_url].append(item_id)
                return None
            settled = self._settled.get(c.image_url)
            same = (None if settled is not None
                    else queries.stored_with_image_url(self.ledger, image_url, item_id))
            if settled is None and same is None:
                self._waiting[c.image_url] = []
        if settled is not None:
            self._take_outcome(item_id, self.ledger.item(settled) or {})
        elif same:
            self._same_url_stored(item_id, same)
        else:
            return Job(item_id, c.image_url, spdx_id, self._secret_params.get(source_id, ()))
        return None

    def settle(self, job: Job) -> None:
        """``job`` is over (or left for the next run): the items that listed the same image
        URL while it was queued or in flight take its outcome, without a request of their
        own. Called by the run for every job it was given."""
        with self._url_lock:
            waiting = self._waiting.pop(job.url, [])
            owner = self.ledger.item(job.item_id) or {}
            if owner.get("state") in URL_OUTCOMES_TAKEN:
                self._settled[job.url] = job.item_id
        for item_id in waiting:
            self._take_outcome(item_id, owner)

    def _take_outcome(self, item_id: int, owner: dict[str, Any]) -> None:
        """Give ``item_id`` the outcome of ``owner``, the item that requested the same image
        URL: the same file if it was kept, else the same state and reason. An owner left
        pending (the run stopped first) leaves the item pending too."""
        state = owner.get("state")
        if state in ("stored", "near_duplicate") and owner.get("file_sha256"):
            self._same_url_stored(item_id, {"id": owner["id"],
                                            "file_sha256": owner["file_sha256"]})
        elif state in URL_OUTCOMES_TAKEN:
            self.record.finish(
                item_id, state, owner.get("reason"),
                f"same image URL as item {owner['id']}, not requested again: "
                f"{owner.get('detail') or state}",
                file_sha256=owner.get("file_sha256"), duplicate_of=owner.get("duplicate_of"),
                near_distance=owner.get("near_distance"),
                near_mirrored=owner.get("near_mirrored"))

    def _same_url_stored(self, item_id: int, same: dict[str, Any]) -> None:
        """The image URL's file is kept under item ``same["id"]``: ``item_id`` is its
        duplicate, or takes it over when listed earlier (listing order decides)."""
        with self._lock:
            verdict = dedup.exact_verdict(item_id, self.rank(item_id), same["id"],
                                          self.rank(same["id"]))
            if isinstance(verdict, TakeOver):
                self._take_over(verdict, same["file_sha256"], {})
            else:
                self.record.finish(
                    item_id, "duplicate", "exact_duplicate",
                    "same image URL as an item already stored; not fetched again",
                    file_sha256=same["file_sha256"], duplicate_of=same["id"])

    def _unmet_condition(self, source_id: int, c: Any, spdx_id: str | None) -> str | None:
        """Why the item is not wanted (the first keep_if that does not hold: the recipe's
        [items], then its source's), or None."""
        conditions = self._conditions.get(source_id, ())
        if not conditions:
            return None
        name = self._source_names[source_id]
        view = item_view(source=name, title=c.title, creator=c.creator, date=c.date,
                         licence=spdx_id, licence_text=c.licence_raw,
                         licence_url=c.licence_url, page_url=c.page_url,
                         image_url=c.image_url, metadata=c.metadata)
        for where, condition in conditions:
            if not condition.holds(view):
                years = (f"; its date {c.date!r} was read as {view['year_from']}-"
                         f"{view['year_to']}" if view["year_from"] is not None
                         else f"; its date {c.date!r} could not be read" if c.date else "")
                return f"{where} keep_if {condition.text!r} does not hold{years}"
        return None

    def _register(self, source_id: int, c: Any) -> tuple[int, str | None, Any] | None:
        """The candidate's item row, written with the secrets kept out: (item id, SPDX id,
        image URL as recorded), or None when the item needs nothing more in this run."""
        licence = normalise_licence(c.licence_raw, c.licence_url)
        fields = {
            "image_url": c.image_url, "page_url": c.page_url, "title": c.title,
            "creator": c.creator, "licence_raw": c.licence_raw, "licence_url": c.licence_url,
            "spdx_id": licence.spdx_id, "date": c.date, "metadata": c.metadata or None,
            "rights_statement": None if licence.spdx_id else _statement_code(c),
            "size_request": getattr(c, "size_request", None),
            "crop_box": list(c.crop_box) if c.crop_box else None,
            "local_path": shown_name(str(c.local_path)) if c.local_path else None,
            "run_id": self.record.run_id,
        }
        # Servers echo API keys into the URLs and items they send back: keep them out of the
        # ledger (the job still fetches the URL as given).
        fields = self.record.scrubbed_fields(fields, self._secret_params.get(source_id, ()))
        row = self.ledger.item_by_key(source_id, c.source_key)
        if row and row["state"] in FINAL_STATES:
            self.record.count("already_done")
            if c.local_path and row.get("file_sha256"):
                self._scan_sha[(source_id, c.source_key)] = row["file_sha256"]
            return None
        if row and self._gone_for_good(row):
            self.record.count("given_up")
            return None
        if row and upkeep_queries.item_is_withdrawn(self.ledger, row["id"]):
            self.record.count("withdrawn")  # taken out on request: never fetched again
            return None
        if row:
            item_id = row["id"]
            self.ledger.update_item(item_id, **fields)
        else:
            item_id = self.ledger.add_item(source_id, c.source_key, fields)
        self._item_source[item_id] = source_id
        self.gate.register(item_id, source_id)
        return item_id, licence.spdx_id, fields["image_url"]

    def _withdrawn_by_archive(self, source_id: int, c: Any) -> None:
        """The archive says it withdrew the record: an item we have is marked (state
        ``withdrawn_by_archive``, reason ``deleted_in_archive``; its file and provenance
        stay) with a ledger note; a record we never had is only counted."""
        row = self.ledger.item_by_key(source_id, c.source_key)
        if row is None:
            self.record.count("withdrawn_unseen")
            return
        if row["state"] == WITHDRAWN_BY_ARCHIVE:
            self.record.count("already_done")
            return
        was = f"{row['state']}" + (f" ({row['reason']})" if row.get("reason") else "")
        self.record.finish(row["id"], WITHDRAWN_BY_ARCHIVE, "deleted_in_archive",
                           f"{c.withdrawn}; was {was}")
        self.ledger.add_note(WITHDRAWN_BY_ARCHIVE,
                             f"item {row['id']} ({c.source_key}) was withdrawn by the archive: "
                             f"{c.withdrawn}; it was {was}",
                             run_id=self.record.run_id, source_id=source_id)

    def _gone_for_good(self, row: dict[str, Any]) -> bool:
        """A failed item whose image the server said is gone (404/410) in GONE_RUNS runs is
        not requested again: retrying a missing file every night only costs the archive."""
        if row["state"] != "failed" or row["reason"] not in GONE_REASONS:
            return False
        return queries.gone_runs(self.ledger, row["id"]) >= GONE_RUNS

    def rank(self, item_id: int) -> dedup.Rank:
        """The item's place in listing order (see :func:`collector.run.dedup.listing_rank`)."""
        source_id = self._item_source.get(item_id)
        if source_id is None:
            source_id = (self.ledger.item(item_id) or {}).get("source_id")
        return dedup.listing_rank(self._source_order, source_id, item_id)

    # -- local files (scans and crops) ---------------------------------------------------------
    def ingest_local(self, source_id: int, item_id: int, c: Any) -> None:
        """Copy a scan (``c.local_path``, a regular file) or a crop (``c.content``) into a
        temp file of the store, then ingest it; a file that cannot be read fails the item."""
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
            self._unreadable(item_id, c, exc)
            return
        sha = digest.hexdigest()
        extra: dict[str, Any] = {}
        if c.parent_key is not None:
            extra["parent_sha256"] = self._scan_sha.get((source_id, c.parent_key))
        else:
            self._scan_sha[(source_id, c.source_key)] = sha
        licence = normalise_licence(c.licence_raw, c.licence_url)
        self.ingest_file(item_id, licence.spdx_id, tmp, sha,
                         url=shown_name(str(c.local_path or "")),
                         reservation_checks=self.gate.checks(item_id, local=True), **extra)

    def _unreadable(self, item_id: int, c: Any, exc: OSError) -> None:
        """A local file that could not be copied fails its item; a full or broken store
        (any other OSError) ends the run."""
        shown = shown_name(str(c.local_path))
        if isinstance(exc, FileNotFoundError):
            self.record.finish(item_id, "failed", "file_missing", f"{shown}: {exc.strerror}")
        elif isinstance(exc, NotARegularFile):
            self.record.finish(item_id, "failed", "not_a_file", f"{shown}: {exc}")
        elif exc.filename is not None and Path(exc.filename) == c.local_path:
            self.record.finish(item_id, "failed", "unreadable_file", f"{shown}: {exc.strerror}")
        else:
            raise StoreError(f"cannot copy {shown} into the store: {exc}",
                             errno=exc.errno) from exc

    # -- ingest ------------------------------------------------------------------------------
    def ingest_file(self, item_id: int, spdx_id: str | None, path: Path, sha: str, *,
                    content_type: str | None = None, url: str | None = None,
                    **extra: Any) -> None:
        """Check a complete temp file and store it, or record why not. Always consumes it."""
        try:
            if _explained(self.ledger.file(sha)):
                self._record_duplicate(item_id, sha, extra)
                return
            images = self.recipe.images
            try:
                facts = inspect_image(path, content_type=content_type, url=url,
                                      max_pixels=images.max_pixels,
                                      min_side=images.min_side,
                                      min_aspect=images.min_aspect,
                                      max_aspect=images.max_aspect, full_decode=False,
                                      transparent=images.transparent,
                                      enlarged=images.enlarged,
                                      colours=images.dominant_colours)
            except ImageRejected as exc:
                self.record.finish(item_id, "rejected", exc.reason, exc.detail, **extra)
                return
            refusal = self.gate.in_file(item_id, url, facts.rights)
            web = (url or "").lower().startswith(("http://", "https://"))
            extra = {**extra, "reservation_checks": self.gate.checks(item_id, local=not web)}
            if refusal is not None:  # IPTC Data Mining in the file: the temp file goes
                self.record.finish(item_id, refusal.state, refusal.reason, refusal.detail,
                                   **extra)
                return
            with self._lock:
                row = self.ledger.file(sha)
                if _explained(row):
                    self._record_duplicate(item_id, sha, extra)
                    return
                self._store_new(item_id, spdx_id, path, sha, facts, extra,
                                recovered=row is not None)
        finally:
            with contextlib.suppress(OSError):
                path.unlink(missing_ok=True)

    def _record_duplicate(self, item_id: int, sha: str, extra: dict[str, Any]) -> None:
        first = (self.ledger.file(sha) or {}).get("first_item_id")
        verdict = dedup.exact_verdict(item_id, self.rank(item_id), first,
                                      self.rank(first) if first is not None else None)
        if isinstance(verdict, TakeOver):
            self._take_over(verdict, sha, extra)
            return
        self.record.finish(item_id, "duplicate", "exact_duplicate",
                           "the same bytes are already stored", file_sha256=sha,
                           duplicate_of=verdict.original, **extra)

    def _take_over(self, verdict: TakeOver, sha: str, extra: dict[str, Any]) -> None:
        """Apply a :class:`~collector.run.dedup.TakeOver` of the file ``sha``."""
        plan = dedup.take_over_plan(verdict.new_id, self.ledger.item(verdict.old_id) or {})
        new = plan.new_item
        with self.ledger.transaction():
            self.record.finish(verdict.new_id, new["state"], new["reason"], new["detail"],
                               file_sha256=sha, duplicate_of=new["duplicate_of"],
                               near_distance=new["near_distance"],
                               near_mirrored=new["near_mirrored"], **extra)
            self.ledger.pass_file_to(sha, verdict.old_id, verdict.new_id)
            self.ledger.update_item(verdict.old_id, **plan.old_item)
        self.record.recount(plan.was, "duplicate")

    def _near_verdict(self, item_id: int, sha: str, facts: ImageFacts, path: Path,
                      ) -> Keep | Demote | NearCopy:
        """Look up the stored look-alikes of a new file, keep those the second look
        confirms (collector.checks.likeness) and let dedup decide."""
        near = [] if "blank" in facts.flags else self._confirmed(sha, facts, path)
        candidates = []
        for m in near:
            first = (self.ledger.file(m.key) or {}).get("first_item_id")
            # A recovered file without an item yet is nobody's original: it makes no item a
            # near duplicate until a gather attaches it to the item that lists it.
            if first is not None:
                candidates.append(NearCandidate(m.key, m.distance, "mirror" in m.kind, first,
                                                self.rank(first), m.kind))
        best = dedup.closest(candidates)
        if best is None:  # no look-alike: kept, whatever the item's rank (not looked up)
            return Keep()
        original = self.ledger.item(best.original_id)
        return dedup.near_verdict(self.rank(item_id), best,
                                  original["state"] if original else None,
                                  drop=self.recipe.images.near_duplicates == "drop")

    def _confirmed(self, sha: str, facts: ImageFacts, path: Path) -> list[Confirmed]:
        """The stored look-alikes the second look agrees with, as trace finds them: the pHash
        for each of the 8 turns (resized, mirrored, rotated copies) and the stored files'
        window hashes (crops; not the loose-radius crop candidates trace adds, each of which
        would decode a stored file for every new one). A stored file that cannot be read is
        not confirmed: the new file is kept, nothing is lost."""
        turns = facts.turns or {"same": facts.phash, "mirror": facts.phash_mirror}
        near = [c for c in self.index.candidates(turns, self.recipe.images.near_distance,
                                                 crops=True, loose=False) if c[0] != sha]
        if not near:
            return []
        try:
            look = look_at_file(path)
        except IMAGE_ERRORS:
            return []

        def stored_look(key: str) -> Look | None:
            found = self.store.find(key)
            try:
                return look_at_file(found) if found else None
            except IMAGE_ERRORS:
                return None

        return confirm(look, near, stored_look, limit=len(near))

    def _store_new(self, item_id: int, spdx_id: str | None, path: Path, sha: str,
                   facts: ImageFacts, extra: dict[str, Any], *, recovered: bool = False) -> None:
        """Store a new file, or attach ``item_id`` to a file registered by rebuild-ledger
        (``recovered``: the bytes are already in the store, the row has no item yet)."""
        flags = list(facts.flags)
        conflict = rights_conflict(spdx_id, facts.rights)
        if conflict:
            flags.append("licence_conflict")
        state, reason, detail = "stored", None, conflict
        verdict = self._near_verdict(item_id, sha, facts, path)
        if isinstance(verdict, NearCopy):
            extra = {**extra, "duplicate_of": verdict.original_id,
                     "near_distance": verdict.distance, "near_mirrored": verdict.mirrored}
            state, reason, detail = "near_duplicate", "near_duplicate", verdict.detail
            if not verdict.keep_file:
                self.record.finish(item_id, state, reason, detail, **extra)
                return
        row = _file_row(path, facts, item_id, flags)
        if self._pixel_rules:
            source = self._source_names.get(self._item_source.get(item_id, -1))
            row.update(self._pixel_rules.verdict(source, row).columns())
        if recovered:
            # The stored bytes are these bytes (same sha256): attach, do not store again.
            with self.ledger.transaction():
                self.ledger.update_file(sha, row)
                self.record.finish(item_id, state, reason, detail, file_sha256=sha, **extra)
        else:
            self._place(path, sha, facts, row, item_id,
                        lambda: self.record.finish(item_id, state, reason, detail,
                                                   file_sha256=sha, **extra))
        if isinstance(verdict, Demote):
            self._demote(verdict, item_id)
        self._on_stored()

    def _place(self, path: Path, sha: str, facts: ImageFacts, row: dict[str, Any],
               item_id: int, finish: Callable[[], None]) -> None:
        """Move the temp file into the store and commit its row and the item's outcome.
        Write-ahead: the intent is committed before the file appears in the store and
        dropped in the transaction that adds its row, so recovery removes a stored file
        without a row only when an intent says it was being placed."""
        placing = False

        def intent() -> None:  # called by adopt only when no file of this digest is stored
            nonlocal placing
            placing = True
            self.ledger.add_store_intent(sha, item_id)

        self.store.adopt(path, sha, facts.ext, synced=True, before_placing=intent)
        with self.ledger.transaction():
            self.ledger.add_file({"sha256": sha, **row})
            finish()
            if placing:
                self.ledger.drop_store_intent(sha)
        self.index.add(sha, facts.phash, facts.window_hashes or None)

    def _demote(self, verdict: Demote, new_id: int) -> None:
        """A stored original turns out to be a near copy of an earlier-listed item."""
        drop = self.recipe.images.near_duplicates == "drop"
        sha = verdict.match.sha256
        with self.ledger.transaction():
            self.ledger.update_item(verdict.original_id,
                                    **dedup.demote_fields(new_id, verdict.match, drop=drop))
            if drop:
                self.ledger.forget_file(sha)
                # Committed with the row's removal: a crash before the unlink below leaves
                # a file that recovery may remove because an intent names it.
                self.ledger.add_store_intent(sha, None)
        if drop:
            self.index.remove(sha)
            stored = self.store.find(sha)
            if stored is not None:
                stored.unlink(missing_ok=True)
            self.ledger.drop_store_intent(sha)
        self.record.recount("stored", "near_duplicate")


def _file_row(path: Path, facts: ImageFacts, item_id: int, flags: list[str]) -> dict[str, Any]:
    """The files row of a new file (without its sha256)."""
    return {"size": path.stat().st_size, **facts.file_columns(), "first_item_id": item_id,
            "flags": flags}


def _statement_code(c: Any) -> str | None:
    """The RightsStatements.org statement id the candidate's rights name, or None."""
    found = find_statement(c.licence_raw, c.licence_url)
    return found.code if found else None
