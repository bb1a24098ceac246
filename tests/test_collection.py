"""Collection folders: init, open, the gather lock."""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

import pytest

from collector.errors import CollectionError
from collector.storage.collection import init_collection, open_collection


def test_init_creates_recipe_ledger_and_store(tmp_path: Path) -> None:
    """init writes the three parts of a collection folder."""
    col = init_collection(tmp_path / "c", contact="me@example.org")
    assert col.recipe_path.is_file() and col.ledger_path.is_file()
    assert col.store.root.is_dir()
    assert open_collection(col.root).recipe().contact == "me@example.org"


def test_init_refuses_a_non_empty_folder_without_touching_it(tmp_path: Path) -> None:
    """A folder with files in it is left exactly as it was."""
    folder = tmp_path / "c"
    folder.mkdir()
    (folder / "notes.txt").write_text("mine")
    with pytest.raises(CollectionError, match="not empty; nothing was changed"):
        init_collection(folder)
    assert [p.name for p in folder.iterdir()] == ["notes.txt"]


def test_init_existing_ok_adds_only_what_is_missing(tmp_path: Path) -> None:
    """--existing-ok keeps an existing recipe and adds the ledger and store."""
    folder = tmp_path / "c"
    folder.mkdir()
    (folder / "recipe.toml").write_text('contact = "kept@example.org"\n')
    init_collection(folder, contact="new@example.org", existing_ok=True)
    assert (folder / "recipe.toml").read_text() == 'contact = "kept@example.org"\n'
    assert (folder / "ledger.sqlite").is_file()


def test_open_collection_explains_a_plain_folder(tmp_path: Path) -> None:
    """Opening a folder that is not a collection says how to create one."""
    with pytest.raises(CollectionError, match="not a collection folder"):
        open_collection(tmp_path)


HOLD = """
import sys, time
from pathlib import Path
from collector.storage.collection import Collection
with Collection(Path(sys.argv[1])).gather_lock():
    print("held", flush=True)
    time.sleep(30)
"""


def test_second_gather_lock_is_refused_with_a_clear_message(tmp_path: Path) -> None:
    """While one process holds the gather lock, another gets CollectionError naming it."""
    col = init_collection(tmp_path / "c", contact="me@example.org")
    proc = subprocess.Popen([sys.executable, "-c", HOLD, str(col.root)],
                            stdout=subprocess.PIPE, text=True)
    try:
        assert proc.stdout is not None and proc.stdout.readline().strip() == "held"
        with pytest.raises(CollectionError, match=f"process {proc.pid}"), col.gather_lock():
            pass
    finally:
        proc.kill()
        proc.wait()
    with col.gather_lock():
        pass


def test_an_old_index_inside_the_store_is_removed_on_open(tmp_path: Path) -> None:
    """A collection from an older collector kept its near-duplicate index in files/; opening
    it removes that derived file (it is rebuilt in cache/ on demand), and nothing else."""
    from collector.storage.collection import open_collection

    col = init_collection(tmp_path / "c", contact="me@example.org")
    (col.store.root / ".phash-index").write_bytes(b"CLPHX001" + bytes(120))
    (col.store.root / ".phash-index.lock").write_bytes(b"")
    kept = col.store.root / ".phash-index-notes.txt"  # not ours to remove: kept
    kept.write_bytes(b"content")
    open_collection(col.root)
    assert not (col.store.root / ".phash-index").exists()
    assert not (col.store.root / ".phash-index.lock").exists()
    assert kept.read_bytes() == b"content"


def test_a_symlinked_cache_folder_is_refused(tmp_path: Path) -> None:
    """cache/ pointing outside the folder is refused with a clear error; nothing is written
    through it."""
    from collector.errors import CollectionError
    from collector.exports.trace import Tracer

    col = init_collection(tmp_path / "c", contact="me@example.org")
    outside = tmp_path / "outside"
    outside.mkdir()
    col.cache_dir.symlink_to(outside, target_is_directory=True)
    with pytest.raises(CollectionError, match="is a symbolic link"):
        Tracer.open(col.root)
    assert list(outside.iterdir()) == []
