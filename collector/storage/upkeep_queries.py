"""Reads of the ledger's upkeep records: withdrawals, recipe texts, re-check observations,
source notes and the change log.

The second home of read SQL beside :mod:`collector.storage.queries` (that module is at its
size limit; ``tests/test_sql_home.py`` lists both). Every statement runs through the ledger's
read helpers, which translate ``sqlite3.Error`` in one place. A ledger opened read-only before
its migration to the upkeep tables (schema 4) has none of them: every function here then
answers "nothing recorded" instead of failing.
"""

from __future__ import annotations

from typing import Any, NamedTuple

from collector.storage.ledger import Ledger


class Withdrawal(NamedTuple):
    """One withdrawal request as recorded (``undone_at`` set once it was undone)."""

    id: int
    item_id: int | None
    sha256: str | None
    target: str
    reason: str
    note: str | None
    asked_by: str | None
    asked_on: str | None
    recorded_at: str
    bytes_deleted: bool
    undone_at: str | None
    undone_by: str | None
    undo_note: str | None


_WITHDRAWAL_COLUMNS = ("id, item_id, sha256, target, reason, note, asked_by, asked_on, "
                       "recorded_at, bytes_deleted, undone_at, undone_by, undo_note")


def _withdrawal(row: tuple[Any, ...]) -> Withdrawal:
    values = list(row)
    values[9] = bool(values[9])
    return Withdrawal(*values)


def withdrawals(ledger: Ledger, *, active_only: bool = False) -> list[Withdrawal]:
    """Every withdrawal (or only those not undone), oldest first."""
    if not ledger.has_table("withdrawals"):
        return []
    where = " WHERE undone_at IS NULL" if active_only else ""
    return [_withdrawal(r) for r in ledger.rows(
        f"SELECT {_WITHDRAWAL_COLUMNS} FROM withdrawals{where} ORDER BY id")]


def withdrawal(ledger: Ledger, withdrawal_id: int) -> Withdrawal | None:
    """One withdrawal by its id, or None."""
    if not ledger.has_table("withdrawals"):
        return None
    rows = ledger.rows(f"SELECT {_WITHDRAWAL_COLUMNS} FROM withdrawals WHERE id = ?",
                       (withdrawal_id,))
    return _withdrawal(rows[0]) if rows else None


def active_withdrawal_of_file(ledger: Ledger, sha256: str) -> Withdrawal | None:
    """The newest withdrawal not undone that covers the file ``sha256``, or None."""
    if not ledger.has_table("withdrawals"):
        return None
    rows = ledger.rows(
        f"SELECT {_WITHDRAWAL_COLUMNS} FROM withdrawals WHERE undone_at IS NULL AND "
        "(sha256 = ? OR item_id IN (SELECT id FROM items WHERE file_sha256 = ?)) "
        "ORDER BY id DESC LIMIT 1", (sha256, sha256))
    return _withdrawal(rows[0]) if rows else None


def item_is_withdrawn(ledger: Ledger, item_id: int) -> bool:
    """Whether a withdrawal not undone names the item, or the file it brought."""
    if not ledger.has_table("withdrawals"):
        return False
    return bool(ledger.scalar(
        "SELECT count(*) FROM withdrawals w WHERE w.undone_at IS NULL AND (w.item_id = ? OR "
        "w.sha256 = (SELECT file_sha256 FROM items WHERE id = ?))", (item_id, item_id)))


def withdrawn_sha256s(ledger: Ledger) -> set[str]:
    """The sha256 of every file a withdrawal not undone covers (by file or by its item)."""
    if not ledger.has_table("withdrawals"):
        return set()
    rows = ledger.rows(
        "SELECT w.sha256 FROM withdrawals w WHERE w.undone_at IS NULL AND w.sha256 IS NOT NULL "
        "UNION SELECT i.file_sha256 FROM withdrawals w JOIN items i ON i.id = w.item_id "
        "WHERE w.undone_at IS NULL AND i.file_sha256 IS NOT NULL")
    return {r[0] for r in rows}


def removed_sha256s(ledger: Ledger) -> set[str]:
    """Files whose bytes were deleted from the store on purpose."""
    if "removed_at" not in ledger.columns("files"):
        return set()
    return {r[0] for r in ledger.rows("SELECT sha256 FROM files WHERE removed_at IS NOT NULL")}


# --- finding what a withdrawal names ----------------------------------------------------------
def files_with_prefix(ledger: Ledger, prefix: str, *, limit: int = 5) -> list[str]:
    """Stored files whose sha256 starts with ``prefix`` (lower-case hex), at most ``limit``."""
    return [r[0] for r in ledger.rows(
        "SELECT sha256 FROM files WHERE sha256 >= ? AND sha256 < ? ORDER BY sha256 LIMIT ?",
        (prefix, prefix + "g", limit))]


def item_ids_of_key(ledger: Ledger, source: str, key: str) -> list[int]:
    """The item a source listed under ``key`` (a list of zero or one id)."""
    return [r[0] for r in ledger.rows(
        "SELECT i.id FROM items i JOIN sources s ON s.id = i.source_id "
        "WHERE s.name = ? AND i.source_key = ?", (source, key))]


class ItemBrief(NamedTuple):
    """What a withdrawal shows of an item."""

    id: int
    source: str | None
    source_key: str
    state: str
    file_sha256: str | None
    title: str | None


def item_briefs(ledger: Ledger, *, item_id: int | None = None,
                sha256: str | None = None) -> list[ItemBrief]:
    """The item ``item_id``, or every item that brought the file ``sha256``."""
    where, arg = ("i.id = ?", item_id) if item_id is not None else ("i.file_sha256 = ?", sha256)
    return [ItemBrief(*r) for r in ledger.rows(
        "SELECT i.id, s.name, i.source_key, i.state, i.file_sha256, i.title FROM items i "
        f"LEFT JOIN sources s ON s.id = i.source_id WHERE {where} ORDER BY i.id", (arg,))]


# --- recipe history ---------------------------------------------------------------------------
class RunRecipe(NamedTuple):
    """A run and the recipe it used (``text`` None when it was not kept: before schema 4)."""

    run_id: int
    started_at: str
    recipe_sha256: str | None
    text: str | None


def run_recipes(ledger: Ledger) -> list[RunRecipe]:
    """Every run with its recipe's sha256 and text, oldest first."""
    if not ledger.has_table("recipes"):
        return [RunRecipe(r[0], r[1], r[2], None) for r in ledger.rows(
            "SELECT id, started_at, recipe_sha256 FROM runs ORDER BY id")]
    return [RunRecipe(*r) for r in ledger.rows(
        "SELECT r.id, r.started_at, r.recipe_sha256, t.text FROM runs r "
        "LEFT JOIN recipes t ON t.sha256 = r.recipe_sha256 ORDER BY r.id")]


# --- source notes -----------------------------------------------------------------------------
class NoteRow(NamedTuple):
    """One source note as listed on screen."""

    id: int
    created_at: str | None
    run_id: int | None
    source: str | None
    kind: str
    url: str | None
    message: str


def notes(ledger: Ledger, *, kinds: tuple[str, ...] = (), sources: tuple[str, ...] = (),
          limit: int | None = None) -> list[NoteRow]:
    """The ledger's source notes, oldest first, optionally only some kinds or sources."""
    where: list[str] = ["1 = 1"]
    args: list[Any] = []
    if kinds:
        where.append(f"n.kind IN ({', '.join('?' for _ in kinds)})")
        args += list(kinds)
    if sources:
        where.append(f"s.name IN ({', '.join('?' for _ in sources)})")
        args += list(sources)
    tail = " LIMIT ?" if limit is not None else ""
    if limit is not None:
        args.append(limit)
    return [NoteRow(*r) for r in ledger.rows(
        "SELECT n.id, n.created_at, n.run_id, s.name, n.kind, n.url, n.message FROM notes n "
        "LEFT JOIN sources s ON s.id = n.source_id WHERE " + " AND ".join(where)
        + " ORDER BY n.id" + tail, tuple(args))]


def note_kinds_and_sources(ledger: Ledger) -> tuple[list[str], list[str]]:
    """The note kinds and source names present (to name them when a filter matches none)."""
    kinds = [r[0] for r in ledger.rows("SELECT DISTINCT kind FROM notes ORDER BY 1")]
    names = [r[0] for r in ledger.rows("SELECT name FROM sources ORDER BY 1")]
    return kinds, names


# --- re-checks --------------------------------------------------------------------------------
class RecheckTarget(NamedTuple):
    """A kept item to look at again, with what its last successful image answer said."""

    item_id: int
    source: str
    source_key: str
    image_url: str | None
    spdx_id: str | None
    licence_raw: str | None
    file_sha256: str | None
    etag: str | None
    last_modified: str | None
    last_url: str | None  # where the last successful image answer came from (redacted)


def recheck_targets(ledger: Ledger, *, after_item: int = 0) -> list[RecheckTarget]:
    """Stored (and near-duplicate) items with an image URL, by id, after ``after_item``."""
    return [RecheckTarget(*r) for r in ledger.rows(
        "SELECT i.id, s.name, i.source_key, i.image_url, i.spdx_id, i.licence_raw, "
        "i.file_sha256, "
        "(SELECT x.etag FROM fetches x WHERE x.item_id = i.id AND x.purpose = 'image' AND "
        " x.status = 200 ORDER BY x.id DESC LIMIT 1), "
        "(SELECT x.last_modified FROM fetches x WHERE x.item_id = i.id AND x.purpose = 'image' "
        " AND x.status = 200 ORDER BY x.id DESC LIMIT 1), "
        "(SELECT x.url FROM fetches x WHERE x.item_id = i.id AND x.purpose = 'image' "
        " AND x.status IN (200, 304) ORDER BY x.id DESC LIMIT 1) "
        "FROM items i JOIN sources s ON s.id = i.source_id "
        "WHERE i.state IN ('stored', 'near_duplicate') AND i.image_url IS NOT NULL "
        "AND i.id > ? ORDER BY i.id", (after_item,))]


def observed_items(ledger: Ledger, run_id: int) -> set[int]:
    """Items a re-check run already observed (a resumed re-check skips them)."""
    if not ledger.has_table("observations"):
        return set()
    return {r[0] for r in ledger.rows("SELECT item_id FROM observations WHERE run_id = ?",
                                      (run_id,))}


def newest_versions(ledger: Ledger) -> dict[int, str]:
    """For each item a re-check found new bytes for, the sha256 of the newest version kept."""
    if not ledger.has_table("observations"):
        return {}
    return {r[0]: r[1] for r in ledger.rows(
        "SELECT item_id, new_sha256 FROM observations WHERE new_sha256 IS NOT NULL "
        "ORDER BY id")}


class Observation(NamedTuple):
    """One re-check finding for an item."""

    id: int
    run_id: int
    item_id: int
    observed_at: str
    finding: str
    status: int | None
    old_value: str | None
    new_value: str | None
    new_sha256: str | None
    detail: str | None


def observations(ledger: Ledger, *, run_id: int | None = None) -> list[Observation]:
    """Every re-check observation (or those of one run), oldest first."""
    if not ledger.has_table("observations"):
        return []
    where, args = ("WHERE run_id = ?", (run_id,)) if run_id is not None else ("", ())
    return [Observation(*r) for r in ledger.rows(
        "SELECT id, run_id, item_id, observed_at, finding, status, old_value, new_value, "
        f"new_sha256, detail FROM observations {where} ORDER BY id", args)]


def unfinished_rechecks(ledger: Ledger) -> list[int]:
    """The re-check runs since the last one that finished, oldest first: a new re-check
    resumes them (their observations count as done)."""
    recheck = "options LIKE '%\"recheck\": true%'"
    return [r[0] for r in ledger.rows(
        f"SELECT id FROM runs WHERE {recheck} AND outcome != 'finished' AND id > coalesce("
        f"(SELECT max(id) FROM runs WHERE {recheck} AND outcome = 'finished'), 0) "
        "ORDER BY id")]


# --- the change log ---------------------------------------------------------------------------
class RunEvent(NamedTuple):
    """A run as the change log shows it."""

    run_id: int
    started_at: str
    ended_at: str | None
    outcome: str | None
    recipe_sha256: str | None
    options: str | None
    stored: int


def run_events(ledger: Ledger) -> list[RunEvent]:
    """Every run with how many items it stored, oldest first."""
    return [RunEvent(*r) for r in ledger.rows(
        "SELECT r.id, r.started_at, r.ended_at, r.outcome, r.recipe_sha256, r.options, "
        "(SELECT count(*) FROM items i WHERE i.run_id = r.id AND i.state = 'stored') "
        "FROM runs r ORDER BY r.id")]


def ledger_state(ledger: Ledger) -> tuple[int | None, str | None]:
    """The newest run's id and its last recorded time: which ledger state a release shows."""
    rows = ledger.rows("SELECT id, coalesce(ended_at, started_at) FROM runs "
                       "ORDER BY id DESC LIMIT 1")
    return (rows[0][0], rows[0][1]) if rows else (None, None)



# --- remeasuring stored files (collector.run.remeasure) ---------------------------------------
class FileSlot(NamedTuple):
    """A files row as ``remeasure`` walks the table: its rowid, sha256 and whether its bytes
    were deleted on purpose (``removed_at``)."""

    rowid: int
    sha256: str
    removed: bool


def files_page(ledger: Ledger, after_rowid: int, limit: int) -> list[FileSlot]:
    """Up to ``limit`` files rows after ``after_rowid``, in rowid order."""
    return [FileSlot(int(r[0]), r[1], bool(r[2])) for r in ledger.rows(
        "SELECT rowid, sha256, removed_at IS NOT NULL FROM files WHERE rowid > ? "
        "ORDER BY rowid LIMIT ?", (after_rowid, limit))]


def _kept_between(ledger: Ledger, after_rowid: int, last_rowid: int, condition: str,
                  args: tuple[Any, ...] = ()) -> set[str]:
    """The sha256 of the files rows in (after_rowid, last_rowid] whose bytes are kept and
    that meet ``condition`` (SQL written in this module only)."""
    return {r[0] for r in ledger.rows(
        "SELECT sha256 FROM files WHERE rowid > ? AND rowid <= ? AND removed_at IS NULL "
        f"AND {condition}", (after_rowid, last_rowid, *args))}


def kept_files_between(ledger: Ledger, after_rowid: int, last_rowid: int) -> set[str]:
    """Every file in the rowid range whose bytes are kept (``remeasure --all``)."""
    return _kept_between(ledger, after_rowid, last_rowid, "1")


# When a kept file is due for each measurement: what remeasure measures again, and, all
# together, what collector status counts as "measured by an older collector"
# (queries.files_measured_before), written once so that the two agree.
HASHES_DUE = "hash_algo IS NOT ?"  # made by another pipeline than the current (or never)
PIXEL_FACTS_DUE = "transparent_share IS NULL"  # stored before schema 8
# none (schema 10), or made another way than the current (schema 14)
COLOUR_FACTS_DUE = "(greyscale IS NULL OR colour_algo IS NOT ?)"
WINDOWS_DUE = "window_algo IS NOT ?"  # another layout than the current (or never)


def hashes_due(ledger: Ledger, after_rowid: int, last_rowid: int,
               hash_algo: str) -> set[str]:
    """Files in the rowid range hashed by another pipeline than ``hash_algo`` (or never)."""
    return _kept_between(ledger, after_rowid, last_rowid, HASHES_DUE, (hash_algo,))


def pixel_facts_due(ledger: Ledger, after_rowid: int, last_rowid: int) -> set[str]:
    """Files in the rowid range stored before the transparency share and native size were
    measured (schema 8): ``transparent_share`` is NULL (every file stored since has one)."""
    return _kept_between(ledger, after_rowid, last_rowid, PIXEL_FACTS_DUE)


def colour_facts_due(ledger: Ledger, after_rowid: int, last_rowid: int,
                     colour_algo: str) -> set[str]:
    """Files in the rowid range without colour and tone facts (schema 10: ``greyscale`` is
    NULL) or with facts computed another way than ``colour_algo`` (schema 14)."""
    return _kept_between(ledger, after_rowid, last_rowid, COLOUR_FACTS_DUE, (colour_algo,))


def windows_due(ledger: Ledger, after_rowid: int, last_rowid: int,
                window_algo: str) -> set[str]:
    """Files in the rowid range whose crop window hashes were made another way or never
    (schema 12): ``window_algo`` is not ``window_algo``."""
    return _kept_between(ledger, after_rowid, last_rowid, WINDOWS_DUE, (window_algo,))


class NearVerdict(NamedTuple):
    """An item judged a near duplicate: its file (None when dropped) and the item and file it
    was judged a copy of."""

    item_id: int
    sha256: str | None
    original_id: int | None
    original_sha256: str | None


def near_verdicts_about(ledger: Ledger, sha256: str) -> list[NearVerdict]:
    """The items judged near duplicates where this file took part: the file's own items in
    state near_duplicate, and the near duplicates of an item that brought it."""
    return [NearVerdict(*r) for r in ledger.rows(
        "SELECT i.id, i.file_sha256, i.duplicate_of, o.file_sha256 FROM items i "
        "LEFT JOIN items o ON o.id = i.duplicate_of WHERE i.state = 'near_duplicate' AND "
        "(i.file_sha256 = ? OR i.duplicate_of IN (SELECT id FROM items WHERE file_sha256 = ?)) "
        "ORDER BY i.id", (sha256, sha256))]


# --- pixel rules: the set-aside state of files (schema 10) and its changes (rule_changes) ----
_FACT_COLUMNS = ("greyscale", "brightness", "contrast", "colourfulness", "sharpness",
                 "background_share", "colours")


class FileToJudge(NamedTuple):
    """One file with what the pixel rules read: its first item's source and key (None for a
    file no item explains yet), its colour and tone facts (a ``files`` row's columns, None
    when not measured) and its set-aside state now."""

    sha256: str
    source: str | None
    source_key: str | None
    facts: dict[str, Any]
    set_aside: str | None
    set_aside_detail: str | None


def files_to_judge(ledger: Ledger) -> list[FileToJudge]:
    """Every stored file, by sha256, with its facts and set-aside state (a ledger from before
    the facts were kept answers None for them)."""
    present = ledger.columns("files")
    facts = ", ".join(f"f.{c}" if c in present else "NULL" for c in _FACT_COLUMNS)
    aside = ", ".join(f"f.{c}" if c in present else "NULL"
                      for c in ("set_aside", "set_aside_detail"))
    return [FileToJudge(r[0], r[1], r[2], dict(zip(_FACT_COLUMNS, r[3:10], strict=True)),
                        r[10], r[11]) for r in ledger.rows(
        f"SELECT f.sha256, s.name, i.source_key, {facts}, {aside} FROM files f "
        "LEFT JOIN items i ON i.id = f.first_item_id LEFT JOIN sources s ON s.id = i.source_id "
        "ORDER BY f.sha256")]


def set_aside_sha256s(ledger: Ledger) -> set[str]:
    """The sha256 of every file a pixel rule sets aside (left out of releases)."""
    if "set_aside" not in ledger.columns("files"):
        return set()
    return {r[0] for r in ledger.rows("SELECT sha256 FROM files WHERE set_aside IS NOT NULL")}


class RuleChange(NamedTuple):
    """One change ``collector apply-rules`` made to a file's set-aside state."""

    id: int
    changed_at: str
    sha256: str
    rule_before: str | None
    rule_after: str | None
    detail: str | None
    recipe_sha256: str | None


def rule_changes(ledger: Ledger) -> list[RuleChange]:
    """Every change apply-rules recorded, oldest first (none before its table existed)."""
    if not ledger.has_table("rule_changes"):
        return []
    return [RuleChange(*r) for r in ledger.rows(
        "SELECT id, changed_at, sha256, rule_before, rule_after, detail, recipe_sha256 "
        "FROM rule_changes ORDER BY id")]
