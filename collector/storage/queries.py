"""Every read of the ledger that status, trace, the hash index and the datasheet make.

SQL text lives only here and in :mod:`collector.storage.ledger` (``tests/test_sql_home.py``
fails otherwise). Each function takes an open :class:`~collector.storage.ledger.Ledger` and
returns typed results (frozen dataclasses, NamedTuples, TypedDicts); every statement runs
through the ledger's read helpers (``query``, ``scalar``, ``rows``, ``stream``), which
translate ``sqlite3.Error`` into :class:`~collector.errors.LedgerError` in one place
(``tests/test_queries.py`` checks every public function here). Large results are streamed
(:func:`release_rows`) so memory stays flat for large collections.
"""

from __future__ import annotations

from collections.abc import Iterator
from dataclasses import dataclass
from typing import Any, NamedTuple

from collector.storage.ledger import Ledger
from collector.storage.upkeep_queries import (
    COLOUR_FACTS_DUE,
    HASHES_DUE,
    PIXEL_FACTS_DUE,
    WINDOWS_DUE,
)

ACCEPTED_STATES = ("stored", "near_duplicate")
LOCAL_HOST = "(local files)"
_STATES_IN = ", ".join(repr(s) for s in ACCEPTED_STATES)


# --- status and the end-of-run summary -------------------------------------------------------
class StateCount(NamedTuple):
    """Items in one state with one reason (None: no reason)."""

    state: str
    reason: str | None
    n: int


class HostTraffic(NamedTuple):
    """Requests sent to one host and how it answered (from the fetches table): ``errors``
    counts requests sent that failed; ``held_back`` the ones never sent (attempt 0: robots.txt,
    the address guard or a parked host refused them first)."""

    host: str | None
    requests: int
    too_many: int
    unavailable: int
    waited_s: float
    errors: int
    bytes: int
    held_back: int = 0


class FileOrigin(NamedTuple):
    """Stored files by where their first item got them: "downloaded", "local" (read from a
    folder), "crop" (cut from a stored scan) or "unknown" (recovered, no item yet)."""

    origin: str
    near_kept: bool  # the first item is a near duplicate kept (near_duplicates = "keep")
    files: int
    bytes: int


@dataclass(frozen=True)
class LedgerTotals:
    """The whole-ledger counts ``collector status`` prints."""

    states: tuple[StateCount, ...]
    files: int
    file_bytes: int
    requests: int
    fetched_bytes: int
    hosts: tuple[HostTraffic, ...]
    licences: tuple[tuple[str, int], ...]  # spdx (or 'unknown') of stored items, most first
    flag_lists: tuple[str, ...]  # the JSON flags column of every flagged file
    notes: tuple[tuple[str, int], ...]
    runs: int
    last_run: dict[str, Any] | None
    run_seconds: float
    last_run_seconds: float | None
    file_origins: tuple[FileOrigin, ...] = ()


def ledger_totals(ledger: Ledger) -> LedgerTotals:
    """Counts by state, files, bytes, traffic per host, licences, flags, notes and runs."""
    states = tuple(StateCount(r[0], r[1], int(r[2])) for r in ledger.rows(
        "SELECT state, reason, count(*) FROM items GROUP BY state, reason"))
    hosts = tuple(HostTraffic(r[0], r[1] or 0, r[2] or 0, r[3] or 0, float(r[4]), r[5] or 0,
                              r[6], r[7] or 0) for r in ledger.rows(
        "SELECT host, sum(sent), sum(status = 429), sum(status = 503), "
        "coalesce(sum(waited_s), 0), sum(sent AND error IS NOT NULL), coalesce(sum(bytes), 0), "
        "sum(NOT sent) FROM (SELECT *, coalesce(attempt, 1) != 0 AS sent FROM fetches) "
        "GROUP BY host ORDER BY host"))
    origins = tuple(FileOrigin(r[0], bool(r[1]), int(r[2]), int(r[3])) for r in ledger.rows(
        "SELECT CASE WHEN i.id IS NULL THEN 'unknown' WHEN i.parent_sha256 IS NOT NULL "
        "THEN 'crop' WHEN i.local_path IS NOT NULL THEN 'local' ELSE 'downloaded' END, "
        "coalesce(i.state = 'near_duplicate', 0), count(*), coalesce(sum(f.size), 0) "
        "FROM files f LEFT JOIN items i ON i.id = f.first_item_id GROUP BY 1, 2 ORDER BY 1, 2"))
    placeholders = ", ".join("?" for _ in ACCEPTED_STATES)
    licences = tuple((r[0], int(r[1])) for r in ledger.rows(
        f"SELECT {_licence_key(ledger, '')} AS spdx, count(*) AS n FROM items "
        f"WHERE state IN ({placeholders}) GROUP BY spdx ORDER BY n DESC", ACCEPTED_STATES))
    last = ledger.query("SELECT * FROM runs ORDER BY id DESC LIMIT 1")
    last_run = last[0] if last else None
    last_seconds = None
    if last_run:
        last_seconds = float(ledger.scalar(
            "SELECT (julianday(coalesce(ended_at, 'now')) - julianday(started_at)) * 86400.0 "
            "FROM runs WHERE id = ?", (last_run["id"],)) or 0.0)
    return LedgerTotals(
        states=states,
        files=ledger.scalar("SELECT count(*) FROM files") or 0,
        file_bytes=ledger.scalar("SELECT coalesce(sum(size), 0) FROM files") or 0,
        requests=ledger.scalar("SELECT count(*) FROM fetches WHERE coalesce(attempt, 1) != 0")
        or 0,
        fetched_bytes=ledger.scalar("SELECT coalesce(sum(bytes), 0) FROM fetches") or 0,
        hosts=hosts, licences=licences,
        flag_lists=tuple(r[0] for r in ledger.rows(
            "SELECT flags FROM files WHERE flags IS NOT NULL AND flags != '[]'")),
        notes=tuple((r[0], int(r[1])) for r in ledger.rows(
            "SELECT kind, count(*) FROM notes GROUP BY kind")),
        runs=ledger.scalar("SELECT count(*) FROM runs") or 0,
        last_run=last_run,
        # julianday() differences are in days; a run still going counts up to now.
        run_seconds=float(ledger.scalar(
            "SELECT coalesce(sum((julianday(coalesce(ended_at, 'now')) - julianday(started_at))"
            " * 86400.0), 0) FROM runs") or 0.0),
        last_run_seconds=last_seconds, file_origins=origins)


def set_aside_counts(ledger: Ledger) -> tuple[tuple[str, int], ...]:
    """Files set aside by a pixel rule, per rule, most first (none before schema 10)."""
    if "set_aside" not in ledger.columns("files"):
        return ()
    return tuple((r[0], int(r[1])) for r in ledger.rows(
        "SELECT set_aside, count(*) FROM files WHERE set_aside IS NOT NULL "
        "GROUP BY set_aside ORDER BY 2 DESC, 1"))


def files_measured_before(ledger: Ledger, hash_algo: str, window_algo: str,
                          colour_algo: str) -> int:
    """Stored files (bytes kept) whose perceptual hashes, transparency share, crop window
    hashes or colour and tone facts an older collector made another way or did not make (what
    ``collector remeasure`` brings up to date); in a ledger older than those columns, every
    stored file."""
    columns = ledger.columns("files")
    if not {"transparent_share", "window_algo", "removed_at", "greyscale",
            "colour_algo"} <= set(columns):
        return int(ledger.scalar("SELECT count(*) FROM files") or 0)
    due = " OR ".join((HASHES_DUE, PIXEL_FACTS_DUE, WINDOWS_DUE, COLOUR_FACTS_DUE))
    return int(ledger.scalar(f"SELECT count(*) FROM files WHERE removed_at IS NULL AND ({due})",
                             (hash_algo, window_algo, colour_algo)) or 0)


def pending_image_urls(ledger: Ledger) -> Iterator[str]:
    """The image URL of every item a next run would fetch (pending, failed, deferred)."""
    for row in ledger.stream("SELECT image_url FROM items WHERE state IN "
                             "('pending', 'failed', 'deferred') AND image_url IS NOT NULL"):
        yield row[0]


def listed_source_names(ledger: Ledger) -> set[str]:
    """The names of the sources that have listed at least one item."""
    return {r[0] for r in ledger.rows(
        "SELECT DISTINCT s.name FROM sources s JOIN items i ON i.source_id = s.id")}


def counts(ledger: Ledger) -> tuple[int, int]:
    """(files rows whose bytes belong in the store, items rows): how much the ledger knows
    (a file withdrawn with its bytes deleted on purpose is not expected in the store)."""
    kept = ("SELECT count(*) FROM files WHERE removed_at IS NULL"
            if "removed_at" in ledger.columns("files") else "SELECT count(*) FROM files")
    return (int(ledger.scalar(kept) or 0),
            int(ledger.scalar("SELECT count(*) FROM items") or 0))


def stored_jpeg_photo(ledger: Ledger) -> str | None:
    """The sha256 of the first stored JPEG of at least 256 px wide fetched from the web."""
    return ledger.scalar(
        "SELECT f.sha256 FROM files f JOIN items i ON i.id = f.first_item_id "
        "WHERE f.format = 'JPEG' AND i.state = 'stored' AND i.image_url IS NOT NULL "
        "AND f.width >= 256 ORDER BY i.id LIMIT 1")


def kept_page(ledger: Ledger, url: str) -> dict[str, Any] | None:
    """The page kept for re-use under ``url`` (fetched_at, status, content_type, body), or
    None (also for a ledger from before ``kept_pages``)."""
    if not ledger.has_table("kept_pages"):
        return None
    rows = ledger.query("SELECT fetched_at, status, content_type, body FROM kept_pages "
                        "WHERE url = ?", (url,))
    return rows[0] if rows else None


# --- trace ------------------------------------------------------------------------------------
def items_of_file(ledger: Ledger, sha256: str, *, limit: int | None = None
                  ) -> list[dict[str, Any]]:
    """The item rows (raw columns) that brought the file ``sha256``, oldest first."""
    sql = "SELECT * FROM items WHERE file_sha256 = ? ORDER BY id"
    if limit is not None:
        return ledger.query(sql + " LIMIT ?", (sha256, limit))
    return ledger.query(sql, (sha256,))


def source_names(ledger: Ledger) -> dict[int, tuple[str, str]]:
    """Every source id with its (name, kind)."""
    return {r[0]: (r[1], r[2]) for r in ledger.rows("SELECT id, name, kind FROM sources")}


class ImageFetch(NamedTuple):
    """The request that brought an item's image: what was asked, what robots.txt said."""

    url: str | None
    status: int | None
    fetched_at: str | None  # when the answer ended (or started, if it never ended)
    etag: str | None
    last_modified: str | None
    robots_verdict: str | None
    robots_rule: str | None
    run_id: int | None


def last_image_fetch(ledger: Ledger, item_id: int) -> ImageFetch | None:
    """The newest successful (200) image request of an item, or None."""
    rows = ledger.rows(
        "SELECT url, status, coalesce(nullif(ended_at, ''), started_at), etag, last_modified, "
        "robots_verdict, robots_rule, run_id FROM fetches WHERE item_id = ? "
        "AND purpose = 'image' AND status = 200 ORDER BY id DESC LIMIT 1", (item_id,))
    return ImageFetch(*rows[0]) if rows else None


# --- the near-duplicate hash index --------------------------------------------------------------
class FilesMark(NamedTuple):
    """Where the files table stands: row count, highest rowid and that row's sha256."""

    rows: int
    max_rowid: int
    last_sha: str | None


def stored_phashes(ledger: Ledger, window_algo: str = "") -> list[tuple[str, int, bytes | None]]:
    """(sha256, signed pHash, window hashes) of every file with a pHash, in rowid order; the
    window hashes only where they were made with ``window_algo`` (None otherwise)."""
    windows, params = _windows_column(ledger, window_algo)
    return [(r[0], int(r[1]), r[2]) for r in ledger.rows(
        f"SELECT sha256, phash, {windows} FROM files WHERE phash IS NOT NULL ORDER BY rowid",
        params)]


def _windows_column(ledger: Ledger, window_algo: str) -> tuple[str, tuple[str, ...]]:
    """The files' window hashes made with ``window_algo`` (NULL for others), or NULL in a
    ledger from before they were recorded (read-only commands do not migrate)."""
    names = {r[0] for r in ledger.rows("SELECT name FROM pragma_table_info('files')")}
    if "window_hashes" not in names or not window_algo:
        return "NULL", ()
    return "CASE WHEN window_algo = ? THEN window_hashes END", (window_algo,)


def files_mark(ledger: Ledger) -> FilesMark:
    """The files table's mark (count, max rowid, sha256 at that rowid)."""
    rows = int(ledger.scalar("SELECT count(*) FROM files") or 0)
    max_rowid = int(ledger.scalar("SELECT max(rowid) FROM files") or 0)
    return FilesMark(rows, max_rowid, sha256_at_rowid(ledger, max_rowid))


def sha256_at_rowid(ledger: Ledger, rowid: int) -> str | None:
    """The sha256 of the files row with this rowid, or None."""
    return ledger.scalar("SELECT sha256 FROM files WHERE rowid = ?", (rowid,))


def files_after(ledger: Ledger, rowid: int, window_algo: str = "") -> list[tuple[Any, ...]]:
    """(rowid, sha256, pHash or None, window hashes or None) of every files row after
    ``rowid``, in order (window hashes only where made with ``window_algo``); plain tuples,
    since a dict per row made a 1M-row rebuild take about 5 s."""
    windows, params = _windows_column(ledger, window_algo)
    return ledger.rows(f"SELECT rowid, sha256, phash, {windows} FROM files WHERE rowid > ? "
                       "ORDER BY rowid", (*params, rowid))


# --- how a licence is counted (status and the datasheet) -----------------------------------
def _statement_column(ledger: Ledger, prefix: str = "i.") -> str:
    """The items' rights_statement column, or NULL in a ledger older than schema 4 (read-only
    commands do not migrate)."""
    names = {r[0] for r in ledger.rows("SELECT name FROM pragma_table_info('items')")}
    return f"{prefix}rights_statement" if "rights_statement" in names else "NULL"


def _licence_key(ledger: Ledger, prefix: str = "i.") -> str:
    """SQL for how an item's licence is counted: its SPDX id, else ``rs:<id>`` of its
    RightsStatements.org statement, else 'unknown'."""
    return (f"coalesce({prefix}spdx_id, 'rs:' || {_statement_column(ledger, prefix)}, "
            "'unknown')")


# -- what the run asks (collector.run holds no SQL) ------------------------------------------
def stored_with_image_url(ledger: Ledger, image_url: str | None,
                          other_than: int) -> dict[str, Any] | None:
    """Another item whose file came from ``image_url`` and is kept (stored or near
    duplicate), as ``{"id", "file_sha256"}``, or None."""
    rows = ledger.query(
        "SELECT id, file_sha256 FROM items WHERE image_url = ? AND id != ? AND state IN "
        "('stored', 'near_duplicate') AND file_sha256 IS NOT NULL LIMIT 1",
        (image_url, other_than))
    return rows[0] if rows else None


def gone_runs(ledger: Ledger, item_id: int) -> int:
    """In how many runs the server answered 404 or 410 to the item's image request."""
    runs = ledger.scalar(
        "SELECT count(DISTINCT run_id) FROM fetches WHERE item_id = ? AND purpose = 'image' "
        "AND status IN (404, 410)", (item_id,))
    return int(runs or 0)


def listing_state(ledger: Ledger, source_id: int, config_sha256: str) -> str | None:
    """What the source's last complete listing remembered for the next run, or None (also
    when the source's table has changed since: a new set, prefix or URL lists everything
    again)."""
    return ledger.scalar("SELECT value FROM listing_states WHERE source_id = ? AND "
                         "config_sha256 = ?", (source_id, config_sha256))


def unsettled_items(ledger: Ledger, source_id: int, run_id: int) -> int:
    """How many items of the source this run left to try again (pending, failed, deferred):
    a listing that only reports changes would not list them again."""
    count = ledger.scalar(
        "SELECT count(*) FROM items WHERE source_id = ? AND run_id = ? AND state IN "
        "('pending', 'failed', 'deferred')", (source_id, run_id))
    return int(count or 0)
