"""Near-duplicate lookup over 64-bit perceptual hashes.

A brute-force scan with ``np.bitwise_count`` over every stored hash is exact and, measured on
this project's 2-core machine, takes about 0.6 ms per query for 1,000,000 hashes — faster than
any band index inside SQLite (15-60 ms). So the index is just two arrays: the hashes and the
sha256 each belongs to. Its guarantee: every stored hash within ``max_distance`` bits of the
query (or of the query's mirror-image hash) is found.

Crops are found through a third array, the window hashes of every stored picture
(:data:`collector.checks.phash.WINDOWS`, 16 a file; 0 where a file has none, e.g. one stored
before they were recorded): the closest few files with a window within
:data:`WINDOW_DISTANCE` bits of the query go to the second look as crop candidates. That scan
covers 16 hashes a file (about 13-20 ms at 1,000,000 files, bench/trace.py), so trace runs it
only when upright and mirrored copies found nothing; ingest runs it for every new file (its
lookup per file at 10,000 to 1,000,000 stored files: the last table of bench/ingest.py).
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

from collector.checks.phash import WINDOW_ALGO, WINDOWS, featureless, to_unsigned64
from collector.storage import queries
from collector.storage.file_locks import lock_exclusive
from collector.storage.ledger import Ledger
from collector.storage.safe_paths import (
    new_temp_file,
    open_own_file,
    refuse_link,
    remove_own_file,
)


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
# Window hashes (collector.checks.phash.WINDOWS): a crop to 80 % lies within 12 bits of its
# window in 97 % of bench/trace_quality.py's crops, an unrelated picture's closest window of
# 500 stored files 10 bits at the least; the second look decides. Our own values (common
# practice, no source).
WINDOW_DISTANCE = 12
WINDOW_KEEP = 8
N_WINDOWS = len(WINDOWS)
_WINDOW_CHUNK = 1 << 18  # hashes a pass: buffers of 2 MB, measured fastest (13 ms at 16M)


def scan_windows(windows: np.ndarray, phash: int, max_distance: int = WINDOW_DISTANCE,
                 keep: int = WINDOW_KEEP) -> list[tuple[int, int]]:
    """(row, distance) of the ``keep`` rows of ``windows`` (uint64, one row of
    :data:`N_WINDOWS` hashes a file, 0: none) with a window hash within ``max_distance`` bits
    of ``phash``, closest first. Exact: every window of every row is compared, in chunks so
    that no temporary grows with the index."""
    if not len(windows) or keep <= 0 or featureless(phash):
        return []
    flat = windows.reshape(-1)
    query = np.uint64(phash)
    size = min(len(flat), _WINDOW_CHUNK)
    buf = np.empty(size, np.uint64)
    counts = np.empty(size, np.uint8)
    near = np.empty(size, bool)
    best: dict[int, int] = {}
    for start in range(0, len(flat), _WINDOW_CHUNK):
        part = flat[start:start + _WINDOW_CHUNK]
        k = len(part)
        np.bitwise_xor(part, query, out=buf[:k])
        np.bitwise_count(buf[:k], out=counts[:k])
        np.less_equal(counts[:k], max_distance, out=near[:k])
        if not near[:k].any():
            continue
        for at in np.flatnonzero(near[:k]).tolist():
            if int(part[at]) == 0:  # no window hash recorded
                continue
            row, d = (start + at) // N_WINDOWS, int(counts[at])
            if d < best.get(row, 65):
                best[row] = d
    return sorted(best.items(), key=lambda f: (f[1], f[0]))[:keep]


# Up to this many hashes x turns are compared in one pass; a larger index is scanned one turn
# at a time, which is as fast from about 1,000 stored hashes on (measured: 21 against 35 us at
# 150 hashes, even at 1,000). Our own value (common practice, no source).
_TURNS_AT_ONCE = 1 << 13


def _turn_distances(hashes: np.ndarray, turns: dict[str, int], max_distance: int,
                    ) -> Iterator[tuple[str, np.ndarray, list[int]]]:
    """For each turn in order: its name, every stored hash's distance to it and the rows
    within ``max_distance``, ascending. A small index is compared with all turns in one
    pass (the same distances and rows, fewer calls: the first files of every collection)."""
    if len(hashes) * len(turns) > _TURNS_AT_ONCE:
        for turn, query in turns.items():
            distances = np.bitwise_count(hashes ^ np.uint64(query))
            yield turn, distances, np.flatnonzero(distances <= max_distance).tolist()
        return
    queries = np.array(list(turns.values()), dtype=np.uint64)
    together = np.bitwise_count(hashes[None, :] ^ queries[:, None])
    rows: list[list[int]] = [[] for _ in turns]
    for at, row in zip(*(i.tolist() for i in np.nonzero(together <= max_distance)),
                       strict=True):
        rows[at].append(row)
    for at, turn in enumerate(turns):
        yield turn, together[at], rows[at]


def scan_turns(hashes: np.ndarray, turns: dict[str, int], max_distance: int,
               crop_distance: int = CROP_DISTANCE, crop_keep: int = CROP_KEEP,
               windows: np.ndarray | None = None,
               window_keep: int = WINDOW_KEEP) -> list[tuple[int, int, str]]:
    """Candidates for the second look, as (row, distance, kind): every row within
    ``max_distance`` of one of the query's turned hashes (``turns``: some or all of the 8 of
    collector.checks.phash.TURNS; kind: the turn, closest first), then as kind "crop" the
    ``window_keep`` closest rows by window hash (:func:`scan_windows`, when ``windows`` is
    given) and the ``crop_keep`` closest rows within
    ``crop_distance`` of the upright hash, each row once.

    One XOR and popcount pass per turn over every stored hash (about 0.5 ms per pass at
    1,000,000 hashes, bench/trace.py)."""
    if not len(hashes) or featureless(turns["same"]):
        return []
    best: dict[int, tuple[int, str]] = {}
    loose = np.zeros(0, dtype=np.intp)
    upright = None
    for turn, distances, rows in _turn_distances(hashes, turns, max_distance):
        for row in rows:
            d = int(distances[row])
            if row not in best or d < best[row][0]:
                best[row] = (d, turn)
        if turn == "same" and crop_keep > 0:
            upright = distances
            loose = np.flatnonzero((distances > max_distance) & (distances <= crop_distance))
    near = sorted(((row, d, turn) for row, (d, turn) in best.items()),
                  key=lambda f: (f[1], f[2] != "same", f[0]))
    taken = set(best)
    if windows is not None and "same" in turns and window_keep > 0:
        for row, d in scan_windows(windows, turns["same"], keep=window_keep):
            if row not in taken:
                taken.add(row)
                near.append((row, d, "crop"))
    if upright is None or not len(loose) or crop_keep <= 0:
        return near
    if len(loose) > crop_keep:  # the closest few, without sorting every loose row
        loose = loose[np.argpartition(upright[loose], crop_keep)[:crop_keep]]
    crops = sorted((int(upright[row]), int(row)) for row in loose if int(row) not in taken)
    return near + [(row, d, "crop") for d, row in crops]


@dataclass(frozen=True)
class NearMatch:
    """A stored file whose hash is close to the query."""

    sha256: str
    distance: int
    mirrored: bool


def _crop_keeps(crops: bool, loose: bool) -> tuple[int, int]:
    """(crop_keep, window_keep) of :func:`scan_turns` for a lookup with or without crops, and
    with or without the loose-radius crop candidates (each costs a second look that decodes
    a stored file: ingest asks only the window candidates, trace both)."""
    if not crops:
        return 0, 0
    return (CROP_KEEP if loose else 0), WINDOW_KEEP


def window_rows(raw: list[bytes | None]) -> np.ndarray:
    """Packed window hashes (collector.checks.phash.pack_windows; None or damaged: zeros)
    as an (n, N_WINDOWS) uint64 array."""
    size = 8 * N_WINDOWS
    blob = b"".join(r if r is not None and len(r) == size else bytes(size) for r in raw)
    return np.frombuffer(blob, dtype="<u8").astype(np.uint64).reshape(len(raw), N_WINDOWS)


class HashIndex:
    """Append-only in-memory index of (sha256, perceptual hash, window hashes); thread-safe."""

    def __init__(self) -> None:
        self._hashes = np.zeros(1024, dtype=np.uint64)
        self._windows = np.zeros((1024, N_WINDOWS), dtype=np.uint64)
        self._count = 0
        self._keys: list[str | None] = []  # None: removed
        self._lock = threading.Lock()

    def __len__(self) -> int:
        return self._count

    @classmethod
    def from_ledger(cls, ledger: Ledger) -> HashIndex:
        """Load every stored file's hash from the ledger."""
        rows = queries.stored_phashes(ledger, WINDOW_ALGO)
        index, n = cls(), len(rows)
        if n > len(index._hashes):
            index._hashes = np.zeros(n, dtype=np.uint64)
            index._windows = np.zeros((n, N_WINDOWS), dtype=np.uint64)
        index._hashes[:n] = np.fromiter((to_unsigned64(r[1]) for r in rows), np.uint64, n)
        index._windows[:n] = window_rows([r[2] for r in rows])
        index._keys = [r[0] for r in rows]
        index._count = n
        return index

    def add(self, sha256: str, phash: int, windows: np.ndarray | list[int] | None = None,
            ) -> None:
        """Add one stored file's hash (unsigned 64-bit) and its window hashes, if any."""
        with self._lock:
            if self._count == len(self._hashes):
                self._hashes = np.concatenate([self._hashes, np.zeros_like(self._hashes)])
                self._windows = np.concatenate([self._windows, np.zeros_like(self._windows)])
            self._hashes[self._count] = np.uint64(phash)
            if windows is not None and len(windows) == N_WINDOWS:
                self._windows[self._count] = np.asarray(windows, dtype=np.uint64)
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
                   crops: bool = True, loose: bool = True) -> list[tuple[str, int, str]]:
        """(sha256, distance, kind) for the second look (see :func:`scan_turns`)."""
        crop_keep, window_keep = _crop_keeps(crops, loose)
        with self._lock:
            hashes = self._hashes[: self._count]
            keys = self._keys
            found = scan_turns(hashes, turns, max_distance, crop_keep=crop_keep,
                               windows=self._windows[: self._count], window_keep=window_keep)
            return [(key, d, kind) for row, d, kind in found if (key := keys[row]) is not None]


# --- the persistent hash file ---------------------------------------------------------------
# One file in the collection's cache folder (Collection.hash_index_path), memory-mapped by
# readers (little-endian):
#   header (128 bytes): magic, capacity, entries, ledger_rows, max_rowid, last_sha (32 raw
#                       bytes), generation (the ledger's HASH_GENERATION fact; 0 when unset)
#   hashes:  capacity x uint64 at offset 128            (the pHash of each entry)
#   keys:    capacity x 32 bytes after the hashes        (the raw sha256 of each entry)
#   windows: capacity x 16 x uint64 after the keys       (the window hashes; 0: none)
# ``ledger_rows``/``max_rowid``/``last_sha`` describe the files table the entries were read
# from, so a reader can tell in three indexed queries whether the file is in step with the
# ledger. New ledger rows are appended in place while there is capacity; anything else (rows
# deleted by crash recovery, a replaced ledger, a full file, hashes rewritten in place by
# ``collector remeasure``, which raises the generation in the same transaction) rebuilds the
# file and swaps it in with os.replace, so a reader always maps either the old or the new
# file, never a mixture. A file written before the generation existed reads it as 0 (the
# header's padding is zero), the value of a ledger whose hashes were never rewritten.
_MAGIC = b"CLPHX002"  # 002: the window hashes (a 001 file is rebuilt)
_HEADER = struct.Struct("<8sQQQq32sq")
# The ledger_facts row that counts rewrites of stored hashes (see note_hashes_rewritten).
HASH_GENERATION = "hash_generation"
_HEADER_SIZE = 128
_KEY_SIZE = 32
_ENTRY_SIZE = 8 + _KEY_SIZE + 8 * N_WINDOWS


@dataclass(frozen=True)
class LedgerMark:
    """Where the files table stands: row count, highest rowid and that row's sha256."""

    rows: int
    max_rowid: int
    last_sha: str | None
    generation: int = 0  # how often stored hashes were rewritten in place


def hash_generation(ledger: Ledger) -> int:
    """How often stored hashes were rewritten in place (0: never, or an older ledger)."""
    value = ledger.fact(HASH_GENERATION)
    return int(value) if value and value.isdigit() else 0


def note_hashes_rewritten(ledger: Ledger) -> None:
    """Record that stored hashes were changed in place (call inside the transaction that
    changes them): every hash file made before is then stale and rebuilt when next opened."""
    ledger.set_fact(HASH_GENERATION, str(hash_generation(ledger) + 1))


def ledger_mark(ledger: Ledger) -> LedgerMark:
    """Read the files table's mark (count, max rowid, sha256 at that rowid, generation);
    the generation is read first, so a rewrite committed meanwhile leaves the mark stale."""
    generation = hash_generation(ledger)
    return LedgerMark(*queries.files_mark(ledger), generation)


@dataclass(frozen=True)
class _Rows:
    """Files rows read from the ledger: the mark of the last row read, the hashes, keys and
    window hashes of the rows with a pHash, and how many rows were read."""

    mark: LedgerMark
    hashes: np.ndarray
    keys: bytes
    windows: np.ndarray
    read: int


def _read_rows(ledger: Ledger, after_rowid: int) -> _Rows:
    """Files rows with rowid > ``after_rowid``. Rows without a pHash are counted but not
    indexed. Read as plain tuples: building a dict per row made a 1M-row rebuild take about
    5 s."""
    generation = hash_generation(ledger)  # before the rows: see ledger_mark
    rows = queries.files_after(ledger, after_rowid, WINDOW_ALGO)
    with_hash = [row for row in rows if row[2] is not None]
    hashes = np.fromiter((row[2] for row in with_hash), dtype=np.int64,
                         count=len(with_hash)).view(np.uint64)
    keys = bytes.fromhex("".join(row[1] for row in with_hash))
    last = rows[-1] if rows else None
    mark = LedgerMark(len(rows), int(last[0]) if last else after_rowid,
                      last[1] if last else None, generation)
    return _Rows(mark, hashes, keys, window_rows([row[3] for row in with_hash]), len(rows))


class HashFile:
    """A read-only, memory-mapped view of the persistent hash file (see the module notes)."""

    def __init__(self, hashes: np.ndarray, keys: np.ndarray, mark: LedgerMark,
                 path: Path | None, windows: np.ndarray | None = None) -> None:
        self.hashes = hashes
        self.keys = keys
        self.windows = (windows if windows is not None
                        else np.zeros((len(hashes), N_WINDOWS), np.uint64))
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
                   crops: bool = True, loose: bool = True) -> list[tuple[str, int, str]]:
        """(sha256, distance, kind) for the second look (see :func:`scan_turns`)."""
        crop_keep, window_keep = _crop_keeps(crops, loose)
        found = scan_turns(self.hashes, turns, max_distance, crop_keep=crop_keep,
                           windows=self.windows, window_keep=window_keep)
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
            read = _read_rows(ledger, 0)
            return cls(read.hashes,
                       np.frombuffer(read.keys, dtype=np.uint8).reshape(-1, _KEY_SIZE),
                       mark, None, read.windows)

    @classmethod
    def _map(cls, path: Path, header: _Header) -> HashFile:
        cap, n = header.capacity, header.entries
        if n == 0:
            return cls(np.zeros(0, np.uint64), np.zeros((0, _KEY_SIZE), np.uint8),
                       header.mark, path)
        hashes = np.memmap(path, dtype="<u8", mode="r", offset=_HEADER_SIZE, shape=(n,))
        keys = np.memmap(path, dtype=np.uint8, mode="r", offset=_HEADER_SIZE + 8 * cap,
                         shape=(n, _KEY_SIZE))
        windows = np.memmap(path, dtype="<u8", mode="r",
                            offset=_HEADER_SIZE + (8 + _KEY_SIZE) * cap, shape=(n, N_WINDOWS))
        return cls(hashes, keys, header.mark, path, windows)


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
    magic, cap, n, rows, max_rowid, last, generation = _HEADER.unpack(raw)
    if magic != _MAGIC or n > cap or path.stat().st_size < _HEADER_SIZE + cap * _ENTRY_SIZE:
        return None
    last_sha = last.hex() if any(last) else None
    return _Header(cap, n, LedgerMark(rows, max_rowid, last_sha, generation))


def _pack(header: _Header) -> bytes:
    last = bytes.fromhex(header.mark.last_sha) if header.mark.last_sha else bytes(_KEY_SIZE)
    raw = _HEADER.pack(_MAGIC, header.capacity, header.entries, header.mark.rows,
                       header.mark.max_rowid, last, header.mark.generation)
    return raw.ljust(_HEADER_SIZE, b"\0")


def _update(ledger: Ledger, path: Path, header: _Header | None, mark: LedgerMark) -> _Header:
    """Append the ledger's new rows if the file is a prefix of the ledger, else rebuild."""
    if (header is not None and header.mark.max_rowid <= mark.max_rowid
            and header.mark.generation == mark.generation):
        prefix_intact = header.mark.last_sha is None or queries.sha256_at_rowid(
            ledger, header.mark.max_rowid) == header.mark.last_sha
        if prefix_intact:
            read = _read_rows(ledger, header.mark.max_rowid)
            if (header.mark.rows + read.read == mark.rows
                    and read.mark.max_rowid == mark.max_rowid
                    and header.entries + len(read.hashes) <= header.capacity):
                return _append(path, header, read, mark)
    return _rebuild(ledger, path)


def _append(path: Path, header: _Header, read: _Rows, mark: LedgerMark) -> _Header:
    n, cap = header.entries, header.capacity
    with os.fdopen(open_own_file(path, os.O_RDWR), "r+b") as fh:
        # Entries first, header last: a reader of the old header never sees the new rows.
        fh.seek(_HEADER_SIZE + 8 * n)
        fh.write(read.hashes.astype("<u8").tobytes())
        fh.seek(_HEADER_SIZE + 8 * cap + _KEY_SIZE * n)
        fh.write(read.keys)
        fh.seek(_HEADER_SIZE + (8 + _KEY_SIZE) * cap + 8 * N_WINDOWS * n)
        fh.write(read.windows.astype("<u8").tobytes())
        fh.flush()
        new = _Header(cap, n + len(read.hashes), mark)
        fh.seek(0)
        fh.write(_pack(new))
    return new


def _rebuild(ledger: Ledger, path: Path) -> _Header:
    read = _read_rows(ledger, 0)
    n = len(read.hashes)
    cap = max(1024, -(-(n + n // 2) // 1024) * 1024)  # room to append half as many again
    header = _Header(cap, n, read.mark)
    fd, tmp = new_temp_file(path.parent, f"{path.name}.tmp-")  # O_EXCL: never through a link
    try:
        with os.fdopen(fd, "wb") as fh:
            fh.write(_pack(header))
            fh.write(read.hashes.astype("<u8").tobytes())
            fh.seek(_HEADER_SIZE + 8 * cap)
            fh.write(read.keys)
            fh.seek(_HEADER_SIZE + (8 + _KEY_SIZE) * cap)
            fh.write(read.windows.astype("<u8").tobytes())
            fh.truncate(_HEADER_SIZE + cap * _ENTRY_SIZE)
        os.replace(tmp, path)
    finally:
        tmp.unlink(missing_ok=True)
    return header


def discard_hash_file(path: Path) -> None:
    """Remove the hash file, so that the next :meth:`HashFile.open` rebuilds it from the
    ledger. Call it after changing the hashes of files rows already stored (window hashes
    filled in for files stored before there were any): the file is kept in step by the files
    table's mark (count, highest rowid, its sha256), which an update of a row does not move."""
    with _locked(path):
        remove_own_file(path)


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
