"""Reads of the ledger for the datasheet and the release: facts about items, files, requests,
hosts, runs and reservations, and the stream of release rows.

The datasheet's half of :mod:`collector.storage.queries` (split off to keep each module small;
``tests/test_sql_home.py`` lists both as homes of SQL). Functions take a ``Ledger`` and return
typed results; every statement runs through the ledger's read helpers, which translate
``sqlite3.Error`` in one place; large results are streamed (:func:`release_rows`).
"""

from __future__ import annotations

import functools
import json
from collections.abc import Iterator
from typing import Any, NamedTuple, TypedDict

from collector.errors import CollectorError
from collector.safe_text import NOT_UNICODE
from collector.storage.ledger import Ledger
from collector.storage.queries import _STATES_IN, LOCAL_HOST, _licence_key, _statement_column
from collector.urls import host_key

# --- the datasheet ----------------------------------------------------------------------------
_ACCEPTED_FROM = (
    "FROM files f JOIN items i ON i.id = f.first_item_id AND i.file_sha256 = f.sha256 "
    "JOIN sources s ON s.id = i.source_id "
    f"WHERE i.state IN ({_STATES_IN})"
)
# A file a withdrawal (not undone) names, by itself or by an item that brought it.
_NOT_WITHDRAWN = (
    " AND NOT EXISTS (SELECT 1 FROM withdrawals w WHERE w.undone_at IS NULL AND "
    "(w.sha256 = f.sha256 OR w.item_id IN (SELECT x.id FROM items x "
    "WHERE x.file_sha256 = f.sha256)))")


def _accepted_from(ledger: Ledger) -> str:
    """The accepted files the datasheet counts: withdrawn ones and those a pixel rule set
    aside are left out of every number (a ledger from before withdrawals or the set-aside
    column has none). The release's own rows (``release_rows``) keep them, so the release
    can count what it left out."""
    return (_ACCEPTED_FROM + (_NOT_WITHDRAWN if ledger.has_table("withdrawals") else "")
            + (" AND f.set_aside IS NULL" if "set_aside" in ledger.columns("files") else ""))


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
    return int(ledger.scalar(f"SELECT count(*) {_accepted_from(ledger)} AND {where}") or 0)


def _median(ledger: Ledger, column: str) -> float | None:
    """The median (mean of the two middle values for an even count), computed in SQL."""
    n = ledger.scalar(f"SELECT count({column}) {_accepted_from(ledger)}")
    if not n:
        return None
    value = ledger.scalar(f"SELECT avg(v) FROM (SELECT {column} AS v {_accepted_from(ledger)} "
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
        lo, hi = ledger.rows(f"SELECT min(f.{dim}), max(f.{dim}) {_accepted_from(ledger)}")[0]
        return {"min": lo, "median": _median(ledger, f"f.{dim}"), "max": hi}

    def by(column: str) -> dict[str, int]:
        return _pairs(ledger, f"SELECT {column}, count(*) {_accepted_from(ledger)} "
                              "GROUP BY 1 ORDER BY 2 DESC, 1")

    return {
        "files": ledger.scalar(f"SELECT count(*) {_accepted_from(ledger)}") or 0,
        "bytes": ledger.scalar(
            f"SELECT coalesce(sum(f.size), 0) {_accepted_from(ledger)}") or 0,
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
    flagged_from = _accepted_from(ledger).replace(
        "FROM files f", "FROM files f, json_each(f.flags) j", 1)
    return _pairs(ledger, "SELECT CASE WHEN instr(j.value, ':') > 0 THEN "
                          "substr(j.value, 1, instr(j.value, ':') - 1) ELSE j.value END, "
                          f"count(*) {flagged_from} GROUP BY 1 ORDER BY 2 DESC, 1")


def flagged_facts(ledger: Ledger, personal: tuple[str, ...], conflict: str) -> FlaggedFacts:
    """Accepted files with any of the ``personal`` flags, and with the ``conflict`` flag."""
    marks = ", ".join("?" for _ in personal)
    return {
        "personal": int(ledger.scalar(
            f"SELECT count(*) {_accepted_from(ledger)} "
            "AND EXISTS (SELECT 1 FROM json_each(f.flags) "
            f"WHERE value IN ({marks}))", personal) or 0),
        "conflict": int(ledger.scalar(
            f"SELECT count(*) {_accepted_from(ledger)} "
            "AND EXISTS (SELECT 1 FROM json_each(f.flags) "
            "WHERE value = ?)", (conflict,)) or 0),
    }


class NotUnicodeFacts(TypedDict):
    """Items whose listing held text that is not valid Unicode (lone surrogates, replaced by
    U+FFFD where candidates enter; the item's metadata names the fields under
    ``invalid_unicode``): how many items, how many accepted files such an item brought, and
    the items per field, most first."""

    items: int
    accepted: int
    fields: dict[str, int]


# An item's metadata when it may name such fields (a cheap text test first); metadata that is
# not JSON (a ledger edited by hand) counts as naming none instead of stopping the datasheet.
_NAMING = (f"CASE WHEN instr(i.metadata, '\"{NOT_UNICODE}\"') AND json_valid(i.metadata) "
           "THEN i.metadata END")
_NAMED_PATH = f"'$.\"{NOT_UNICODE}\"'"


def not_unicode_facts(ledger: Ledger) -> NotUnicodeFacts:
    """Items (all recorded) whose metadata names fields that held text that is not valid
    Unicode, the accepted files among them, and the items per field."""
    named = f"json_type({_NAMING}, {_NAMED_PATH}) = 'array'"
    return {
        "items": int(ledger.scalar(f"SELECT count(*) FROM items i WHERE {named}") or 0),
        "accepted": _count(ledger, named),
        "fields": _pairs(ledger, f"SELECT j.value, count(DISTINCT i.id) FROM items i, "
                                 f"json_each({_NAMING}, {_NAMED_PATH}) j "
                                 f"WHERE j.type = 'text' AND {named} "
                                 "GROUP BY 1 ORDER BY 2 DESC, 1"),
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
        f"SELECT (f.width / ?) * ?, (f.height / ?) * ?, count(*) {_accepted_from(ledger)} "
        "AND f.width IS NOT NULL AND f.height IS NOT NULL GROUP BY 1, 2 ORDER BY 1, 2",
        (step, step, step, step))]


def stored_per(ledger: Ledger, width: int) -> dict[str, int]:
    """Accepted files per time slot of storing (timestamps cut to ``width`` characters)."""
    return _pairs(ledger, "SELECT substr(f.stored_at, 1, ?), count(*) "
                          f"{_accepted_from(ledger)} "
                          "AND f.stored_at IS NOT NULL GROUP BY 1 ORDER BY 1", (width,))


def requests_per_host(ledger: Ledger, width: int) -> dict[str, dict[str, int]]:
    """Requests per host and time slot (timestamps cut to ``width`` characters). A URL
    refused before a host was read from it (``fetches.host`` empty) sent no request to any
    host and is left out."""
    out: dict[str, dict[str, int]] = {}
    for host, slot, n in ledger.rows(
            "SELECT host, substr(started_at, 1, ?), count(*) FROM fetches "
            "WHERE started_at IS NOT NULL AND host IS NOT NULL GROUP BY 1, 2 ORDER BY 1, 2",
            (width,)):
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
    lo, hi = ledger.rows(f"SELECT min(i.date), max(i.date) {_accepted_from(ledger)} AND "
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
