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

import functools
import json
from collections.abc import Iterator
from dataclasses import dataclass
from typing import Any, NamedTuple, TypedDict

from collector.errors import CollectorError
from collector.storage.ledger import Ledger
from collector.urls import host_key

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


def stored_phashes(ledger: Ledger) -> list[tuple[str, int]]:
    """(sha256, signed pHash) of every file with a pHash, in rowid order."""
    return [(r[0], int(r[1])) for r in ledger.rows(
        "SELECT sha256, phash FROM files WHERE phash IS NOT NULL ORDER BY rowid")]


def files_mark(ledger: Ledger) -> FilesMark:
    """The files table's mark (count, max rowid, sha256 at that rowid)."""
    rows = int(ledger.scalar("SELECT count(*) FROM files") or 0)
    max_rowid = int(ledger.scalar("SELECT max(rowid) FROM files") or 0)
    return FilesMark(rows, max_rowid, sha256_at_rowid(ledger, max_rowid))


def sha256_at_rowid(ledger: Ledger, rowid: int) -> str | None:
    """The sha256 of the files row with this rowid, or None."""
    return ledger.scalar("SELECT sha256 FROM files WHERE rowid = ?", (rowid,))


def files_after(ledger: Ledger, rowid: int) -> list[tuple[Any, ...]]:
    """(rowid, sha256, pHash or None) of every files row after ``rowid``, in order; plain
    tuples, since a dict per row made a 1M-row rebuild take about 5 s."""
    return ledger.rows("SELECT rowid, sha256, phash FROM files WHERE rowid > ? "
                       "ORDER BY rowid", (rowid,))


# --- the datasheet ----------------------------------------------------------------------------
_ACCEPTED_FROM = (
    "FROM files f JOIN items i ON i.id = f.first_item_id AND i.file_sha256 = f.sha256 "
    "JOIN sources s ON s.id = i.source_id "
    f"WHERE i.state IN ({_STATES_IN})"
)


def _host_of(url: str | None) -> str:
    """The host key of a URL, for grouping by host in SQL. A host depends only on the scheme
    and the authority, so host_key runs once per distinct ``scheme://authority`` (cached):
    the datasheet calls this for every accepted file."""
    if not url:
        return LOCAL_HOST
    scheme, sep, rest = url.partition("://")
    if not sep:
        return _host_of_origin(url)
    authority = rest.split("/", 1)[0].split("?", 1)[0].split("#", 1)[0]
    return _host_of_origin(f"{scheme}://{authority}/")


@functools.lru_cache(maxsize=4096)
def _host_of_origin(origin: str) -> str:
    try:
        return host_key(origin)
    except CollectorError:
        return "?"


def _pairs(ledger: Ledger, sql: str, params: tuple[Any, ...] = ()) -> dict[str, int]:
    return {str(k): int(v) for k, v in ledger.rows(sql, params)}


def _count(ledger: Ledger, where: str) -> int:
    """Accepted files that also match ``where`` (an SQL condition)."""
    return int(ledger.scalar(f"SELECT count(*) {_ACCEPTED_FROM} AND {where}") or 0)


def _median(ledger: Ledger, column: str) -> float | None:
    """The median (mean of the two middle values for an even count), computed in SQL."""
    n = ledger.scalar(f"SELECT count({column}) {_ACCEPTED_FROM}")
    if not n:
        return None
    value = ledger.scalar(f"SELECT avg(v) FROM (SELECT {column} AS v {_ACCEPTED_FROM} "
                          f"AND {column} IS NOT NULL ORDER BY v LIMIT ? OFFSET ?)",
                          (2 - n % 2, (n - 1) // 2))
    return float(value)


class ItemFacts(TypedDict):
    """Items by state and by state/reason."""

    total: int
    by_state: dict[str, int]
    by_reason: dict[str, int]


class Span(TypedDict):
    """Smallest, median and largest of a dimension of the accepted files."""

    min: int | None
    median: float | None
    max: int | None


class AcceptedFacts(TypedDict):
    """The accepted files (stored and near duplicates kept): sizes, kinds, origins."""

    files: int
    bytes: int
    formats: dict[str, int]
    modes: dict[str, int]
    by_licence: dict[str, int]
    by_source: dict[str, int]
    by_host: dict[str, int]
    stored: int
    near_kept: int
    crops: int
    width: Span
    height: Span


class MissingFacts(TypedDict):
    """Accepted files without a title, creator, licence, page URL or date."""

    no_title: int
    no_creator: int
    no_licence: int
    no_page_url: int
    no_date: int


class FlaggedFacts(TypedDict):
    """Accepted files carrying a personal-data flag or the licence-conflict flag."""

    personal: int
    conflict: int


class Timeframe(TypedDict):
    """First and last moment of gathering."""

    start: str | None
    end: str | None


class RequestFacts(TypedDict):
    """Every request the collection made and how hosts answered."""

    total: int
    attempts: int
    status_429: int
    status_503: int
    errors: int
    robots_disallowed: int
    bytes: int
    by_purpose: dict[str, int]


class HostFacts(TypedDict):
    """One host: its robots.txt, the budget in force, and how it answered."""

    host: str
    robots_url: str | None
    robots_status: int | None
    robots_fetched_at: str | None
    effective_budget: dict[str, Any]  # {} when none was recorded or it is not JSON
    requests: int
    status_429: int
    status_503: int
    robots_disallowed: int


class SourceCounts(NamedTuple):
    """One source: its kind, its items and its accepted files."""

    name: str
    kind: str
    items: int
    accepted: int


class RunFacts(TypedDict):
    """How many runs, when, with which tool versions and recipes, and how they ended."""

    count: int
    first_started: str | None
    last_ended: str | None
    tool_versions: list[str]
    recipes: int
    outcomes: dict[str, int]


class ReleaseRow(NamedTuple):
    """One accepted file with its item and source, as the release files need it."""

    sha256: str
    ext: str
    mime: str | None
    format: str | None
    width: int | None
    height: int | None
    size: int | None
    flags: str | None  # JSON text as stored
    stored_at: str | None
    source: str
    source_key: str
    page_url: str | None
    image_url: str | None
    title: str | None
    creator: str | None
    licence_raw: str | None
    spdx_id: str | None
    licence_url: str | None
    fetched_at: str | None  # the newest 2xx image request
    rights_statement: str | None = None  # RightsStatements.org id when no SPDX licence
    state: str = "stored"  # what a partial release selects on (collector.exports.release)
    date: str | None = None
    metadata: str | None = None  # JSON text as stored
    parent_sha256: str | None = None


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


def item_facts(ledger: Ledger) -> ItemFacts:
    """Items by state (most first) and by state/reason."""
    return {
        "total": ledger.scalar("SELECT count(*) FROM items") or 0,
        "by_state": _pairs(ledger, "SELECT state, count(*) FROM items GROUP BY state "
                                   "ORDER BY count(*) DESC, state"),
        "by_reason": _pairs(ledger, "SELECT state || '/' || reason, count(*) FROM items "
                                    "WHERE reason IS NOT NULL GROUP BY state, reason "
                                    "ORDER BY state, reason"),
    }


def accepted_facts(ledger: Ledger) -> AcceptedFacts:
    """Counts over the accepted files; hosts are named as ``host_key`` names them."""
    ledger.sql_function("host_of", _host_of)

    def span(dim: str) -> Span:
        lo, hi = ledger.rows(f"SELECT min(f.{dim}), max(f.{dim}) {_ACCEPTED_FROM}")[0]
        return {"min": lo, "median": _median(ledger, f"f.{dim}"), "max": hi}

    def by(column: str) -> dict[str, int]:
        return _pairs(ledger, f"SELECT {column}, count(*) {_ACCEPTED_FROM} "
                              "GROUP BY 1 ORDER BY 2 DESC, 1")

    return {
        "files": ledger.scalar(f"SELECT count(*) {_ACCEPTED_FROM}") or 0,
        "bytes": ledger.scalar(f"SELECT coalesce(sum(f.size), 0) {_ACCEPTED_FROM}") or 0,
        "formats": by("f.format"), "modes": by("f.mode"),
        "by_licence": by(_licence_key(ledger)), "by_source": by("s.name"),
        "by_host": by("host_of(i.image_url)"),
        "stored": _count(ledger, "i.state = 'stored'"),
        "near_kept": _count(ledger, "i.state = 'near_duplicate'"),
        "crops": _count(ledger, "i.parent_sha256 IS NOT NULL"),
        "width": span("width"), "height": span("height"),
    }


def missing_facts(ledger: Ledger) -> MissingFacts:
    """Accepted files with an empty title, creator, licence, page URL or date."""
    return {
        "no_title": _count(ledger, "coalesce(trim(i.title), '') = ''"),
        "no_creator": _count(ledger, "coalesce(trim(i.creator), '') = ''"),
        "no_licence": _count(ledger, "i.spdx_id IS NULL"),
        "no_page_url": _count(ledger, "coalesce(i.page_url, '') = ''"),
        "no_date": _count(ledger, "coalesce(i.date, '') = ''"),
    }


def flag_counts(ledger: Ledger) -> dict[str, int]:
    """Accepted files per flag name (the part before a ':'), most first."""
    flagged_from = _ACCEPTED_FROM.replace("FROM files f", "FROM files f, json_each(f.flags) j",
                                          1)
    return _pairs(ledger, "SELECT CASE WHEN instr(j.value, ':') > 0 THEN "
                          "substr(j.value, 1, instr(j.value, ':') - 1) ELSE j.value END, "
                          f"count(*) {flagged_from} GROUP BY 1 ORDER BY 2 DESC, 1")


def flagged_facts(ledger: Ledger, personal: tuple[str, ...], conflict: str) -> FlaggedFacts:
    """Accepted files with any of the ``personal`` flags, and with the ``conflict`` flag."""
    marks = ", ".join("?" for _ in personal)
    return {
        "personal": int(ledger.scalar(
            f"SELECT count(*) {_ACCEPTED_FROM} AND EXISTS (SELECT 1 FROM json_each(f.flags) "
            f"WHERE value IN ({marks}))", personal) or 0),
        "conflict": int(ledger.scalar(
            f"SELECT count(*) {_ACCEPTED_FROM} AND EXISTS (SELECT 1 FROM json_each(f.flags) "
            "WHERE value = ?)", (conflict,)) or 0),
    }


def near_dropped(ledger: Ledger) -> int:
    """Near duplicates whose file was not kept."""
    return int(ledger.scalar("SELECT count(*) FROM items WHERE state = 'near_duplicate' "
                             "AND file_sha256 IS NULL") or 0)


def timeframe(ledger: Ledger) -> Timeframe:
    """First and last moment of gathering: request starts and file-store times."""
    start, end = ledger.rows(
        "SELECT min(t), max(t) FROM (SELECT started_at AS t FROM fetches "
        "WHERE started_at IS NOT NULL UNION ALL SELECT stored_at FROM files "
        "WHERE stored_at IS NOT NULL)")[0]
    return {"start": start, "end": end}


def request_facts(ledger: Ledger) -> RequestFacts:
    """Requests, attempts, 429/503 answers, errors, robots refusals, bytes, purposes."""
    def n(where: str) -> int:
        return int(ledger.scalar(f"SELECT count(*) FROM fetches {where}") or 0)

    return {
        "total": n("WHERE status IS NOT NULL"), "attempts": n(""),
        "status_429": n("WHERE status = 429"), "status_503": n("WHERE status = 503"),
        "errors": n("WHERE error IS NOT NULL"),
        "robots_disallowed": n("WHERE robots_verdict = 'disallowed'"),
        "bytes": ledger.scalar("SELECT coalesce(sum(bytes), 0) FROM fetches") or 0,
        "by_purpose": _pairs(ledger, "SELECT coalesce(purpose, '?'), count(*) FROM fetches "
                                     "GROUP BY 1 ORDER BY 2 DESC, 1"),
    }


def _json_object(text: str | None) -> dict[str, Any]:
    try:
        value: Any = json.loads(text) if text else {}
    except ValueError:
        return {}
    return value  # as stored: the ledger writes a JSON object here


def host_facts(ledger: Ledger) -> list[HostFacts]:
    """Every host row with its request counts, by host name."""
    def per_host(where: str) -> str:
        return f"(SELECT count(*) FROM fetches x WHERE x.host = h.host AND {where})"

    refused = per_host("x.robots_verdict = 'disallowed'")

    return [{"host": r[0], "robots_url": r[1], "robots_status": r[2],
             "robots_fetched_at": r[3], "effective_budget": _json_object(r[4]),
             "requests": r[5],
             "status_429": r[6], "status_503": r[7], "robots_disallowed": r[8]}
            for r in ledger.rows(
                "SELECT h.host, h.robots_url, h.robots_status, h.robots_fetched_at, "
                f"h.effective_budget, {per_host('x.status IS NOT NULL')}, "
                f"{per_host('x.status = 429')}, {per_host('x.status = 503')}, "
                f"{refused} FROM hosts h ORDER BY h.host")]


def resolution_cells(ledger: Ledger, step: int) -> list[list[int]]:
    """Accepted files counted on a grid of ``step`` x ``step`` pixel cells: [w, h, n]."""
    return [[w, h, n] for w, h, n in ledger.rows(
        f"SELECT (f.width / ?) * ?, (f.height / ?) * ?, count(*) {_ACCEPTED_FROM} "
        "AND f.width IS NOT NULL AND f.height IS NOT NULL GROUP BY 1, 2 ORDER BY 1, 2",
        (step, step, step, step))]


def stored_per(ledger: Ledger, width: int) -> dict[str, int]:
    """Accepted files per time slot of storing (timestamps cut to ``width`` characters)."""
    return _pairs(ledger, f"SELECT substr(f.stored_at, 1, ?), count(*) {_ACCEPTED_FROM} "
                          "AND f.stored_at IS NOT NULL GROUP BY 1 ORDER BY 1", (width,))


def requests_per_host(ledger: Ledger, width: int) -> dict[str, dict[str, int]]:
    """Requests per host and time slot (timestamps cut to ``width`` characters)."""
    out: dict[str, dict[str, int]] = {}
    for host, slot, n in ledger.rows(
            "SELECT coalesce(host, '?'), substr(started_at, 1, ?), count(*) FROM fetches "
            "WHERE started_at IS NOT NULL GROUP BY 1, 2 ORDER BY 1, 2", (width,)):
        out.setdefault(str(host), {})[str(slot)] = int(n)
    return out


def host_sources(ledger: Ledger) -> dict[str, list[str]]:
    """The sources whose items were requested from each host (by host, names sorted)."""
    out: dict[str, list[str]] = {}
    for host, name in ledger.rows(
            "SELECT DISTINCT x.host, s.name FROM fetches x JOIN items i ON i.id = x.item_id "
            "JOIN sources s ON s.id = i.source_id WHERE x.host IS NOT NULL ORDER BY 1, 2"):
        out.setdefault(str(host), []).append(str(name))
    return out


def picture_dates(ledger: Ledger) -> tuple[str | None, str | None]:
    """Earliest and latest declared date of the accepted files that start with a year
    (ISO 8601 strings sort as dates)."""
    lo, hi = ledger.rows(f"SELECT min(i.date), max(i.date) {_ACCEPTED_FROM} AND "
                         "i.date GLOB '[0-9][0-9][0-9][0-9]*'")[0]
    return lo, hi


def source_counts(ledger: Ledger) -> list[SourceCounts]:
    """Every source by name, with its items and its accepted files."""
    return [SourceCounts(name, kind, n_items or 0, n_acc or 0)
            for name, kind, n_items, n_acc in ledger.rows(
                "SELECT s.name, s.kind, (SELECT count(*) FROM items i "
                "WHERE i.source_id = s.id), (SELECT count(*) FROM items i JOIN files f "
                "ON f.first_item_id = i.id AND f.sha256 = i.file_sha256 "
                f"WHERE i.source_id = s.id AND i.state IN ({_STATES_IN})) "
                "FROM sources s ORDER BY s.name")]


def run_facts(ledger: Ledger) -> RunFacts:
    """Runs: count, first start, last end, tool versions, distinct recipes, outcomes."""
    count, first, last = ledger.rows(
        "SELECT count(*), min(started_at), max(coalesce(ended_at, started_at)) "
        "FROM runs")[0]
    return {
        "count": count or 0, "first_started": first, "last_ended": last,
        "tool_versions": [r[0] for r in ledger.rows(
            "SELECT DISTINCT tool_version FROM runs WHERE tool_version IS NOT NULL ORDER BY 1")],
        "recipes": ledger.scalar("SELECT count(DISTINCT recipe_sha256) FROM runs") or 0,
        "outcomes": _pairs(ledger, "SELECT outcome, count(*) FROM runs GROUP BY outcome "
                                   "ORDER BY 2 DESC, 1"),
    }


def note_counts(ledger: Ledger) -> dict[str, int]:
    """Source notes per kind, most first."""
    return _pairs(ledger, "SELECT kind, count(*) FROM notes GROUP BY kind ORDER BY 2 DESC")


def release_rows(ledger: Ledger) -> Iterator[ReleaseRow]:
    """Stream every accepted file with its item and source, by sha256."""
    for row in ledger.stream(
            "SELECT f.sha256, f.ext, f.mime, f.format, f.width, f.height, f.size, f.flags, "
            "f.stored_at, s.name, i.source_key, i.page_url, i.image_url, i.title, i.creator, "
            "i.licence_raw, i.spdx_id, i.licence_url, "
            "(SELECT max(x.started_at) FROM fetches x WHERE x.item_id = i.id AND "
            " x.purpose = 'image' AND x.status BETWEEN 200 AND 299), "
            f"{_statement_column(ledger, 'i.')}, "
            "i.state, i.date, i.metadata, i.parent_sha256 "
            f"{_ACCEPTED_FROM} ORDER BY f.sha256"):
        yield ReleaseRow(*row)


class ReservationFacts(NamedTuple):
    """Reservation signals (place, name, meaning, items, items it excluded), items excluded
    (state, reason, n), permissions used (source, reference), tdmrep.json outcomes (hosts)."""

    signals: tuple[tuple[str, str, str, int, int], ...]
    excluded: tuple[tuple[str, str, int], ...]
    permissions: tuple[tuple[str, str], ...]
    files: tuple[tuple[str, int], ...]


def reservation_facts(ledger: Ledger, reasons: tuple[str, ...]) -> ReservationFacts:
    """What collector.run.reservations recorded; empty for a ledger without its tables."""
    if not ledger.scalar("SELECT count(*) FROM sqlite_master WHERE name = "
                         "'reservation_signals'"):
        return ReservationFacts((), (), (), ())
    marks = ", ".join("?" for _ in reasons)
    return ReservationFacts(
        tuple(ledger.rows("SELECT place, name, meaning, count(DISTINCT item_id), count("
                          "DISTINCT CASE WHEN decision LIKE 'item %' THEN item_id END) FROM "
                          "reservation_signals GROUP BY 1, 2, 3 ORDER BY 4 DESC, 1, 2, 3")),
        tuple(ledger.rows(f"SELECT state, reason, count(*) FROM items WHERE reason IN "
                          f"({marks}) GROUP BY 1, 2 ORDER BY 3 DESC, 2", reasons)),
        tuple(ledger.rows("SELECT DISTINCT s.name, substr(r.decision, 28) FROM "
                          "reservation_signals r JOIN sources s ON s.id = r.source_id WHERE "
                          "r.decision LIKE 'gathered under permission: %' ORDER BY 1")),
        tuple(ledger.rows("SELECT tdmrep_state, count(*) FROM hosts WHERE tdmrep_state IS NOT "
                          "NULL GROUP BY 1 ORDER BY 1")))
