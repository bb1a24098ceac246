"""The content-addressed store: whole files only, never overwritten, never outside its root."""

from __future__ import annotations

import errno
import hashlib
import os
import signal
import subprocess
import sys
import textwrap
from pathlib import Path

import pytest

from collector.errors import PathRefused, StoreError
from collector.storage.collection import init_collection, recover
from collector.storage.ledger import Ledger
from collector.storage.store import Store

# FIPS 180-4 example values (NIST): SHA-256("abc") and SHA-256("").
ABC = "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad"
EMPTY = "e3b0c44298fc1c149afbf4c8996fb92427ae41e4649b934ca495991b7852b855"


def test_put_bytes_names_file_by_its_sha256(tmp_path: Path) -> None:
    """Stored bytes land at files/ab/cd/<sha256>.<ext> (FIPS 180-4 'abc' vector)."""
    store = Store(tmp_path / "files")
    sha, path = store.put_bytes(b"abc", "png")
    assert sha == ABC
    assert path == tmp_path / "files" / "ba" / "78" / f"{ABC}.png"
    assert path.read_bytes() == b"abc"
    assert hashlib.sha256(b"").hexdigest() == EMPTY


def test_existing_file_is_never_overwritten(tmp_path: Path) -> None:
    """Adopting a temp file for a digest that exists keeps the existing file untouched."""
    store = Store(tmp_path / "files")
    _, path = store.put_bytes(b"abc", "png")
    before = path.stat().st_mtime_ns
    fd, tmp = store.new_temp()
    os.write(fd, b"something else")
    os.close(fd)
    assert store.adopt(tmp, ABC, "png") == path
    assert path.read_bytes() == b"abc"
    assert path.stat().st_mtime_ns == before
    assert not tmp.exists()


@pytest.mark.parametrize("bad", ["../../etc/passwd", "ab", "A" * 64])
def test_path_for_refuses_anything_but_a_hex_digest(tmp_path: Path, bad: str) -> None:
    """A name that is not a sha256 can never steer a write outside the store."""
    with pytest.raises(StoreError, match="not a sha256"):
        Store(tmp_path).path_for(bad, "png")


@pytest.mark.parametrize("ext", ["../x", "png/", "", "toolongext"])
def test_path_for_refuses_unsafe_extensions(tmp_path: Path, ext: str) -> None:
    """Extensions are short lowercase alphanumerics only."""
    with pytest.raises(StoreError, match="not a safe file extension"):
        Store(tmp_path).path_for(ABC, ext)


def test_disk_full_is_a_clear_store_error_and_leaves_no_temp_file(
        tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    """ENOSPC during the final move becomes StoreError(errno=ENOSPC) and cleans up."""
    store = Store(tmp_path / "files")

    def full(*_: object, **__: object) -> None:
        raise OSError(errno.ENOSPC, "No space left on device")

    monkeypatch.setattr(os, "replace", full)
    with pytest.raises(StoreError, match="disk is full") as info:
        store.put_bytes(b"abc", "png")
    assert info.value.errno == errno.ENOSPC
    assert list(store.incoming_dir.iterdir()) == []
    assert list(store.iter_stored()) == []


CRASH_SCRIPT = textwrap.dedent("""
    import os, signal, sys
    from pathlib import Path
    from collector.storage.collection import Collection
    root = Path(sys.argv[1]); point = sys.argv[2]
    col = Collection(root); store = col.store; ledger = col.ledger()
    fd, tmp = store.new_temp()
    os.write(fd, b"half of an image")
    if point == "mid-write":
        os.kill(os.getpid(), signal.SIGKILL)
    os.write(fd, b" and the rest"); os.close(fd)
    import hashlib
    sha = hashlib.sha256(b"half of an image and the rest").hexdigest()
    # write-ahead, as collector.run.ingest does: the intent committed just before the move
    store.adopt(tmp, sha, "png", before_placing=lambda: ledger.add_store_intent(sha, None))
    if point == "before-row":
        os.kill(os.getpid(), signal.SIGKILL)
    with ledger.transaction():
        ledger.add_file({"sha256": sha, "size": 29, "ext": "png"})
        ledger.drop_store_intent(sha)
    os.kill(os.getpid(), signal.SIGKILL)
""")


@pytest.mark.parametrize("point", ["mid-write", "before-row", "after-row"])
def test_crash_during_store_write_leaves_no_partial_file_and_no_dangling_row(
        tmp_path: Path, point: str) -> None:
    """SIGKILL at any point of a write, then recovery: every stored file has a row and every
    row has its whole file."""
    col = init_collection(tmp_path / "c", contact="me@example.org")
    proc = subprocess.run([sys.executable, "-c", CRASH_SCRIPT, str(col.root), point],
                          capture_output=True, check=False)
    assert proc.returncode == -signal.SIGKILL
    with col.ledger() as ledger:
        recover(col, ledger)
        rows = ledger.known_sha256s()
    stored = dict(col.store.iter_stored())
    assert list(col.store.incoming_dir.iterdir()) == []
    assert set(stored) == rows
    for sha, path in stored.items():
        assert hashlib.sha256(path.read_bytes()).hexdigest() == sha
    assert (len(rows) == 1) == (point == "after-row")


def _temp_with(store: Store, data: bytes) -> Path:
    fd, tmp = store.new_temp()
    os.write(fd, data)
    os.close(fd)
    return tmp


def test_the_write_ahead_hook_runs_before_the_move_and_only_for_a_new_digest(
        tmp_path: Path) -> None:
    """Store.adopt's ``before_placing`` (where ingest commits its store intent) runs while
    the file is not in the store yet, and not at all when a file of the digest is already
    stored under any extension (what Store.find says); a link in the shard folder under
    the digest's name is refused before the hook runs, and nothing is written through it."""
    store = Store(tmp_path / "files")
    seen: list[Path | None] = []

    def hook() -> None:
        seen.append(store.find(ABC))

    path = store.adopt(_temp_with(store, b"abc"), ABC, "png", before_placing=hook)
    assert seen == [None] and path.read_bytes() == b"abc"
    again = store.adopt(_temp_with(store, b"abc"), ABC, "png", before_placing=hook)
    assert again == path and seen == [None]
    store.adopt(_temp_with(store, b"abc"), ABC, "jpg", before_placing=hook)
    assert seen == [None]  # the digest is stored (as .png): no intent for a second name
    outside = tmp_path / "outside"
    outside.mkdir()
    empty = hashlib.sha256(b"").hexdigest()
    shard = store.root / empty[:2] / empty[2:4]
    shard.mkdir(parents=True)
    (shard / f"{empty}.gif").symlink_to(outside / "planted.gif")
    with pytest.raises(PathRefused, match="symbolic link"):
        store.adopt(_temp_with(store, b""), empty, "png", before_placing=hook)
    assert seen == [None] and list(outside.iterdir()) == []
    assert not (shard / f"{empty}.png").exists()


def test_recover_resets_items_whose_file_was_deleted(tmp_path: Path) -> None:
    """An item pointing at a file removed by hand goes back to pending (while the store
    still holds other files: an empty store is refused, see test_ledger_safety)."""
    col = init_collection(tmp_path / "c", contact="me@example.org")
    with Ledger.open(col.ledger_path) as ledger:
        sha, path = col.store.put_bytes(b"abc", "png")
        kept, _ = col.store.put_bytes(b"def", "png")
        source = ledger.source_id("s", "scans", {})
        item = ledger.add_item(source, "k", {"state": "stored", "file_sha256": sha})
        ledger.add_item(source, "k2", {"state": "stored", "file_sha256": kept})
        ledger.add_file({"sha256": sha, "size": 3, "ext": "png"})
        ledger.add_file({"sha256": kept, "size": 3, "ext": "png"})
        path.unlink()
        result = recover(col, ledger)
        assert result.rows_reset == 1
        assert ledger.item(item)["state"] == "pending"
        assert ledger.file(sha) is None


def test_stored_files_are_readable_by_others_like_any_file(tmp_path: Path) -> None:
    """Stored files get mode 0644 (mkstemp's 0600 would follow hard links into releases)."""
    _, path = Store(tmp_path / "files").put_bytes(b"abc", "png")
    assert path.stat().st_mode & 0o777 == 0o644
