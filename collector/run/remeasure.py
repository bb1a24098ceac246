"""Bringing the measured facts of stored files up to date, offline: ``collector remeasure``.

A collection gathered by an older collector holds files whose facts are stale or missing: a
perceptual hash made by an older pipeline (``files.hash_algo`` differs from
:data:`collector.checks.phash.HASH_ALGO`; the first pipeline clipped 16-bit pictures to a
blank page), no transparency share or native size (stored before schema 8), no colour and
tone facts (stored before schema 10) or facts computed another way (``files.colour_algo``
differs from :data:`collector.checks.colour_facts.COLOUR_ALGO`, schema 14), no crop window
hashes (stored before schema 12).
:func:`remeasure` re-reads the stored bytes from the
collection's store (it never builds a fetcher: nothing is requested) and measures them with
:func:`collector.checks.images.inspect_image`, the function ingest uses, with the recipe's
settings, so every fact equals what a fresh gather of the same file records.

What is measured is a list, :data:`MEASUREMENTS`: each entry names which files need it (a
query over a range of files rows, in :mod:`collector.storage.upkeep_queries`), computes new
values from a :class:`Reading` of one stored file, and writes them. Adding a measured fact is
one more entry.

Safe to interrupt: files are walked in rowid order, a batch at a time, and each batch's new
facts are one transaction, so a crash or Ctrl-C leaves every file with either its old or its
new facts; the next run finds what is still due. ``everything`` (``--all``) remembers the last
finished batch in the ledger (``ledger_facts``), so it resumes too. Hashes rewritten in place
raise the hash generation (:func:`collector.storage.hashindex.note_hashes_rewritten`) in the
same transaction, so trace's hash file is rebuilt from the ledger when next opened.

Verdicts are not changed: a file whose hash moved by more than ``near_distance`` bits may have
been judged (or have made another item) a near duplicate on the old hash; such files are
listed, with the near-duplicate items they took part in, for the curator.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field
from functools import cached_property
from pathlib import Path
from typing import Any

from collector.checks.colour_facts import COLOUR_ALGO
from collector.checks.images import ImageFacts, inspect_image
from collector.checks.phash import HASH_ALGO, WINDOW_ALGO, hamming, pack_windows, to_signed64
from collector.config.recipe import Recipe
from collector.errors import CollectorError, ImageRejected
from collector.run import set_aside
from collector.storage import hashindex, queries
from collector.storage import upkeep_queries as uq
from collector.storage.collection import Collection
from collector.storage.ledger import Ledger

__all__ = ["MEASUREMENTS", "Measurement", "Reading", "RemeasureResult", "note_text",
           "remeasure", "report_lines"]

BATCH = 200  # files per transaction (and per progress line)
# ledger_facts: the last rowid a remeasure --all finished (empty once it completed).
ALL_DONE_UPTO = "remeasure_all_upto"


@dataclass(frozen=True)
class Settings:
    """The recipe's image settings a measurement uses (as ingest passes them)."""

    max_pixels: int
    colours: int  # [images] dominant_colours; 0: no colour facts
    enlarged: str  # "keep": a JPEG's native size is not estimated, as at ingest
    near_distance: int

    @classmethod
    def from_recipe(cls, recipe: Recipe) -> Settings:
        images = recipe.images
        return cls(images.max_pixels, images.dominant_colours, images.enlarged,
                   images.near_distance)


class Reading:
    """One stored file being remeasured: its ledger row as it was, its path in the store,
    and (read once, on first use) its facts as ingest computes them."""

    def __init__(self, sha256: str, path: Path, row: dict[str, Any], settings: Settings):
        self.sha256, self.path, self.row, self.settings = sha256, path, row, settings

    @cached_property
    def facts(self) -> ImageFacts:
        """inspect_image with the recipe's settings; shape limits and policies off (a stored
        file is measured, never judged again), "flag" for ``enlarged`` so a JPEG's native
        size is estimated exactly when ingest estimates it."""
        s = self.settings
        return inspect_image(self.path, max_pixels=s.max_pixels, full_decode=False,
                             transparent="keep",
                             enlarged="keep" if s.enlarged == "keep" else "flag",
                             colours=s.colours)


def _hash_columns(reading: Reading) -> dict[str, Any]:
    """The pHash pair, its pipeline and the ``blank`` flag (other flags kept as they are)."""
    facts = reading.facts
    flags = list(reading.row.get("flags") or [])
    if "blank" not in facts.flags:
        flags = [f for f in flags if f != "blank"]
    elif "blank" not in flags:
        flags.append("blank")
    return {"phash": to_signed64(facts.phash), "phash_mirror": to_signed64(facts.phash_mirror),
            "hash_algo": facts.hash_algo, "flags": flags}


def _pixel_columns(reading: Reading) -> dict[str, Any]:
    """Transparency share and native size (collector.checks.pixel_facts)."""
    return reading.facts.pixel.columns()


def _colour_columns(reading: Reading) -> dict[str, Any]:
    """Colour and tone facts (collector.checks.colour_facts); none when colours = 0."""
    colour = reading.facts.colour
    return colour.columns() if colour is not None else {}


def _window_columns(reading: Reading) -> dict[str, Any]:
    """The crop windows' hashes (collector.checks.phash.window_hashes; none for a blank
    picture, whose layout is still recorded so that it is not due again)."""
    windows = reading.facts.window_hashes
    return {"window_hashes": pack_windows(windows) if windows else None,
            "window_algo": WINDOW_ALGO}


def _write_file_columns(ledger: Ledger, sha256: str, values: dict[str, Any]) -> None:
    ledger.update_file(sha256, values)


@dataclass(frozen=True)
class Measurement:
    """One measured fact: which files need it, how it is computed and written.

    ``due(ledger, after_rowid, last_rowid, settings)``: the sha256 of the files in that rowid
    range whose fact is missing or stale (a query of collector.storage.upkeep_queries);
    ``compute(reading)``: the new values; ``write(ledger, sha256, values)``: store them (the
    files row by default; a fact with a table of its own writes there). ``bookkeeping``:
    values that say how a fact was made, not what it is (not counted as a change).
    ``wanted(settings)``: False when the recipe turns the fact off (it is then skipped)."""

    name: str
    due: Callable[[Ledger, int, int, Settings], set[str]]
    compute: Callable[[Reading], dict[str, Any]]
    write: Callable[[Ledger, str, dict[str, Any]], None] = _write_file_columns
    bookkeeping: tuple[str, ...] = ()
    wanted: Callable[[Settings], bool] = lambda settings: True


MEASUREMENTS: tuple[Measurement, ...] = (
    Measurement("perceptual hashes",
                lambda led, a, b, s: uq.hashes_due(led, a, b, HASH_ALGO), _hash_columns,
                bookkeeping=("hash_algo",)),
    Measurement("transparency and native size",
                lambda led, a, b, s: uq.pixel_facts_due(led, a, b), _pixel_columns),
    Measurement("colour and tone facts",
                lambda led, a, b, s: uq.colour_facts_due(led, a, b, COLOUR_ALGO),
                _colour_columns, bookkeeping=("colour_algo",),
                wanted=lambda settings: settings.colours > 0),
    Measurement("crop window hashes",
                lambda led, a, b, s: uq.windows_due(led, a, b, WINDOW_ALGO), _window_columns,
                bookkeeping=("window_algo",)),
)
HASHES = MEASUREMENTS[0].name


@dataclass
class FactCount:
    """Per measurement: files due, files measured, files whose values changed."""

    due: int = 0
    measured: int = 0
    changed: int = 0


@dataclass(frozen=True)
class NearCheck:
    """A near-duplicate verdict judged on an old hash, and the distance between the two
    files' current hashes (None: a file was not kept, or is not measured yet)."""

    item_id: int
    original_id: int | None
    distance: int | None


@dataclass
class MovedHash:
    """A file whose pHash moved by more than near_distance bits, and the near-duplicate
    verdicts it took part in (judged on the old hash; filled in after the walk)."""

    sha256: str
    distance: int
    item_id: int | None
    title: str | None
    path: str  # in the store
    verdicts: tuple[uq.NearVerdict, ...] = ()
    near: tuple[NearCheck, ...] = ()


@dataclass(frozen=True)
class Problem:
    """A stored file that could not be measured: ``missing`` or ``unreadable``, and why."""

    sha256: str
    kind: str
    detail: str


@dataclass
class RemeasureResult:
    """What a remeasure did (or, with ``dry_run``, would do)."""

    dry_run: bool
    everything: bool
    files: int  # files rows in the ledger
    looked: int = 0  # files rows walked by this run
    due: int = 0  # files with at least one fact due
    measured: int = 0  # files measured (at least one fact)
    removed: int = 0  # withdrawn files whose bytes were deleted: skipped
    counts: dict[str, FactCount] = field(default_factory=dict)
    skipped: list[str] = field(default_factory=list)  # measurements the recipe turns off
    moved: list[MovedHash] = field(default_factory=list)
    problems: list[Problem] = field(default_factory=list)
    near_distance: int = 0
    resumed_after: int = 0  # --all: the rowid an interrupted run had reached
    outcome: str = "finished"  # or "interrupted"
    rules: set_aside.RulesReport | None = None  # the pixel rules applied after measuring


Progress = Callable[[RemeasureResult], None]


def remeasure(collection: Collection, *, everything: bool = False, dry_run: bool = False,
              progress: Progress | None = None,
              measurements: tuple[Measurement, ...] = MEASUREMENTS,
              batch: int = BATCH) -> RemeasureResult:
    """Measure again the stored files whose facts are missing or stale (every stored file
    with ``everything``), under the gather lock; ``dry_run`` only counts what is due.
    Ctrl-C ends it with outcome "interrupted" (what was committed stays; run again)."""
    recipe = collection.recipe(check_source_kinds=False)
    settings = Settings.from_recipe(recipe)
    active = tuple(m for m in measurements if m.wanted(settings))
    with collection.gather_lock("remeasure"), collection.ledger() as ledger:
        result = RemeasureResult(dry_run, everything, queries.files_mark(ledger).rows,
                                 counts={m.name: FactCount() for m in active},
                                 skipped=[m.name for m in measurements if m not in active],
                                 near_distance=settings.near_distance)
        if everything:
            result.resumed_after = int(ledger.fact(ALL_DONE_UPTO) or 0)
        walk = _Walk(collection, ledger, settings, active, result)
        try:
            walk.run(result.resumed_after, batch, progress)
            if everything and not dry_run:
                ledger.set_fact(ALL_DONE_UPTO, "")
            if not dry_run:  # the new facts judged as apply-rules judges them
                result.rules = set_aside.judge_again(ledger, recipe)
        except KeyboardInterrupt:
            result.outcome = "interrupted"
        for moved in result.moved:  # every batch is written: partners have current hashes
            moved.near = tuple(_near_check(ledger, v) for v in moved.verdicts)
        if not dry_run and (result.measured or result.problems or _moves(result)):
            ledger.add_note("remeasured", note_text(result))
        if walk.rewrote_hashes:  # the first trace need not wait for the rebuild
            hashindex.HashFile.open(ledger, collection.hash_index_path)
    return result


class _Walk:
    """One pass over the files table, a batch of rows at a time."""

    def __init__(self, collection: Collection, ledger: Ledger, settings: Settings,
                 active: tuple[Measurement, ...], result: RemeasureResult) -> None:
        self.collection, self.ledger, self.settings = collection, ledger, settings
        self.active, self.result = active, result
        self.rewrote_hashes = False

    def run(self, after: int, batch: int, progress: Progress | None) -> None:
        """Walk the files rows after rowid ``after`` to the end."""
        result = self.result
        while page := uq.files_page(self.ledger, after, batch):
            last = page[-1].rowid
            due = self._due(after, last)
            result.looked += len(page)
            result.removed += sum(slot.removed for slot in page)
            for m in self.active:
                result.counts[m.name].due += len(due[m.name])
            files_due = set().union(*due.values())
            result.due += len(files_due)
            if result.dry_run:  # nothing is read, but a file missing from the store is named
                for slot in page:
                    if slot.sha256 in files_due:
                        self._stored_path(slot.sha256)
            else:
                self._measure(page, due, last)
            after = last
            if progress is not None:
                progress(result)

    def _due(self, after: int, last: int) -> dict[str, set[str]]:
        """Per measurement, the files of the rowid range it must measure."""
        if self.result.everything:
            every = uq.kept_files_between(self.ledger, after, last)
            return {m.name: every for m in self.active}
        return {m.name: m.due(self.ledger, after, last, self.settings) for m in self.active}

    def _measure(self, page: list[uq.FileSlot], due: dict[str, set[str]], last: int) -> None:
        """Measure the due files of one page, then write the batch in one transaction; the
        result counts the batch only once it is committed (Ctrl-C before: nothing of it)."""
        batch = _Batch()
        for slot in page:
            wanted = [m for m in self.active if slot.sha256 in due[m.name]]
            reading = self._reading(slot.sha256) if wanted else None
            if reading is None:
                continue
            try:
                values = [(m, m.compute(reading)) for m in wanted]
            except (ImageRejected, OSError) as exc:
                self.result.problems.append(Problem(slot.sha256, "unreadable", _why(exc)))
                continue
            batch.add(reading, values, self._moved(reading, values))
        with self.ledger.transaction():
            for m, sha, new in batch.writes:
                if new:
                    m.write(self.ledger, sha, new)
            if batch.rewrote_hashes:
                hashindex.note_hashes_rewritten(self.ledger)
            if self.result.everything:
                self.ledger.set_fact(ALL_DONE_UPTO, str(last))
        batch.count_into(self.result)
        self.rewrote_hashes = self.rewrote_hashes or batch.rewrote_hashes

    def _reading(self, sha256: str) -> Reading | None:
        """The stored file and its row, or None when it is not in the store or cannot be
        reached (recorded as a problem)."""
        path = self._stored_path(sha256)
        if path is None:
            return None
        return Reading(sha256, path, self.ledger.file(sha256) or {}, self.settings)

    def _stored_path(self, sha256: str) -> Path | None:
        """Where the store keeps a file, or None (recorded as a problem)."""
        try:
            path = self.collection.store.find(sha256)
        except (OSError, CollectorError) as exc:
            self.result.problems.append(Problem(sha256, "unreadable", str(exc)))
            return None
        if path is None:
            self.result.problems.append(Problem(
                sha256, "missing", "the store holds no file with these bytes"))
        return path

    def _moved(self, reading: Reading,
               values: list[tuple[Measurement, dict[str, Any]]]) -> MovedHash | None:
        """The file, if its pHash moved by more than near_distance bits."""
        distances = [d for _, new in values if (d := _hash_moved(reading.row, new)) is not None]
        if not distances or distances[0] <= self.settings.near_distance:
            return None
        first = queries.items_of_file(self.ledger, reading.sha256, limit=1)
        return MovedHash(reading.sha256, distances[0], first[0]["id"] if first else None,
                         first[0]["title"] if first else None, str(reading.path),
                         tuple(uq.near_verdicts_about(self.ledger, reading.sha256)))


@dataclass
class _Batch:
    """What one batch measured, counted into the result once it is committed."""

    writes: list[tuple[Measurement, str, dict[str, Any]]] = field(default_factory=list)
    counts: dict[str, FactCount] = field(default_factory=dict)
    measured: int = 0
    moved: list[MovedHash] = field(default_factory=list)
    rewrote_hashes: bool = False

    def add(self, reading: Reading, values: list[tuple[Measurement, dict[str, Any]]],
            moved: MovedHash | None) -> None:
        """One file's new values."""
        self.measured += 1
        for m, new in values:
            count = self.counts.setdefault(m.name, FactCount())
            count.measured += 1
            if _changed(reading.row, new, m.bookkeeping):
                count.changed += 1
                self.rewrote_hashes = self.rewrote_hashes or _hash_rewritten(reading.row, new)
            self.writes.append((m, reading.sha256, new))
        if moved is not None:
            self.moved.append(moved)

    def count_into(self, result: RemeasureResult) -> None:
        """Add this (committed) batch to the result."""
        result.measured += self.measured
        result.moved += self.moved
        for name, count in self.counts.items():
            result.counts[name].measured += count.measured
            result.counts[name].changed += count.changed


def _changed(row: dict[str, Any], new: dict[str, Any], bookkeeping: tuple[str, ...]) -> bool:
    """Whether a measured value differs from the row's (a value the row lacks differs)."""
    return any(row.get(key) != value for key, value in new.items() if key not in bookkeeping)


def _near_check(ledger: Ledger, verdict: uq.NearVerdict) -> NearCheck:
    """How far apart the current hashes of a near duplicate and its original are (the
    closer of direct and mirror-image, as ingest compares them)."""
    rows = [ledger.file(sha) if sha else None
            for sha in (verdict.sha256, verdict.original_sha256)]
    copy, original = rows
    distance = None
    if copy and original and all(r.get("hash_algo") == HASH_ALGO and r.get("phash") is not None
                                 for r in rows if r):
        distance = min(hamming(copy["phash"], original["phash"]),
                       hamming(copy["phash_mirror"] or 0, original["phash"]))
    return NearCheck(verdict.item_id, verdict.original_id, distance)


def _hash_rewritten(row: dict[str, Any], new: dict[str, Any]) -> bool:
    """Whether new values change the pHash pair or the window hashes the hash file was
    built from."""
    if "window_hashes" in new:
        return row.get("window_hashes") != new["window_hashes"]
    return "phash" in new and (row.get("phash"), row.get("phash_mirror")) != (
        new["phash"], new.get("phash_mirror"))


def _hash_moved(row: dict[str, Any], new: dict[str, Any]) -> int | None:
    """Bits between the row's pHash and the new one (None: not a hash, or none before)."""
    if "phash" not in new or row.get("phash") is None:
        return None
    return hamming(int(row["phash"]), int(new["phash"]))


def _why(exc: BaseException) -> str:
    """What kept a stored file from being measured, in words."""
    if isinstance(exc, ImageRejected):
        return f"{exc.reason}: {exc.detail}"
    if isinstance(exc, OSError):
        return exc.strerror or str(exc)
    return str(exc)


def note_text(result: RemeasureResult) -> str:
    """The one line the ledger's notes keep about a remeasure (kind ``remeasured``)."""
    facts = "; ".join(f"{name}: {count.changed:,} changed"
                      for name, count in result.counts.items())
    parts = [f"{result.measured:,} of {result.files:,} stored files measured again offline "
             f"({facts})"]
    if result.moved:
        parts.append(f"{len(result.moved):,} perceptual hashes moved by more than "
                     f"near_distance = {result.near_distance} bits")
    if result.problems:
        parts.append(f"{len(result.problems):,} files could not be measured")
    if _moves(result):
        parts.append(f"pixel rules applied again: {_moves(result)}")
    if result.outcome != "finished":
        parts.append(result.outcome)
    return "; ".join(parts)


def report_lines(result: RemeasureResult) -> list[str]:
    """What a remeasure did (or would do), as the command prints it."""
    verb = "would measure" if result.dry_run else "measured"
    scope = "every stored file (--all)" if result.everything else "files with stale facts"
    lines = [f"Looked at {result.looked:,} of {result.files:,} files ({scope}); "
             f"{verb} {result.due if result.dry_run else result.measured:,}."]
    if result.resumed_after:
        lines.append(f"Resumed an interrupted --all run after files row {result.resumed_after}.")
    for name, count in result.counts.items():
        done = "" if result.dry_run else f", {count.measured:,} measured, {count.changed:,} changed"
        lines.append(f"  {name}: {count.due:,} due{done}")
    lines += [f"  {name}: not measured ([images] dominant_colours = 0)"
              for name in result.skipped]
    if result.removed:
        lines.append(f"{result.removed:,} withdrawn files whose bytes were deleted: skipped.")
    lines += _moved_lines(result)
    for problem in result.problems:
        lines.append(f"{problem.kind}: {problem.sha256[:16]}: {problem.detail}")
    if result.problems:
        lines.append(f"{len(result.problems):,} stored files could not be measured (their "
                     "facts are unchanged; run again once they are back).")
    lines += _rules_lines(result)
    if result.outcome == "interrupted":
        lines.append("Interrupted: the facts measured so far are kept; run the same command "
                     "again to finish (and to apply the pixel rules to the new facts).")
    return lines


def _moves(result: RemeasureResult) -> str:
    """The pixel rules' moves in a few words, or "" when nothing moved."""
    rules = result.rules
    if rules is None or not rules.moves:
        return ""
    return (f"{rules.count('set aside')} set aside, {rules.count('brought back')} brought "
            f"back, {rules.count('reason changed')} with a new reason")


def _rules_lines(result: RemeasureResult) -> list[str]:
    """The recipe's pixel rules applied to the new facts, as apply-rules reports them."""
    if result.dry_run:
        return ["Then the recipe's pixel rules would be applied again to every stored file, "
                "as apply-rules does ('collector apply-rules --dry-run' shows what the facts "
                "as they are now would move)."]
    if result.rules is None:
        return []
    if not result.rules.rules and not result.rules.moves:
        return ["The recipe has no pixel rules: no file was set aside or brought back."]
    return ["Pixel rules applied again to the facts, as apply-rules does:",
            *(f"  {line}" for line in set_aside.report_lines(result.rules))]


def _moved_lines(result: RemeasureResult) -> list[str]:
    """The files whose hash moved beyond near_distance, with what to do about them."""
    if not result.moved:
        return []
    lines = [f"{len(result.moved):,} files' perceptual hashes moved by more than "
             f"near_distance = {result.near_distance} bits. Near-duplicate verdicts made with "
             "the old hash were NOT changed; each is shown with how far apart the two files' "
             "hashes are now (see README, 'Measuring stored files again'):"]
    for moved in result.moved:
        title = f' "{moved.title}"' if moved.title else ""
        item = f"item #{moved.item_id}" if moved.item_id is not None else "no item"
        none = "" if moved.near else ", no near-duplicate verdicts"
        lines.append(f"  {moved.path} ({item}{title}): moved {moved.distance} bits{none}")
        lines += [f"    {_check_words(check, result.near_distance)}" for check in moved.near]
    return lines


def _check_words(check: NearCheck, near_distance: int) -> str:
    """One near-duplicate verdict and what the current hashes say about it."""
    judged = f"item #{check.item_id} was judged a near duplicate of item #{check.original_id}"
    if check.distance is None:
        return f"{judged}: not compared now (a file was not kept or is not measured yet)"
    if check.distance <= near_distance:
        return f"{judged}: {check.distance} bits apart now, still within near_distance"
    return (f"{judged}: {check.distance} bits apart now, beyond near_distance: probably not "
            "a copy")
