"""The store never deletes what it cannot explain: a lost, zeroed, re-created or foreign ledger
stops every command (exit 2, nothing touched); recovery removes a stored file only when a
store intent names it; rebuild-ledger and restore-ledger bring the collection back; the ledger
is backed up after every run.

Collections are real folders gathered from the demo archive on loopback, with real SQLite
ledgers and real image files.
"""

from __future__ import annotations

import hashlib
import os
import shutil
import sqlite3
from pathlib import Path

import pytest
from support.collections import Gathered
from typer.testing import CliRunner

from collector.cli import app
from collector.demo_site import DemoServer
from collector.errors import CollectionError, LedgerUnusable
from collector.run.gather import gather
from collector.storage.collection import (
    ID_NAME,
    Collection,
    init_collection,
    open_collection,
    recover,
)
from collector.storage.ledger import SCHEMA_VERSION, Ledger
from collector.storage.ledger_repair import (
    BACKUP_DIR,
    KEEP_BACKUPS,
    backup_ledger,
    list_backups,
)

runner = CliRunner()




def store_snapshot(col: Collection) -> dict[str, str]:
    """Every stored file: sha256 in its name -> sha256 of its bytes (FIPS 180-4)."""
    return {sha: hashlib.sha256(path.read_bytes()).hexdigest()
            for sha, path in col.store.iter_stored()}


def provenance(col: Collection) -> list[tuple]:
    """Items with their source, state, licence and file, and each file's first item."""
    with col.ledger(readonly=True) as ledger:
        items = [tuple(r.values()) for r in ledger.query(
            "SELECT i.id, s.name, i.source_key, i.state, i.reason, i.spdx_id, i.licence_raw, "
            "i.image_url, i.file_sha256, i.duplicate_of FROM items i "
            "JOIN sources s ON s.id = i.source_id ORDER BY i.id")]
        files = [tuple(r.values()) for r in ledger.query(
            "SELECT sha256, first_item_id, flags FROM files ORDER BY sha256")]
    return items + files


@pytest.fixture
def demo_copy(demo_gathered: Gathered, tmp_path: Path) -> Collection:
    """A private copy of the whole demo archive gathered once into a collection (the
    session's ``demo_gathered``, conftest.py)."""
    assert demo_gathered.result.outcome == "finished"
    return demo_gathered.copy_to(tmp_path / "demo")


@pytest.fixture
def small(page_gathered: Gathered, fresh_demo_server: DemoServer, tmp_path: Path) -> Collection:
    """A small collection (10 items of one API page) gathered from the demo archive: a
    private copy of the session's ``page_gathered`` (conftest.py), the server reset."""
    assert page_gathered.result.outcome == "finished"
    col = page_gathered.copy_to(tmp_path / "small")
    with col.ledger(readonly=True) as ledger:
        assert ledger.store_intents() == set()  # every intent went with its files row
    return col


def every_command(col: Collection, traced: Path) -> list[list[str]]:
    """Each command that opens a collection folder, with the options that change its path."""
    root = str(col.root)
    return [
        ["init", root, "--existing-ok"], ["check", root], ["check", root, "--json"],
        ["gather", root, "--quiet"], ["gather", root, "--dry-run"], ["status", root],
        ["status", root, "--json"], ["trace", str(traced), "--in", root],
        ["trace", str(traced), "--in", root, "--csv"],
        ["datasheet", root, "--out", str(col.root.parent / "sheet")],
        ["demo", root, "--quiet"], ["demo", root, "--fresh", "--quiet"],
    ]


# --- the acceptance test -----------------------------------------------------------------------
def test_zeroed_ledger_stops_every_command_then_rebuild_and_restore_bring_it_back(
        demo_copy: Collection, demo_server: DemoServer, tmp_path: Path) -> None:
    """Zeroing the ledger of a gathered demo collection: every command exits 2 naming both
    ways out and no stored file changes; rebuild-ledger registers every stored file as
    recovered (trace: provenance unknown); restore-ledger gives back the full provenance."""
    col = demo_copy
    before_files = store_snapshot(col)
    before = provenance(col)
    assert len(before_files) > 50 and len(list_backups(col)) == 1
    traced = tmp_path / "traced.jpg"
    shutil.copy(next(p for _, p in col.store.iter_stored() if p.suffix == ".jpg"), traced)
    col.ledger_path.write_bytes(b"")  # what ": > ledger.sqlite" does
    demo_server.clear_log()

    for args in every_command(col, traced):
        result = runner.invoke(app, args)
        assert result.exit_code == 2, (args, result.output)
        assert "Error: the ledger" in result.output and "is empty" in result.output, args
        assert f"collector restore-ledger {col.root}" in result.output, args
        assert f"collector rebuild-ledger {col.root}" in result.output, args
        assert "Traceback" not in result.output
        assert store_snapshot(col) == before_files, args
        assert col.ledger_path.stat().st_size == 0, args
    assert not (col.root.parent / "sheet").exists()
    assert demo_server.log == []  # nothing was requested either

    rebuilt = runner.invoke(app, ["rebuild-ledger", str(col.root)])
    assert rebuilt.exit_code == 0, rebuilt.output
    assert f"Registered {len(before_files)} stored files as recovered" in rebuilt.output
    aside = list(col.root.glob("ledger.sqlite.unusable-*Z"))  # its -wal/-shm follow it
    assert len(aside) == 1 and aside[0].stat().st_size == 0  # set aside, not deleted
    assert store_snapshot(col) == before_files
    with col.ledger(readonly=True) as ledger:
        rows = ledger.query("SELECT sha256, first_item_id, flags, phash FROM files")
        assert ledger.collection_id() == col.folder_id()
    assert {r["sha256"] for r in rows} == set(before_files)
    assert all(r["first_item_id"] is None and "recovered" in r["flags"] for r in rows)
    assert all(r["phash"] is not None for r in rows)  # near matching keeps working
    trace = runner.invoke(app, ["trace", str(traced), "--in", str(col.root)])
    assert trace.exit_code == 0, trace.output
    assert "stored, provenance unknown (recovered on " in trace.output
    assert "licensed under" not in trace.output
    assert runner.invoke(app, ["status", str(col.root)]).exit_code == 0

    restored = runner.invoke(app, ["restore-ledger", str(col.root)])
    assert restored.exit_code == 0, restored.output
    assert "Restored" in restored.output
    assert provenance(col) == before
    assert len(list(col.root.glob("ledger.sqlite.before-restore-*Z"))) == 1
    assert store_snapshot(col) == before_files
    trace = runner.invoke(app, ["trace", str(traced), "--in", str(col.root)])
    assert trace.exit_code == 0 and "provenance unknown" not in trace.output
    assert "licence:" in trace.output


@pytest.mark.parametrize("damage", ["missing", "not-sqlite", "no-schema", "recreated"])
def test_other_unusable_ledgers_stop_gather_and_touch_nothing(
        small: Collection, damage: str) -> None:
    """A missing ledger, a non-SQLite file, a SQLite file without our schema and a freshly
    re-created ledger beside stored files all stop gather with exit 2; nothing changes."""
    files = store_snapshot(small)
    if damage == "missing":
        small.ledger_path.unlink()
    elif damage == "not-sqlite":
        small.ledger_path.write_bytes(b"not a database at all " * 200)
    elif damage == "no-schema":
        small.ledger_path.unlink()
        conn = sqlite3.connect(small.ledger_path)
        conn.execute("CREATE TABLE t (x)")
        conn.commit()
        conn.close()
    else:
        small.ledger_path.unlink()
        small.id_path.unlink()
        Ledger.create(small.ledger_path).close()
    ledger_bytes = small.ledger_path.read_bytes() if small.ledger_path.exists() else None
    result = runner.invoke(app, ["gather", str(small.root), "--quiet"])
    assert result.exit_code == 2, result.output
    assert "Error:" in result.output and "collector rebuild-ledger" in result.output
    assert store_snapshot(small) == files
    if ledger_bytes is not None:
        assert small.ledger_path.read_bytes() == ledger_bytes


def test_init_existing_ok_does_not_create_a_ledger_beside_stored_files(small: Collection) -> None:
    """'init --existing-ok' after the ledger was lost refuses instead of making an empty one."""
    small.ledger_path.unlink()
    result = runner.invoke(app, ["init", str(small.root), "--existing-ok"])
    assert result.exit_code == 2
    assert not small.ledger_path.exists()


# --- recovery --------------------------------------------------------------------------------
def _undo_one_item(col: Collection, *, intent: bool) -> tuple[int, str, str]:
    """Make the ledger look as if the run died between storing a file and committing its row
    (with or without the store intent that precedes the store): (item id, sha, image path)."""
    with col.ledger() as ledger:
        row = ledger.query("SELECT id, file_sha256, image_url FROM items WHERE state = "
                           "'stored' AND image_url IS NOT NULL ORDER BY id LIMIT 1")[0]
        others = ledger.scalar("SELECT count(*) FROM items WHERE file_sha256 = ?",
                               (row["file_sha256"],))
        assert others == 1
        with ledger.transaction():
            ledger.db.execute("DELETE FROM files WHERE sha256 = ?", [row["file_sha256"]])
            ledger.update_item(row["id"], state="pending", reason=None, file_sha256=None)
            if intent:
                ledger.add_store_intent(row["file_sha256"], row["id"])
    return row["id"], row["file_sha256"], row["image_url"].split("/", 3)[3]


def test_a_file_named_by_a_store_intent_is_removed_and_fetched_again(
        small: Collection, fresh_demo_server: DemoServer) -> None:
    """Crash between store and row (the intent is committed): recovery removes the file, the
    item is pending, and the next run fetches it again and stores the same bytes."""
    item_id, sha, image_path = _undo_one_item(small, intent=True)
    with small.ledger() as ledger:
        rec = recover(small, ledger)
        assert rec.orphan_files_removed == 1 and rec.unknown_files == ()
        assert ledger.store_intents() == set()
        assert ledger.item(item_id)["state"] == "pending"
    assert small.store.find(sha) is None
    fresh_demo_server.clear_log()
    assert gather(small).outcome == "finished"
    assert any(r.path == "/" + image_path and r.status == 200 for r in fresh_demo_server.log)
    with small.ledger(readonly=True) as ledger:
        assert ledger.item(item_id)["state"] == "stored"
        assert ledger.file(sha)["first_item_id"] == item_id
    assert small.store.find(sha) is not None


def test_a_stored_file_without_row_or_intent_is_kept_reported_and_reattached(
        small: Collection, fresh_demo_server: DemoServer) -> None:
    """A stored file the ledger cannot explain (no row, no intent) is kept; gather prints one
    line about it and notes it, then attaches it to its item when the item is listed."""
    item_id, sha, _ = _undo_one_item(small, intent=False)
    path = small.store.find(sha)
    assert path is not None
    content = path.read_bytes()
    result = runner.invoke(app, ["gather", str(small.root), "--quiet"])
    assert result.exit_code == 0, result.output
    assert ("Note: 1 stored files are unknown to the ledger (kept, not deleted); "
            f"'collector rebuild-ledger {small.root}' registers them") in result.output
    assert path.read_bytes() == content
    with small.ledger(readonly=True) as ledger:
        assert ledger.item(item_id)["state"] == "stored"
        assert ledger.file(sha)["first_item_id"] == item_id
        kinds = [r["kind"] for r in ledger.query("SELECT kind FROM notes")]
    assert "unknown_files" in kinds


def test_rebuilt_collection_is_reattached_by_the_next_gather(small: Collection) -> None:
    """After rebuild-ledger, a gather re-lists the items and attaches each to its recovered
    file: the same states and files as before, no file left marked recovered."""
    def states(col: Collection) -> set[tuple]:
        with col.ledger(readonly=True) as ledger:
            return {tuple(r.values()) for r in ledger.query(
                "SELECT source_key, state, reason, file_sha256 FROM items")}

    before = states(small)
    files = store_snapshot(small)
    small.ledger_path.write_bytes(b"")
    assert runner.invoke(app, ["rebuild-ledger", str(small.root)]).exit_code == 0
    assert gather(small).outcome == "finished"
    assert states(small) == before
    assert store_snapshot(small) == files
    with small.ledger(readonly=True) as ledger:
        rows = ledger.query("SELECT first_item_id, flags FROM files")
    assert rows and all(r["first_item_id"] is not None and "recovered" not in r["flags"]
                        for r in rows)


def test_rebuild_beside_a_usable_ledger_registers_only_the_unknown_files(
        small: Collection) -> None:
    """rebuild-ledger on a usable ledger keeps it (nothing set aside) and registers only the
    stored file it did not know, as recovered."""
    item_id, sha, _ = _undo_one_item(small, intent=False)
    known = len(store_snapshot(small)) - 1
    result = runner.invoke(app, ["rebuild-ledger", str(small.root)])
    assert result.exit_code == 0, result.output
    assert f"Registered 1 stored files as recovered, provenance unknown ({known} were " \
        "already known)" in result.output
    assert list(small.root.glob("ledger.sqlite.*")) == []
    with small.ledger(readonly=True) as ledger:
        row = ledger.file(sha)
        assert row["first_item_id"] is None and "recovered" in row["flags"]
        assert ledger.item(item_id)["state"] == "pending"
        assert ledger.scalar("SELECT count(*) FROM files WHERE first_item_id IS NOT NULL") \
            == known


def test_restore_of_an_older_backup_keeps_newer_files_and_gather_reattaches_them(
        small: Collection, tmp_path: Path) -> None:
    """restore-ledger BACKUP from before a file was stored: the file is kept and reported,
    and the next gather attaches it to its item again."""
    older = tmp_path / "older.sqlite"
    shutil.copy(list_backups(small)[0], older)
    with Ledger.open(older) as ledger:
        row = ledger.query("SELECT id, file_sha256 FROM items WHERE state = 'stored' "
                           "AND image_url IS NOT NULL ORDER BY id DESC LIMIT 1")[0]
        with ledger.transaction():
            ledger.db.execute("DELETE FROM files WHERE sha256 = ?", [row["file_sha256"]])
            ledger.update_item(row["id"], state="pending", reason=None, file_sha256=None)
    files = store_snapshot(small)
    result = runner.invoke(app, ["restore-ledger", str(small.root), str(older)])
    assert result.exit_code == 0, result.output
    assert "1 stored files are newer than the backup (kept)" in result.output
    assert store_snapshot(small) == files
    assert gather(small).outcome == "finished"
    with small.ledger(readonly=True) as ledger:
        assert ledger.item(row["id"])["state"] == "stored"
        assert ledger.file(row["file_sha256"])["first_item_id"] == row["id"]
    assert store_snapshot(small) == files


def test_store_gone_stops_instead_of_resetting_every_item(small: Collection) -> None:
    """A ledger with files while files/ holds none (unmounted disk, moved folder) is refused;
    no item is reset to pending."""
    before = provenance(small)
    small.store.root.rename(small.root / "files-elsewhere")
    for args in (["gather", str(small.root), "--quiet"], ["status", str(small.root)]):
        result = runner.invoke(app, args)
        assert result.exit_code == 2, result.output
        assert "holds none at all: is the disk mounted" in result.output
    assert provenance(small) == before


def test_foreign_ledger_is_refused(tmp_path: Path, small: Collection) -> None:
    """A ledger copied from another collection (its id differs from collection.id) stops
    every command with 'belongs to another collection'."""
    other = init_collection(tmp_path / "other", contact="x@example.org")
    shutil.copy(small.ledger_path, other.ledger_path)
    result = runner.invoke(app, ["status", str(other.root)])
    assert result.exit_code == 2
    assert "this ledger belongs to another collection" in result.output
    with pytest.raises(LedgerUnusable, match="another collection"):
        open_collection(other.root)


def test_version_1_ledger_migrates_and_gets_the_folder_id(
        small: Collection, fresh_demo_server: DemoServer) -> None:
    """An older collection (version 1 ledger, no collection.id) migrates on the next gather:
    the same id is written to the ledger and the folder, and no file is removed."""
    files = store_snapshot(small)
    conn = sqlite3.connect(small.ledger_path)
    conn.executescript("DROP TABLE ledger_facts; DROP TABLE store_intents; "
                       "DELETE FROM schema_version WHERE version > 1;")
    conn.close()
    small.id_path.unlink()
    assert runner.invoke(app, ["status", str(small.root)]).exit_code == 0  # read-only
    assert not small.id_path.exists()
    assert gather(small).outcome == "finished"
    with small.ledger(readonly=True) as ledger:
        assert ledger.schema_version() == SCHEMA_VERSION
        assert ledger.collection_id() == small.folder_id() is not None
    assert store_snapshot(small) == files


# --- the ledger file itself --------------------------------------------------------------------
def test_open_never_writes_a_schema_into_an_empty_or_foreign_file(tmp_path: Path) -> None:
    """Ledger.open leaves a 0-byte file and a schema-less SQLite file exactly as they were."""
    empty = tmp_path / "empty.sqlite"
    empty.write_bytes(b"")
    with pytest.raises(LedgerUnusable, match="is empty"):
        Ledger.open(empty)
    assert empty.read_bytes() == b""
    other = tmp_path / "other.sqlite"
    conn = sqlite3.connect(other)
    conn.execute("CREATE TABLE t (x)")
    conn.commit()
    conn.close()
    content = other.read_bytes()
    with pytest.raises(LedgerUnusable, match="no collector schema"):
        Ledger.open(other)
    assert other.read_bytes() == content
    assert LedgerUnusable("x").exit_code == 2


def test_nested_writes_join_the_outer_transaction(tmp_path: Path) -> None:
    """An error inside transaction() rolls back the writes made by helpers inside it."""
    with Ledger.create(tmp_path / "l.sqlite") as ledger:
        with pytest.raises(RuntimeError), ledger.transaction():
            ledger.add_note("k", "m")
            ledger.add_store_intent("a" * 64, None)
            raise RuntimeError("stop")
        assert ledger.scalar("SELECT count(*) FROM notes") == 0
        assert ledger.store_intents() == set()


# --- backups -----------------------------------------------------------------------------------
def test_each_run_leaves_a_backup_and_only_the_newest_are_kept(small: Collection) -> None:
    """A run ends with a backup in ledger-backups/; older ones beyond KEEP_BACKUPS go."""
    first = list_backups(small)
    assert len(first) == 1
    with sqlite3.connect(f"file:{first[0]}?mode=ro", uri=True) as conn:
        assert conn.execute("SELECT count(*) FROM files").fetchone()[0] > 0
    with small.ledger() as ledger:
        made = [backup_ledger(small, ledger, 99) for _ in range(KEEP_BACKUPS + 2)]
    kept = list_backups(small)
    assert kept == made[::-1][:KEEP_BACKUPS]
    assert not first[0].exists()


def test_a_symlinked_backup_folder_is_refused_and_the_run_warns(
        small: Collection, tmp_path: Path) -> None:
    """ledger-backups/ as a link elsewhere: nothing is written through it; gather still
    ends as it would and says that no backup was written."""
    shutil.rmtree(small.root / BACKUP_DIR)
    elsewhere = tmp_path / "elsewhere"
    elsewhere.mkdir()
    os.symlink(elsewhere, small.root / BACKUP_DIR)
    with small.ledger() as ledger, pytest.raises(CollectionError, match="is a symbolic link"):
        backup_ledger(small, ledger, 1)
    result = runner.invoke(app, ["gather", str(small.root), "--quiet"])
    assert result.exit_code == 0, result.output
    assert "Warning: no ledger backup was written" in result.output
    assert list(elsewhere.iterdir()) == []


def test_restore_refuses_a_backup_of_another_collection(
        small: Collection, tmp_path: Path) -> None:
    """restore-ledger checks the backup before anything moves: another collection's ledger
    is refused and the current ledger stays in place."""
    other = init_collection(tmp_path / "other", contact="x@example.org")
    ledger_bytes = small.ledger_path.read_bytes()
    result = runner.invoke(app, ["restore-ledger", str(small.root), str(other.ledger_path)])
    assert result.exit_code == 2, result.output
    assert "another collection" in result.output
    assert small.ledger_path.read_bytes() == ledger_bytes
    assert list(small.root.glob("ledger.sqlite.*")) == []


def test_collection_id_is_written_once_and_matches_the_ledger(tmp_path: Path) -> None:
    """init writes collection.id with the ledger's collection_id."""
    col = init_collection(tmp_path / "c", contact="x@example.org")
    with col.ledger(readonly=True) as ledger:
        assert ledger.collection_id() == col.folder_id()
    assert (col.root / ID_NAME).read_text().strip() == col.folder_id()
