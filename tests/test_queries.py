"""The ledger's read queries (collector.storage.queries) and its one sqlite error translation.

Every public function of the queries module, and every Ledger method this redesign added,
is run once on a healthy ledger and once on a ledger whose connection fails underneath: the
failure must come out as the project's LedgerError, never as a bare sqlite3.Error. The
function list is read from the module, so a new query that skips the translation fails here.
Common practice, no source.
"""

from __future__ import annotations

import inspect
import sqlite3
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import Any

import pytest

from collector.errors import LedgerError, LedgerUnusable
from collector.storage import datasheet_queries, diversity_queries, queries
from collector.storage.ledger import Ledger

# A sample value for every parameter name a query takes (besides the ledger).
SAMPLE_ARGS: dict[str, Any] = {
    "sha256": "ab" * 32, "item_id": 1, "rowid": 1, "step": 8, "width": 10,
    "personal": ("gps", "camera_serial"), "conflict": "licence_conflict", "limit": 1,
    "reasons": ("tdmrep_reserved", "noai_directive"), "url": "http://127.0.0.9/info.json",
    # the diversity panel's bins (collector.exports.diversity)
    "grey_chroma": 6.0, "lightness_edges": (50,), "chroma_edges": (6, 30),
    "pixel_edges": (0.1, 1), "aspect_edges": (1,), "max_colour_files": 10,
    "hash_algo": "dct-phash-64/draft-v2", "window_algo": "dct-phash-64/windows-80-4x4-v1",
    "colour_algo": "lab-kmeans-64px/v2",
    # what the run asks (collector.run.ingest and scheduling)
    "image_url": "http://127.0.0.59/a.png", "other_than": 2, "source_id": 1, "run_id": 1,
    "config_sha256": "cd" * 32,
}

# The read modules: status/trace/hash index, the datasheet and release, its diversity panel.
QUERY_MODULES = {module.__name__.rsplit(".", 1)[1]: module
                 for module in (queries, datasheet_queries, diversity_queries)}
PUBLIC_QUERIES = sorted(
    f"{short}.{name}" for short, module in QUERY_MODULES.items()
    for name, fn in inspect.getmembers(module, inspect.isfunction)
    if fn.__module__ == module.__name__ and not name.startswith("_"))

# The Ledger methods of this redesign that run SQL for other modules.
LEDGER_CALLS: dict[str, Callable[[Ledger], Any]] = {
    "rows": lambda ledger: ledger.rows("SELECT count(*) FROM items"),
    "stream": lambda ledger: ledger.stream("SELECT id FROM items"),
    "sql_function": lambda ledger: ledger.sql_function("twice", lambda v: 2 * v),
    "forget_missing_file": lambda ledger: ledger.forget_missing_file("ab" * 32),
    "drop_all_store_intents": lambda ledger: ledger.drop_all_store_intents(),
    "record_signal": lambda ledger: ledger.record_signal(
        place="XMP", url="file", name="plus:DataMining", value="x", meaning="unset",
        decision="no reservation"),
}


class BrokenConnection:
    """A connection whose every call fails the way a damaged or vanished file does."""

    def __enter__(self) -> BrokenConnection:
        return self

    def __exit__(self, *exc: object) -> None:
        return None

    def __getattr__(self, name: str) -> Any:
        if name == "close":
            return lambda: None

        def fail(*args: object, **kwargs: object) -> Any:
            raise sqlite3.OperationalError("disk I/O error")
        return fail


def call_query(name: str, ledger: Ledger) -> Any:
    """Call the query ``name`` with sample arguments; an iterator is read to its end."""
    short, _, function = name.partition(".")
    fn = getattr(QUERY_MODULES[short], function)
    params = list(inspect.signature(fn).parameters.values())[1:]
    missing = [p.name for p in params if p.name not in SAMPLE_ARGS
               and p.default is inspect.Parameter.empty]
    assert not missing, f"add sample values for {missing} to SAMPLE_ARGS"
    result = fn(ledger, **{p.name: SAMPLE_ARGS[p.name] for p in params
                           if p.name in SAMPLE_ARGS})
    return list(result) if isinstance(result, Iterator) else result


@pytest.fixture
def ledger(tmp_path: Path) -> Iterator[Ledger]:
    """A fresh ledger with one source, item and stored file."""
    with Ledger.create(tmp_path / "ledger.sqlite") as led:
        source = led.source_id("desk", "scans", {})
        item = led.add_item(source, "k1", {"image_url": "http://127.0.0.59/a.png"})
        led.add_file({"sha256": "ab" * 32, "size": 3, "ext": "png", "format": "PNG",
                      "width": 4, "height": 2, "phash": -5, "first_item_id": item})
        led.update_item(item, state="stored", file_sha256="ab" * 32)
        run = led.start_run("ef" * 32, {}, "test")
        led.set_listing_state(source, "next-token", SAMPLE_ARGS["config_sha256"], run)
        yield led


@pytest.fixture
def broken(ledger: Ledger) -> Iterator[Ledger]:
    """The same ledger with its connection failing underneath."""
    real = ledger._conn
    ledger._conn = BrokenConnection()  # type: ignore[assignment]
    yield ledger
    ledger._conn = real


def test_the_queries_module_has_public_queries() -> None:
    """The introspection finds the queries (status, trace, hash index and datasheet)."""
    assert {"queries.ledger_totals", "queries.items_of_file", "queries.files_mark",
            "datasheet_queries.release_rows", "datasheet_queries.accepted_facts"
            } <= set(PUBLIC_QUERIES)


@pytest.mark.parametrize("name", PUBLIC_QUERIES)
def test_every_query_runs_on_a_healthy_ledger(ledger: Ledger, name: str) -> None:
    """Each query runs with its sample arguments and returns a result."""
    assert call_query(name, ledger) is not None or name in {
        "queries.last_image_fetch", "queries.stored_jpeg_photo", "queries.kept_page"}


@pytest.mark.parametrize("name", PUBLIC_QUERIES)
def test_every_query_translates_sqlite_errors(broken: Ledger, name: str) -> None:
    """A sqlite3 failure under any query comes out as LedgerError naming the ledger."""
    with pytest.raises(LedgerError, match=r"ledger .*ledger\.sqlite.*disk I/O error") as caught:
        call_query(name, broken)
    assert isinstance(caught.value.__cause__, sqlite3.Error)


@pytest.mark.parametrize("name", sorted(LEDGER_CALLS))
def test_every_new_ledger_call_translates_sqlite_errors(broken: Ledger, name: str) -> None:
    """The reads and writes the ledger does for other modules translate errors the same way."""
    with pytest.raises(LedgerError, match="disk I/O error") as caught:
        result = LEDGER_CALLS[name](broken)
        if isinstance(result, Iterator):
            list(result)
    assert isinstance(caught.value.__cause__, sqlite3.Error)


def test_typed_results_carry_named_fields(ledger: Ledger) -> None:
    """Results are typed records: totals, marks and release rows have named fields."""
    totals = queries.ledger_totals(ledger)
    assert totals.files == 1 and totals.states[0].state == "stored"
    assert queries.files_mark(ledger) == queries.FilesMark(1, 1, "ab" * 32)
    (row,) = datasheet_queries.release_rows(ledger)
    assert (row.sha256, row.source, row.width, row.image_url) == (
        "ab" * 32, "desk", 4, "http://127.0.0.59/a.png")
    assert datasheet_queries.accepted_facts(ledger)["by_host"] == {"127.0.0.59:80": 1}


def test_stream_reads_in_batches(ledger: Ledger) -> None:
    """A streamed query yields every row, batch after batch, before the last is read."""
    for n in range(2, 8):
        ledger.add_item(1, f"k{n}", {})
    rows = ledger.stream("SELECT id FROM items ORDER BY id", batch=3)
    assert next(rows) == (1,)
    assert [r[0] for r in rows] == list(range(2, 8))


def test_forget_missing_file_resets_its_items(ledger: Ledger) -> None:
    """A file gone from the store: its item is pending again and its files row is removed."""
    with ledger.transaction():
        assert ledger.forget_missing_file("ab" * 32) == 1
    assert ledger.file("ab" * 32) is None
    item = ledger.item(1)
    assert item is not None
    assert (item["state"], item["file_sha256"], item["reason"]) == ("pending", None, None)


def test_copy_file_refuses_a_file_that_is_not_sqlite(tmp_path: Path) -> None:
    """Copying noise as a ledger is LedgerUnusable, and no sqlite3 error escapes."""
    noise = tmp_path / "noise.sqlite"
    noise.write_bytes(b"not a database" * 500)
    with pytest.raises(LedgerUnusable, match="cannot be read") as caught:
        Ledger.copy_file(noise, tmp_path / "copy.sqlite")
    assert isinstance(caught.value.__cause__, sqlite3.DatabaseError)
