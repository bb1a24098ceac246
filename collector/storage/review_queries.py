"""Reads of the ledger for the review sheet (``collector review``): every stored file with the
item that first brought it, and the near-duplicate links between items.

A home of read SQL beside :mod:`collector.storage.queries` (``tests/test_sql_home.py`` lists
it). Every statement runs through the ledger's read helpers, which translate ``sqlite3.Error``
in one place; the files are streamed. A ledger opened read-only before a migration lacks some
columns (colour facts, set-aside, withdrawals): they read as NULL ("not measured", "not set
aside", "not withdrawn") instead of failing.
"""

from __future__ import annotations

from collections.abc import Iterator
from typing import NamedTuple

from collector.storage.ledger import Ledger
from collector.storage.queries import _licence_key


class ReviewFile(NamedTuple):
    """One stored file as the review sheet shows it (item fields from its first item)."""

    sha256: str
    ext: str
    width: int | None
    height: int | None
    orientation: int | None
    colours: str | None  # JSON text as stored (NULL: not measured)
    set_aside: str | None
    set_aside_detail: str | None
    withdrawn: bool  # bytes removed, or named by a withdrawal not undone
    item_id: int | None  # NULL: registered by rebuild-ledger, no item yet
    source: str | None
    title: str | None
    creator: str | None
    licence: str | None
    state: str | None


class NearLink(NamedTuple):
    """A near-duplicate item, the item it was found similar to, and their files."""

    item_id: int
    original_id: int
    sha256: str | None
    original_sha256: str | None


def _column(ledger: Ledger, table: str, prefix: str, name: str) -> str:
    """``prefix.name``, or NULL where the ledger is older than the column."""
    names = {r[0] for r in ledger.rows(f"SELECT name FROM pragma_table_info('{table}')")}
    return f"{prefix}{name}" if name in names else "NULL"


def _withdrawn(ledger: Ledger) -> str:
    """SQL (0/1) for a file whose bytes were removed or that a withdrawal not undone names,
    by itself or by an item that brought it."""
    removed = _column(ledger, "files", "f.", "removed_at")
    gone = f"({removed} IS NOT NULL)"
    if not ledger.has_table("withdrawals"):
        return gone
    return (f"({gone} OR EXISTS (SELECT 1 FROM withdrawals w WHERE w.undone_at IS NULL AND "
            "(w.sha256 = f.sha256 OR w.item_id IN (SELECT x.id FROM items x "
            "WHERE x.file_sha256 = f.sha256))))")


def review_files(ledger: Ledger) -> Iterator[ReviewFile]:
    """Every row of ``files`` with its first item and source, by source name then item."""
    col = {name: _column(ledger, "files", "f.", name)
           for name in ("colours", "set_aside", "set_aside_detail")}
    for row in ledger.stream(
            "SELECT f.sha256, f.ext, f.width, f.height, f.orientation, "
            f"{col['colours']}, {col['set_aside']}, {col['set_aside_detail']}, "
            f"{_withdrawn(ledger)}, i.id, s.name, i.title, i.creator, "
            f"CASE WHEN i.id IS NULL THEN NULL ELSE {_licence_key(ledger, 'i.')} END, i.state "
            "FROM files f LEFT JOIN items i ON i.id = f.first_item_id "
            "LEFT JOIN sources s ON s.id = i.source_id "
            "ORDER BY s.name IS NULL, s.name, i.id, f.sha256"):
        values = list(row)
        values[8] = bool(values[8])
        yield ReviewFile(*values)


def near_links(ledger: Ledger) -> list[NearLink]:
    """Every item found similar to an earlier one (state ``near_duplicate``), with the item
    it points at (``duplicate_of``) and both files, by original then item."""
    return [NearLink(*r) for r in ledger.rows(
        "SELECT i.id, i.duplicate_of, i.file_sha256, o.file_sha256 FROM items i "
        "JOIN items o ON o.id = i.duplicate_of WHERE i.state = 'near_duplicate' "
        "ORDER BY i.duplicate_of, i.id")]
