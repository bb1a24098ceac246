"""Re-checking what was gathered, politely: has the archive changed since?

A re-check is a run (``runs.options`` says ``"recheck": true``) through the same polite
fetcher as ``gather`` (robots.txt, per-host budgets, Retry-After). It first lists every
source again (listing and detail pages) to compare each kept item's licence, title and
creator with the ledger; then it asks for each kept item's image with the ETag and
Last-Modified its last download recorded (a conditional GET, RFC 9110 §13.1.2-13.1.3), so an
unchanged image costs the archive a 304 without a body (§15.4.5).

Every observation is a new ``observations`` row with its time; nothing is overwritten. Per
item: ``unchanged`` (304, or the same bytes), ``changed_bytes`` (the new bytes are checked and
stored as a new file, recorded as a new version; the old file and the item stay as they were),
``licence_changed`` (old -> new SPDX id or text), ``fields_changed`` (title or creator),
``gone`` (404 or 410), ``moved`` (the image URL now redirects), ``failed`` (anything else,
with the reason). A re-check stops on ``--until``/``--for`` like ``gather``; the next
re-check resumes the unfinished one and skips the items it already observed.
"""

from __future__ import annotations

import time
from collections.abc import Callable, Iterator
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from collector import __version__, sources
from collector.checks.images import inspect_image
from collector.checks.licences import normalise_licence
from collector.checks.pixel_rules import PixelRules
from collector.config.recipe import Recipe
from collector.errors import CollectorError, FetchError, ImageRejected
from collector.run.gather import build_fetcher, prepared_run
from collector.run.record import NullProgress, RunRecord, secret_values
from collector.run.reservations import ReservationGate
from collector.run.scheduling import StopRules
from collector.storage import upkeep_queries as uq
from collector.storage.collection import Collection
from collector.storage.ledger import Ledger, utc_now
from collector.urls import redact

GONE_STATUSES = (404, 410)  # RFC 9110 §15.5.5 Not Found, §15.5.11 Gone


@dataclass
class Finding:
    """One observation of a re-check, as reported."""

    item_id: int
    source: str
    source_key: str
    finding: str
    status: int | None = None
    old_value: str | None = None
    new_value: str | None = None
    new_sha256: str | None = None
    detail: str | None = None


@dataclass
class RecheckResult:
    """How a re-check ended and what it saw (this run and the one it resumed)."""

    run_id: int
    outcome: str
    findings: list[Finding] = field(default_factory=list)
    resumed_from: int | None = None

    def changes(self) -> list[Finding]:
        """Every finding other than ``unchanged``."""
        return [f for f in self.findings if f.finding != "unchanged"]


@dataclass(frozen=True)
class Listed:
    """What a source says about an item today."""

    spdx_id: str | None
    licence: str | None
    title: str | None
    creator: str | None


def recheck(collection: Collection, *, stop: StopRules | None = None,
            options: dict[str, Any] | None = None,
            fetcher_factory: Callable[[Recipe, Ledger], Any] = build_fetcher,
            on_finding: Callable[[Finding], None] | None = None) -> RecheckResult:
    """Re-check the collection (see the module docstring)."""
    stop = stop or StopRules()
    with prepared_run(collection, command="recheck") as (recipe, ledger):
        earlier = uq.unfinished_rechecks(ledger)
        resumed = earlier[-1] if earlier else None
        run_id = ledger.start_run(recipe.sha256, {**(options or {}), "recheck": True,
                                                  "resumed_from": resumed}, __version__)
        if recipe.text:
            ledger.add_row("recipes", {"sha256": recipe.sha256, "text": recipe.kept_text(),
                                       "first_used_at": utc_now()})
        fetcher = fetcher_factory(recipe, ledger)
        if fetcher is not None and hasattr(fetcher, "run_id"):
            fetcher.run_id = run_id
        outcome = "failed: internal error in the re-check"
        try:
            checker = _Checker(collection, recipe, ledger, fetcher, run_id, stop, on_finding)
            outcome = checker.run(earlier)
        except KeyboardInterrupt:
            outcome = "interrupted"
            raise
        except CollectorError as exc:
            outcome = f"failed: {exc}"
            raise
        finally:
            ledger.end_run(run_id, outcome)
            if fetcher is not None and hasattr(fetcher, "close"):
                fetcher.close()
        findings = [_finding_of(o, checker.names) for rid in (*earlier, run_id)
                    for o in uq.observations(ledger, run_id=rid)]
    return RecheckResult(run_id, outcome, findings, resumed)


def _finding_of(o: uq.Observation, names: dict[int, tuple[str, str]]) -> Finding:
    source, key = names.get(o.item_id, ("?", "?"))
    return Finding(o.item_id, source, key, o.finding, o.status, o.old_value, o.new_value,
                   o.new_sha256, o.detail)


class _Checker:
    """One re-check run: list again, then look at every kept image."""

    def __init__(self, collection: Collection, recipe: Recipe, ledger: Ledger, fetcher: Any,
                 run_id: int, stop: StopRules,
                 on_finding: Callable[[Finding], None] | None) -> None:
        self.collection, self.recipe, self.ledger = collection, recipe, ledger
        self.fetcher, self.run_id, self.stop = fetcher, run_id, stop
        self.on_finding = on_finding
        withdrawn = uq.withdrawn_sha256s(ledger)  # taken out on request: not looked at
        self.targets = [t for t in uq.recheck_targets(ledger)
                        if t.file_sha256 not in withdrawn
                        and not uq.item_is_withdrawn(ledger, t.item_id)]
        self.names = {t.item_id: (t.source, t.source_key) for t in self.targets}
        self.versions = uq.newest_versions(ledger)  # bytes an earlier re-check already kept
        # Reservations against text-and-data mining are honoured as in a gather: a reserved
        # image is not asked for again, and the finding says so (collector.run.reservations).
        self.source_ids = {src["name"]: ledger.source_id(src["name"], src["kind"], src,
                                                         tuple(src.get("former_names") or ()))
                           for src in recipe.sources}
        record = RunRecord(ledger, NullProgress(), secret_values(recipe))  # secrets hidden
        record.run_id = run_id
        self.gate = ReservationGate(recipe, ledger, fetcher, record,
                                    list(self.source_ids.values()))

    def _stopped(self) -> bool:
        return self.stop.deadline is not None and time.time() >= self.stop.deadline

    def run(self, earlier: list[int]) -> str:
        done = {i for rid in earlier for i in uq.observed_items(self.ledger, rid)}
        listed = self._listings()
        if listed is None:
            return "stopped: the time limit was reached"
        for target in self.targets:
            if target.item_id in done:
                continue
            if self._stopped():
                return "stopped: the time limit was reached"
            self._check(target, listed.get((target.source, target.source_key)))
        return "finished"

    # -- listings --------------------------------------------------------------------------
    def _listings(self) -> dict[tuple[str, str], Listed] | None:
        """What every source lists today, by (source name, key); None when time ran out."""
        found: dict[tuple[str, str], Listed] = {}
        for source in self.recipe.sources:
            try:
                for c in self._candidates(source):
                    if self._stopped():
                        return None
                    licence = normalise_licence(c.licence_raw, c.licence_url)
                    found[(source["name"], c.source_key)] = Listed(
                        licence.spdx_id, c.licence_raw or c.licence_url, c.title, c.creator)
            except CollectorError as exc:  # a listing that fails: its items are not compared
                self.ledger.add_note("recheck_listing", f"re-check: listing of "
                                     f"{source['name']!r} stopped: {exc}", run_id=self.run_id)
        return found

    def _candidates(self, source: dict[str, Any]) -> Iterator[Any]:
        def note(n: Any) -> None:
            self.ledger.add_note(n.kind, n.message, url=n.url, run_id=self.run_id)

        pages = self.gate.watching(self.fetcher, self.source_ids[source["name"]])
        yield from sources.iter_candidates(source, pages, note, self.collection.root)

    # -- one item --------------------------------------------------------------------------
    def _check(self, t: uq.RecheckTarget, now: Listed | None) -> None:
        seen: list[Finding] = []
        if now is not None:
            if (now.spdx_id or None) != (t.spdx_id or None) or (
                    now.spdx_id is None and (now.licence or None) != (t.licence_raw or None)):
                seen.append(self._finding(t, "licence_changed", old=t.spdx_id or t.licence_raw,
                                          new=now.spdx_id or now.licence))
            seen += self._field_changes(t, now)
        seen += self._image(t)
        if any(f.finding != "unchanged" for f in seen):
            seen = [f for f in seen if f.finding != "unchanged"]
        if not seen:
            seen.append(self._finding(t, "unchanged"))
        for f in seen:
            self.ledger.add_row("observations", {
                "run_id": self.run_id, "item_id": f.item_id, "observed_at": utc_now(),
                "finding": f.finding, "status": f.status, "old_value": f.old_value,
                "new_value": f.new_value, "new_sha256": f.new_sha256, "detail": f.detail})
            if self.on_finding is not None:
                self.on_finding(f)

    def _field_changes(self, t: uq.RecheckTarget, now: Listed) -> list[Finding]:
        item = self.ledger.item(t.item_id) or {}
        out = []
        for name in ("title", "creator"):
            old, new = item.get(name), getattr(now, name)
            if (old or None) != (new or None):
                out.append(self._finding(t, "fields_changed", old=old, new=new, detail=name))
        return out

    def _finding(self, t: uq.RecheckTarget, finding: str, *, status: int | None = None,
                 old: str | None = None, new: str | None = None, sha: str | None = None,
                 detail: str | None = None) -> Finding:
        return Finding(t.item_id, t.source, t.source_key, finding, status, old, new, sha,
                       detail)

    def _image(self, t: uq.RecheckTarget) -> list[Finding]:
        """The conditional request for the item's image and what its answer means."""
        if self.fetcher is None or not t.image_url:
            return []
        refusal = self._reserved_before(t)
        if refusal is not None:  # deferred: tdmrep.json could not be read, asked again later
            kind = "failed" if refusal.state == "deferred" else "reserved"
            return [self._finding(t, kind, detail=refusal.detail)]
        store = self.collection.store
        store.ensure()
        try:
            got = self.fetcher.download(t.image_url, store.incoming_dir, item_id=t.item_id,
                                        etag=t.etag, last_modified=t.last_modified)
        except FetchError as exc:
            if exc.status in GONE_STATUSES:
                return [self._finding(t, "gone", status=exc.status)]
            return [self._finding(t, "failed", status=exc.status, detail=exc.reason)]
        refusal = self.gate.after_download(t.item_id, got.final_url, got.headers)
        if refusal is not None:  # reserved in the image's own answer: its bytes are not kept
            if got.path is not None:
                got.path.unlink(missing_ok=True)
            return [self._finding(t, "reserved", status=got.status, detail=refusal.detail)]
        out = []
        final = redact(got.final_url, getattr(getattr(self.fetcher, "settings", None),
                                              "secret_params", ()) or ())
        # Moved: the answer now comes from elsewhere than last time (an image URL that always
        # redirected to the same place has not moved).
        if final != (t.last_url or redact(t.image_url)):
            out.append(self._finding(t, "moved", status=got.status,
                                     old=t.last_url or t.image_url, new=final))
        if got.not_modified or got.path is None:
            return out if out else [self._finding(t, "unchanged", status=304)]
        if got.sha256 in (t.file_sha256, self.versions.get(t.item_id)):
            got.path.unlink(missing_ok=True)
            return out if out else [self._finding(t, "unchanged", status=got.status)]
        return [*out, self._new_version(t, got)]

    def _reserved_before(self, t: uq.RecheckTarget) -> Any:
        """A reservation on the item's listing or detail page, or tdmrep.json's rule for its
        image (skipped: the image is not requested), or None."""
        source_id = self.source_ids.get(t.source)
        if source_id is None or not t.image_url:
            return None
        page_url = (self.ledger.item(t.item_id) or {}).get("page_url")
        refusal = self.gate.admission(source_id, t.item_id, page_url)
        return refusal if refusal is not None else self.gate.before_image(t.item_id,
                                                                          t.image_url)

    def _new_version(self, t: uq.RecheckTarget, got: Any) -> Finding:
        """New bytes at the same URL: checked and stored as a new file; the old one stays."""
        path: Path = got.path
        try:
            facts = inspect_image(path, content_type=got.content_type, url=got.final_url,
                                  max_pixels=self.recipe.images.max_pixels, min_side=1,
                                  full_decode=False,
                                  colours=self.recipe.images.dominant_colours)
        except ImageRejected as exc:
            path.unlink(missing_ok=True)
            return self._finding(t, "changed_bytes", status=got.status, old=t.file_sha256,
                                 new=got.sha256, detail=f"new bytes not kept: {exc.reason}")
        sha = got.sha256
        placing = self.collection.store.find(sha) is None
        if placing:  # write-ahead like ingest: the intent before the file enters the store
            self.ledger.add_store_intent(sha, t.item_id)
        self.collection.store.adopt(path, sha, facts.ext, synced=False)
        row = {"sha256": sha, "size": got.size, **facts.file_columns(),
               "first_item_id": t.item_id, "flags": [*facts.flags, "new_version"]}
        rules = PixelRules(self.recipe.pixel_rules)  # judged like a file a gather stores
        if rules:
            row.update(rules.verdict(t.source, row).columns())
        with self.ledger.transaction():
            self.ledger.add_file(row)
            if placing:
                self.ledger.drop_store_intent(sha)
        return self._finding(t, "changed_bytes", status=got.status, old=t.file_sha256,
                             new=sha, sha=sha)


FINDING_LABELS = {
    "unchanged": "unchanged", "changed_bytes": "changed bytes (new version kept)",
    "licence_changed": "licence changed", "fields_changed": "fields changed",
    "gone": "gone", "moved": "moved", "failed": "could not check",
    "reserved": "reserved against text-and-data mining (not asked for again)",
}


def report_lines(result: RecheckResult, *, show_all: bool = False) -> list[str]:
    """The re-check report: one line per finding (changes only unless ``show_all``), then
    the counts."""
    lines = [f"Re-check run #{result.run_id}: {result.outcome}"
             + (f" (resumed run #{result.resumed_from})" if result.resumed_from else "")]
    counts: dict[str, int] = {}
    for f in result.findings:
        counts[f.finding] = counts.get(f.finding, 0) + 1
        if f.finding == "unchanged" and not show_all:
            continue
        change = (f": {f.old_value} -> {f.new_value}"
                  if f.old_value is not None or f.new_value is not None else "")
        extra = f" ({f.detail})" if f.detail else ""
        status = f" [HTTP {f.status}]" if f.status else ""
        lines.append(f"  item #{f.item_id} {f.source}/{f.source_key}: "
                     f"{FINDING_LABELS.get(f.finding, f.finding)}{change}{extra}{status}")
    lines.append("Findings: " + (", ".join(f"{FINDING_LABELS.get(k, k)} {n}"
                                           for k, n in sorted(counts.items())) or "none"))
    return lines
