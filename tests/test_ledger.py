"""The SQLite ledger: schema, migrations, WAL, JSON columns."""

from __future__ import annotations

import sqlite3
import threading
from pathlib import Path

import pytest

from collector.errors import LedgerError
from collector.storage.ledger import SCHEMA_VERSION, Ledger

TABLES = {"schema_version", "runs", "sources", "items", "fetches", "files", "hosts", "notes"}


def test_create_makes_every_table_in_wal_mode(tmp_path: Path) -> None:
    """A new ledger has the documented tables, the current schema version and WAL on."""
    with Ledger.create(tmp_path / "l.sqlite") as ledger:
        assert set(ledger.db.table_names()) >= TABLES
        assert ledger.schema_version() == SCHEMA_VERSION
        assert ledger.scalar("PRAGMA journal_mode") == "wal"


def test_lookup_indexes_exist(tmp_path: Path) -> None:
    """Items are indexed by image URL, state and sha256 for later lookups."""
    with Ledger.create(tmp_path / "l.sqlite") as ledger:
        indexed = {tuple(i.columns) for i in ledger.db["items"].indexes}
        assert {("image_url",), ("state",), ("file_sha256",), ("source_id", "source_key")} \
            <= indexed


def test_a_hosts_last_contact_is_read_from_an_index(tmp_path: Path) -> None:
    """``last_contact`` (asked for every cluster task) is answered from the (host, ended_at)
    index, not by reading each fetch row of the host: SQLite's planner says it searches that
    index (sqlite.org "EXPLAIN QUERY PLAN": SEARCH ... USING COVERING INDEX), and the answer
    is the host's latest end, other hosts' later rows aside."""
    with Ledger.create(tmp_path / "l.sqlite") as ledger:
        for host, ended in (("a:80", "2026-01-02T00:00:00Z"), ("a:80", "2026-01-03T00:00:00Z"),
                            ("b:80", "2026-02-01T00:00:00Z"), ("a:80", None)):
            ledger.record_fetch(host=host, url=f"http://{host}/", purpose="image",
                                started_at="2026-01-01T00:00:00Z", ended_at=ended)
        assert ledger.last_contact("a:80") == "2026-01-03T00:00:00Z"
        plan = " ".join(str(row["detail"]) for row in ledger.query(
            "EXPLAIN QUERY PLAN SELECT max(ended_at) FROM fetches WHERE host = ?", ("a:80",)))
        assert "USING COVERING INDEX idx_fetches_host_ended_at" in plan, plan
        assert {tuple(i.columns) for i in ledger.db["fetches"].indexes} == {
            ("item_id",), ("host", "ended_at")}


def test_open_refuses_a_newer_schema(tmp_path: Path) -> None:
    """A ledger written by a newer collector is not silently downgraded."""
    path = tmp_path / "l.sqlite"
    Ledger.create(path).close()
    conn = sqlite3.connect(path)
    conn.execute("INSERT INTO schema_version VALUES (99, 'later')")
    conn.commit()
    conn.close()
    with pytest.raises(LedgerError, match="newer than this collector understands"):
        Ledger.open(path)


def test_open_of_a_missing_file_says_how_to_create_one(tmp_path: Path) -> None:
    """Opening a ledger that does not exist points at 'collector init'."""
    with pytest.raises(LedgerError, match="collector init"):
        Ledger.open(tmp_path / "nope.sqlite")


def test_open_of_a_non_sqlite_file_is_a_ledger_error(tmp_path: Path) -> None:
    """A corrupt ledger file gives a LedgerError, not a sqlite3 traceback."""
    path = tmp_path / "l.sqlite"
    path.write_bytes(b"this is not a database" * 100)
    with pytest.raises(LedgerError, match="cannot open the ledger"):
        Ledger.open(path)


def test_items_round_trip_json_metadata(tmp_path: Path) -> None:
    """Structured columns are stored as JSON and decoded on read."""
    with Ledger.create(tmp_path / "l.sqlite") as ledger:
        source = ledger.source_id("api", "json_api", {"url": "http://x"})
        assert ledger.source_id("api", "json_api", {"url": "http://y"}) == source
        item = ledger.add_item(source, "42", {"metadata": {"a": [1, 2]}, "crop_box": [1, 2, 3, 4]})
        row = ledger.item_by_key(source, "42")
        assert row["id"] == item and row["state"] == "pending"
        assert row["metadata"] == {"a": [1, 2]} and row["crop_box"] == [1, 2, 3, 4]
        ledger.update_item(item, state="stored", reason=None)
        assert ledger.item(item)["state"] == "stored"


def test_duplicate_source_key_is_refused(tmp_path: Path) -> None:
    """One source cannot list the same key twice (UNIQUE(source_id, source_key))."""
    with Ledger.create(tmp_path / "l.sqlite") as ledger:
        source = ledger.source_id("api", "json_api", {})
        ledger.add_item(source, "1", {})
        with pytest.raises(LedgerError, match="UNIQUE"):
            ledger.add_item(source, "1", {})


def test_concurrent_writes_from_threads_all_land(tmp_path: Path) -> None:
    """Writes from a worker pool are serialised; none is lost."""
    with Ledger.create(tmp_path / "l.sqlite") as ledger:
        def work(n: int) -> None:
            for i in range(50):
                ledger.record_fetch(url=f"http://h/{n}/{i}", host="h", status=200)
        threads = [threading.Thread(target=work, args=(n,)) for n in range(4)]
        for t in threads:
            t.start()
        for t in threads:
            t.join()
        assert ledger.scalar("SELECT count(*) FROM fetches") == 200


def test_reader_sees_committed_rows_while_writer_is_open(tmp_path: Path) -> None:
    """WAL lets a read-only reader (status, trace) read during a run."""
    path = tmp_path / "l.sqlite"
    with Ledger.create(path) as writer:
        writer.start_run("abc", {}, "0.1.0")
        with Ledger.open(path, readonly=True) as reader:
            assert reader.scalar("SELECT count(*) FROM runs") == 1


def test_first_writes_from_many_threads_do_not_lock_each_other(tmp_path: Path) -> None:
    """Threads writing hosts, fetches and items at once, on a fresh ledger whose column
    lists are not cached yet, never see "database table is locked"."""
    for attempt in range(30):
        with Ledger.create(tmp_path / f"l{attempt}.sqlite") as ledger:
            source = ledger.source_id("s", "json_api", {})
            errors: list[BaseException] = []
            start = threading.Barrier(6)

            def work(n: int, ledger: Ledger = ledger, source: int = source,
                     errors: list = errors, start: threading.Barrier = start) -> None:
                start.wait()
                try:
                    for i in range(5):
                        ledger.put_host(f"h{n}", robots_status=200, failures=i)
                        ledger.record_fetch(url=f"http://h{n}/{i}", host=f"h{n}", status=200)
                        ledger.add_item(source, f"{n}-{i}", {"image_url": f"http://h{n}/{i}"})
                except BaseException as exc:
                    errors.append(exc)

            threads = [threading.Thread(target=work, args=(n,)) for n in range(6)]
            for t in threads:
                t.start()
            for t in threads:
                t.join()
            assert errors == []
            assert ledger.scalar("SELECT count(*) FROM hosts") == 6
