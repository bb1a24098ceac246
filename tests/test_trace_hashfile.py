"""The persistent hash file behind collector trace: in step with the ledger, exact scan."""

from __future__ import annotations

import random
from pathlib import Path

import numpy as np
import pytest

from collector.checks.phash import to_signed64, to_unsigned64
from collector.storage.hashindex import (
    HashFile,
    HashIndex,
    ledger_mark,
    scan,
    scan_turns,
)
from collector.storage.ledger import Ledger


def _sha(n: int) -> str:
    return f"{n:064x}"


def _add(ledger: Ledger, n: int, phash: int | None) -> None:
    ledger.add_file({"sha256": _sha(n), "size": 1, "ext": "png",
                     "phash": None if phash is None else to_signed64(phash),
                     "phash_mirror": None, "first_item_id": n})


@pytest.fixture
def ledger(tmp_path: Path) -> Ledger:
    """A ledger with 50 random hashes and one file without a hash."""
    led = Ledger.create(tmp_path / "ledger.sqlite")
    rng = random.Random(7)
    for n in range(50):
        _add(led, n, rng.getrandbits(64))
    _add(led, 50, None)
    yield led
    led.close()


def _stored(ledger: Ledger) -> dict[str, int]:
    return {r["sha256"]: to_unsigned64(r["phash"]) for r in ledger.query(
        "SELECT sha256, phash FROM files WHERE phash IS NOT NULL")}


def test_hash_file_holds_every_hashed_file_of_the_ledger(ledger: Ledger, tmp_path: Path
                                                         ) -> None:
    """A new hash file has one entry per files row with a hash, keyed by sha256."""
    hf = HashFile.open(ledger, tmp_path / "cache" / "phash-index")
    assert hf.path is not None and hf.path.is_file()
    assert hf.mark == ledger_mark(ledger)
    got = {hf.keys[i].tobytes().hex(): int(hf.hashes[i]) for i in range(len(hf))}
    assert got == _stored(ledger)


def test_new_ledger_rows_are_appended_in_place(ledger: Ledger, tmp_path: Path) -> None:
    """Rows stored after the file was written are appended without a rebuild."""
    path = tmp_path / "cache" / "phash-index"
    HashFile.open(ledger, path)
    inode = path.stat().st_ino
    _add(ledger, 60, 0x0123456789ABCDEF)
    hf = HashFile.open(ledger, path)
    assert path.stat().st_ino == inode  # same file: appended, not replaced
    assert len(hf) == 51
    assert hf.nearest(0x0123456789ABCDEF, None, 0)[0].sha256 == _sha(60)


def test_deleted_rows_trigger_a_rebuild(ledger: Ledger, tmp_path: Path) -> None:
    """A row removed by crash recovery makes the file stale; it is rebuilt without it."""
    path = tmp_path / "cache" / "phash-index"
    HashFile.open(ledger, path)
    inode = path.stat().st_ino
    with ledger.transaction():
        ledger.db.execute("DELETE FROM files WHERE sha256 = ?", [_sha(3)])
    hf = HashFile.open(ledger, path)
    assert path.stat().st_ino != inode
    keys = {hf.keys[i].tobytes().hex() for i in range(len(hf))}
    assert keys == set(_stored(ledger)) and _sha(3) not in keys


def test_a_reused_last_rowid_is_noticed(ledger: Ledger, tmp_path: Path) -> None:
    """Deleting the newest row and storing another (same count, same max rowid) rebuilds."""
    path = tmp_path / "cache" / "phash-index"
    HashFile.open(ledger, path)
    with ledger.transaction():
        ledger.db.execute("DELETE FROM files WHERE sha256 = ?", [_sha(50)])
    _add(ledger, 77, 42)
    hf = HashFile.open(ledger, path)
    assert {hf.keys[i].tobytes().hex() for i in range(len(hf))} == set(_stored(ledger))


def test_a_corrupt_hash_file_is_rebuilt(ledger: Ledger, tmp_path: Path) -> None:
    """A file with a wrong header is ignored and rebuilt from the ledger."""
    path = tmp_path / "cache" / "phash-index"
    path.parent.mkdir()
    path.write_bytes(b"garbage" * 10)
    hf = HashFile.open(ledger, path)
    assert len(hf) == 50


def test_unwritable_folder_falls_back_to_memory(ledger: Ledger, tmp_path: Path) -> None:
    """When the hash file cannot be written the hashes are read into memory instead."""
    blocker = tmp_path / "cache"
    blocker.write_text("a file where the cache folder should be")  # mkdir fails, even as root
    hf = HashFile.open(ledger, blocker / "phash-index")
    assert hf.path is None and len(hf) == 50
    assert hf.nearest(next(iter(_stored(ledger).values())), None, 0)


def test_scan_finds_every_hash_within_the_threshold() -> None:
    """The numpy scan agrees with a plain popcount over every pair (no misses, no extras)."""
    rng = random.Random(11)
    stored = [rng.getrandbits(64) for _ in range(2000)]
    query = rng.getrandbits(64)
    for d in range(0, 11):  # planted neighbours at distance 0..10
        flip = 0
        for bit in rng.sample(range(64), d):
            flip |= 1 << bit
        stored.append(query ^ flip)
    hashes = np.array(stored, dtype=np.uint64)
    mirror = rng.getrandbits(64)
    got = {(row, dist, mir) for row, dist, mir in scan(hashes, query, mirror, 8)}
    expected = set()
    for row, h in enumerate(stored):
        direct, through = (h ^ query).bit_count(), (h ^ mirror).bit_count()
        best = min(direct, through)
        if best <= 8:
            expected.add((row, best, through < direct))
    assert got == expected and len(got) >= 9


@pytest.mark.parametrize("at_once", [1 << 13, 0])
def test_scan_turns_finds_every_turn_within_the_threshold(
        at_once: int, monkeypatch: pytest.MonkeyPatch) -> None:
    """Each stored hash within the radius of one of the 8 turned queries is found once, at its
    smallest distance (the first turn listed wins a tie), compared with a plain popcount over
    every pair; a small index compared with all turns in one pass (``at_once``) and one
    scanned turn by turn give the same answer."""
    monkeypatch.setattr("collector.storage.hashindex._TURNS_AT_ONCE", at_once)
    rng = random.Random(5)
    turns = {name: rng.getrandbits(64) for name in (
        "same", "mirror", "rotate180", "rotate180+mirror", "rotate90", "rotate270",
        "rotate90+mirror", "rotate270+mirror")}
    stored = [rng.getrandbits(64) for _ in range(300)]
    for n, query in enumerate(turns.values()):  # planted neighbours of each turn
        stored += [query ^ (1 << n), query ^ (0b111 << n), query ^ (0xFFF << n)]
    got = scan_turns(np.array(stored, dtype=np.uint64), turns, 8, crop_keep=0)
    expected = {}
    for row, h in enumerate(stored):
        for name, query in turns.items():
            d = (h ^ query).bit_count()
            if d <= 8 and (row not in expected or d < expected[row][0]):
                expected[row] = (d, name)
    assert sorted(got) == sorted((row, d, name) for row, (d, name) in expected.items())
    assert len(got) >= 16
    assert [d for _, d, _ in got] == sorted(d for _, d, _ in got)  # closest first


def test_in_memory_index_keeps_its_api() -> None:
    """HashIndex.add/nearest (used by gather) still answer with NearMatch, closest first.
    The hashes are XORed with a 32-bit pattern, as real pHashes set about half their bits
    (a hash with few bits set is featureless and never compared); distances are unchanged."""
    base = 0x5555_5555_5555_5555
    index = HashIndex()
    index.add("a" * 64, base ^ 0b1111)
    index.add("b" * 64, base)
    matches = index.nearest(base ^ 0b1, None, 4)
    assert [(m.sha256, m.distance, m.mirrored) for m in matches] == [
        ("b" * 64, 1, False), ("a" * 64, 3, False)]
    far = base ^ (0xFFFF << 48)  # 16+ bits from both; its mirror hash is 1 bit from "a"
    assert [(m.sha256, m.mirrored) for m in index.nearest(far, base ^ 0b111, 1)] == [
        ("a" * 64, True)]
    assert index.nearest(0b1, None, 64) == []  # featureless query: not compared at all
