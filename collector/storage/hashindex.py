"""Near-duplicate lookup over 64-bit perceptual hashes.

A brute-force scan with ``np.bitwise_count`` over every stored hash is exact and, measured on
this project's 2-core machine, takes about 0.6 ms per query for 1,000,000 hashes — faster than
any band index inside SQLite (15-60 ms). So the index is just two arrays: the hashes and the
sha256 each belongs to. Its guarantee: every stored hash within ``max_distance`` bits of the
query (or of the query's mirror-image hash) is found.
"""

from __future__ import annotations

import contextlib
import os
import struct
import threading
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from collector.checks.phash import featureless, to_unsigned64
from collector.storage import queries
from collector.storage.file_locks import lock_exclusive
from collector.storage.ledger import Ledger
from collector.storage.safe_paths import new_temp_file, open_own_file, refuse_link


def scan(hashes: np.ndarray, phash: int, mirror: int | None,
         max_distance: int) -> list[tuple[int, int, bool]]:
    """Rows of ``hashes`` (uint64) within ``max_distance`` bits of ``phash`` or of ``mirror``,
    as (row, distance, mirrored), closest first; each row once, a direct match winning a tie.

    Exact by construction: every row is compared, so nothing within the threshold is missed.
    A featureless query (a flat fill or plain gradient, :func:`collector.checks.phash.
    featureless`) matches nothing: two flat fills of different colours are not copies.
    """
    if not len(hashes) or featureless(phash):
        return []
    # One pass per query hash, keeping only the few rows under the threshold: no full-size
    # temporaries beyond the XOR and the counts (measured 1.6 ms for both passes over 1M).
    best: dict[int, tuple[int, bool]] = {}
    for query, is_mirror in ((phash, False), (mirror, True)):
        if query is None:
            continue
        distances = np.bitwise_count(hashes ^ np.uint64(query))
        for row in np.flatnonzero(distances <= max_distance):
            d = int(distances[row])
            if int(row) not in best or d < best[int(row)][0]:
                best[int(row)] = (d, is_mirror)
    found = [(row, d, m) for row, (d, m) in best.items()]
    return sorted(found, key=lambda f: (f[1], f[2], f[0]))


# Crops: the pHash of a copy cropped to 80-90 % per side lies 12-30 bits from the original's,
# so crop candidates come from a loose radius and only the closest few go to the second look
# (collector.checks.likeness), which searches the crop box. Our own values, set on
# bench/trace_quality.py (common practice, no source).
CROP_DISTANCE = 26
CROP_KEEP = 16


def scan_turns(hashes: np.ndarray, turns: dict[str, int], max_distance: int,
               crop_distance: int = CROP_DISTANCE,
               crop_keep: int = CROP_KEEP) -> list[tuple[int, int, str]]:
    """Candidates for the second look, as (row, distance, kind): every row within
    ``max_distance`` of one of the query's turned hashes (``turns``: some or all of the 8 of
    collector.checks.phash.TURNS; kind: the turn, closest first), then the ``crop_keep``
    closest rows within ``crop_distance`` of the upright hash (kind "crop") that are not
    candidates already.

    One XOR and popcount pass per turn over every stored hash (about 0.5 ms per pass at
    1,000,000 hashes, bench/trace.py)."""
    if not len(hashes) or featureless(turns["same"]):
        return []
    best: dict[int, tuple[int, str]] = {}
    loose = np.zeros(0, dtype=np.intp)
    upright = None
    for turn, query in turns.items():
        distances = np.bitwise_count(hashes ^ np.uint64(query))
        for row in np.flatnonzero(distances <= max_distance).tolist():
            d = int(distances[row])
            if row not in best or d < best[row][0]:
                best[row] = (d, turn)
        if turn == "same" and crop_keep > 0:
            upright = distances
            loose = np.flatnonzero((distances > max_distance) & (distances <= crop_distance))
    near = sorted(((row, d, turn) for row, (d, turn) in best.items()),
                  key=lambda f: (f[1], f[2] != "same", f[0]))
    if upright is None or not len(loose) or crop_keep <= 0:
        return near
    if len(loose) > crop_keep:  # the closest few, without sorting every loose row
        loose = loose[np.argpartition(upright[loose], crop_keep)[:crop_keep]]
    crops = sorted((int(upright[row]), int(row)) for row in loose if int(row) not in best)
    return near + [(row, d, "crop") for d, row in crops]


@dataclass(frozen=True)
class NearMatch:
    """A stored file whose hash is close to the query."""

    sha256: str
    distance: int
    mirrored: bool


class HashIndex:
    """Append-only in-memory index of (sha256, perceptual hash); thread-safe."""

    def __init__(self) -> None:
        self._hashes = np.zeros(1024, dtype=np.uint64)
        self._count = 0
        self._keys: list[str | None] = []  # None: removed
        self._lock = threading.Lock()

    def __len__(self) -> int:
        return self._count

    @classmethod
    def from_ledger(cls, ledger: Ledger) -> HashIndex:
        """Load every stored file's hash from the ledger."""
        index = cls()
        for sha256, phash in queries.stored_phashes(ledger):
            index.add(sha256, to_unsigned64(phash))
        return index

    def add(self, sha256: str, phash: int) -> None:
        """Add one stored file's hash (unsigned 64-bit)."""
        with self._lock:
            if self._count == len(self._hashes):
                self._hashes = np.concatenate([self._hashes, np.zeros_like(self._hashes)])
            self._hashes[self._count] = np.uint64(phash)
            self._keys.append(sha256)
            self._count += 1

    def remove(self, sha256: str) -> None:
        """Forget a file's hash (its bytes were removed from the store)."""
        with self._lock:
            self._keys = [None if k == sha256 else k for k in self._keys]

    def nearest(self, phash: int, mirror: int | None, max_distance: int) -> list[NearMatch]:
        """Stored files within ``max_distance`` bits, closest first. A match through the
        mirror-image hash is marked ``mirrored``; a direct match wins a tie."""
        with self._lock:
            hashes = self._hashes[: self._count]
            keys = self._keys
            found = scan(hashes, phash, mirror, max_distance)
            matches = [NearMatch(key, distance, mirrored)
                       for row, distance, mirrored in found
                       if (key := keys[row]) is not None]  # None: removed
        return sorted(matches, key=lambda m: (m.distance, m.mirrored, m.sha256))

    def candidates(self, turns: dict[str, int], max_distance: int,
                   crops: bool = True) -> list[tuple[str, int, str]]:
        """(sha256, distance, kind) for the second look (see :func:`scan_turns`)."""
        with self._lock:
            hashes = self._hashes[: self._count]
            keys = self._keys
            found = scan_turns(hashes, turns, max_distance,
                               crop_keep=CROP_KEEP if crops else 0)
            return [(key, d, kind) for row, d, kind in found if (key := keys[row]) is not None]


# --- the persistent hash file ---------------------------------------------------------------
# One file in the collection's cache folder (Collection.hash_index_path), memory-mapped by
# readers (little-endian):
#   header (128 bytes): magic, capacity, entries, ledger_rows, max_rowid, last_sha (32 raw bytes)
#   hashes:  capacity x uint64 at offset 128            (the pHash of each entry)
#   keys:    capacity x 32 bytes after the hashes        (the raw sha256 of each entry)
# ``ledger_rows``/``max_rowid``/``last_sha`` describe the files table the entries were read
# from, so a reader can tell in three indexed queries whether the file is in step with the
# ledger. New ledger rows are appended in place while there is capacity; anything else (rows
# deleted by crash recovery, a replaced ledger, a full file) rebuilds the file and swaps it in
# with os.replace, so a reader always maps either the old or the new file, never a mixture.
_MAGIC = b"CLPHX001"
_HEADER = struct.Struct("<8sQQQq32s")
_HEADER_SIZE = 128
_KEY_SIZE = 32


@dataclass(frozen=True)
class LedgerMark:
    """Where the files table stands: row count, highest rowid and that row's sha256."""

    rows: int
    max_rowid: int
    last_sha: str | None


def ledger_mark(ledger: Ledger) -> LedgerMark:
    """Read the files table's mark (count, max rowid, sha256 at that rowid)."""
    return LedgerMark(*queries.files_mark(ledger))


def _read_rows(ledger: Ledger, after_rowid: int) -> tuple[LedgerMark, np.ndarray, bytes, int]:
    """Files rows with rowid > ``after_rowid``: (mark of the last row read, hashes, keys, rows).

    Rows without a pHash are counted but not indexed. Read as plain tuples: building a dict
    per row made a 1M-row rebuild take about 5 s.
    """
    rows = queries.files_after(ledger, after_rowid)
    with_hash = [row for row in rows if row[2] is not None]
    hashes = np.fromiter((row[2] for row in with_hash), dtype=np.int64,
                         count=len(with_hash)).view(np.uint64)
    keys = bytes.fromhex("".join(row[1] for row in with_hash))
    last = rows[-1] if rows else None
    mark = LedgerMark(len(rows), int(last[0]) if last else after_rowid,
                      last[1] if last else None)
    return mark, hashes, keys, len(rows)


class HashFile:
    """A read-only, memory-mapped view of the persistent hash file (see the module notes)."""

    def __init__(self, hashes: np.ndarray, keys: np.ndarray, mark: LedgerMark,
                 path: Path | None) -> None:
        self.hashes = hashes
        self.keys = keys
        self.mark = mark
        self.path = path  # None when the folder could not be written: an in-memory copy

    def __len__(self) -> int:
        return len(self.hashes)

    def nearest(self, phash: int, mirror: int | None, max_distance: int) -> list[NearMatch]:
        """Every indexed file within ``max_distance`` bits of the hash or mirror hash."""
        found = scan(self.hashes, phash, mirror, max_distance)
        return [NearMatch(self.keys[row].tobytes().hex(), distance, mirrored)
                for row, distance, mirrored in found]

    def candidates(self, turns: dict[str, int], max_distance: int,
                   crops: bool = True) -> list[tuple[str, int, str]]:
        """(sha256, distance, kind) for the second look (see :func:`scan_turns`)."""
        found = scan_turns(self.hashes, turns, max_distance,
                           crop_keep=CROP_KEEP if crops else 0)
        return [(self.keys[row].tobytes().hex(), d, kind) for row, d, kind in found]

    # -- opening -----------------------------------------------------------------------------
    @classmethod
    def open(cls, ledger: Ledger, path: Path) -> HashFile:
        """The hash file at ``path``, first brought into step with ``ledger`` if it is stale.

        Only the hash file is written; the ledger is only read. If the folder is read-only the
        hashes are read from the ledger into memory instead.
        """
        mark = ledger_mark(ledger)
        try:
            with _locked(path):
                refuse_link(path)  # a planted link is refused, never read or written through
                header = _read_header(path)
                if header is None or not _same(header, mark):
                    header = _update(ledger, path, header, mark)
                return cls._map(path, header)
        except OSError:
            _, hashes, keys, _ = _read_rows(ledger, 0)
            return cls(hashes, np.frombuffer(keys, dtype=np.uint8).reshape(-1, _KEY_SIZE),
                       mark, None)

    @classmethod
    def _map(cls, path: Path, header: _Header) -> HashFile:
        cap, n = header.capacity, header.entries
        if n == 0:
            return cls(np.zeros(0, np.uint64), np.zeros((0, _KEY_SIZE), np.uint8),
                       header.mark, path)
        hashes = np.memmap(path, dtype="<u8", mode="r", offset=_HEADER_SIZE, shape=(n,))
        keys = np.memmap(path, dtype=np.uint8, mode="r", offset=_HEADER_SIZE + 8 * cap,
                         shape=(n, _KEY_SIZE))
        return cls(hashes, keys, header.mark, path)


@dataclass(frozen=True)
class _Header:
    capacity: int
    entries: int
    mark: LedgerMark


def _same(header: _Header, mark: LedgerMark) -> bool:
    return header.mark == mark


def _read_header(path: Path) -> _Header | None:
    try:
        with path.open("rb") as fh:
            raw = fh.read(_HEADER.size)
    except FileNotFoundError:
        return None
    if len(raw) < _HEADER.size:
        return None
    magic, cap, n, rows, max_rowid, last = _HEADER.unpack(raw)
    if magic != _MAGIC or n > cap or path.stat().st_size < _HEADER_SIZE + cap * (8 + _KEY_SIZE):
        return None
    last_sha = last.hex() if any(last) else None
    return _Header(cap, n, LedgerMark(rows, max_rowid, last_sha))


def _pack(header: _Header) -> bytes:
    last = bytes.fromhex(header.mark.last_sha) if header.mark.last_sha else bytes(_KEY_SIZE)
    raw = _HEADER.pack(_MAGIC, header.capacity, header.entries, header.mark.rows,
                       header.mark.max_rowid, last)
    return raw.ljust(_HEADER_SIZE, b"\0")


def _update(ledger: Ledger, path: Path, header: _Header | None, mark: LedgerMark) -> _Header:
    """Append the ledger's new rows if the file is a prefix of the ledger, else rebuild."""
    if header is not None and header.mark.max_rowid <= mark.max_rowid:
        prefix_intact = header.mark.last_sha is None or queries.sha256_at_rowid(
            ledger, header.mark.max_rowid) == header.mark.last_sha
        if prefix_intact:
            new_mark, hashes, keys, added = _read_rows(ledger, header.mark.max_rowid)
            if (header.mark.rows + added == mark.rows and new_mark.max_rowid == mark.max_rowid
                    and header.entries + len(hashes) <= header.capacity):
                return _append(path, header, hashes, keys, mark)
    return _rebuild(ledger, path)


def _append(path: Path, header: _Header, hashes: np.ndarray, keys: bytes,
            mark: LedgerMark) -> _Header:
    n, cap = header.entries, header.capacity
    with os.fdopen(open_own_file(path, os.O_RDWR), "r+b") as fh:
        # Entries first, header last: a reader of the old header never sees the new rows.
        fh.seek(_HEADER_SIZE + 8 * n)
        fh.write(hashes.astype("<u8").tobytes())
        fh.seek(_HEADER_SIZE + 8 * cap + _KEY_SIZE * n)
        fh.write(keys)
        fh.flush()
        new = _Header(cap, n + len(hashes), mark)
        fh.seek(0)
        fh.write(_pack(new))
    return new


def _rebuild(ledger: Ledger, path: Path) -> _Header:
    mark, hashes, keys, _ = _read_rows(ledger, 0)
    n = len(hashes)
    cap = max(1024, -(-(n + n // 2) // 1024) * 1024)  # room to append half as many again
    header = _Header(cap, n, mark)
    fd, tmp = new_temp_file(path.parent, f"{path.name}.tmp-")  # O_EXCL: never through a link
    try:
        with os.fdopen(fd, "wb") as fh:
            fh.write(_pack(header))
            fh.write(hashes.astype("<u8").tobytes())
            fh.seek(_HEADER_SIZE + 8 * cap)
            fh.write(keys)
            fh.truncate(_HEADER_SIZE + cap * (8 + _KEY_SIZE))
        os.replace(tmp, path)
    finally:
        tmp.unlink(missing_ok=True)
    return header


@contextlib.contextmanager
def _locked(path: Path) -> Iterator[None]:
    """Hold an exclusive lock beside the hash file while it is checked and updated; the
    folder and the lock file are never reached through a link (refused)."""
    refuse_link(path.parent)
    path.parent.mkdir(parents=True, exist_ok=True)
    fd = open_own_file(path.with_name(path.name + ".lock"), os.O_RDWR | os.O_CREAT)
    with os.fdopen(fd, "r+b", buffering=0) as fh:
        lock_exclusive(fh, wait=True)
        yield
