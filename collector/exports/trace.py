"""``collector trace``: where did this file come from, and may I use it?

A file is traced by its content, never its name:

1. **Exact**: the sha256 of its bytes is the ``files`` primary key; the answer is the full
   provenance record of the item that stored it (source, pages, licence, the successful image
   fetch with its robots.txt verdict, flags) plus every other item that brought the same bytes,
   and for a crop the scan it was cut from and the box.
2. **Near**: otherwise its perceptual hash, for each of the 8 ways to turn or flip a picture
   (:func:`collector.checks.likeness.look_at_file`), is compared with every stored hash in the
   memory-mapped hash file (:class:`collector.storage.hashindex.HashFile`): upright and
   mirrored first, the rotations and loose crop candidates only when nothing is confirmed.
   The scan is brute force, so every stored file within the threshold is found; each
   candidate must then pass the second look (:func:`collector.checks.likeness.confirm`:
   thumbnail and detail correlation, or the crop-box search). A near match is worded as
   *probably* a copy (resized/re-encoded, mirrored, rotated, cropped), never as certain.
3. **None**: said plainly; a blank picture is never compared by look.
4. **unreadable** (with why) and **not_a_file** (FIFO, socket, broken link, link loop, link
   to a folder): every path given or found in a folder gets a state, none is left out.

The ledger is opened read-only, so tracing works while a gather runs. Licence facts are as
declared by the sources; this module says what the ledger recorded, not what the law allows.
How the results are shown (records, tables, CSV, JSON, attribution lines) is
:mod:`collector.exports.trace_format`.
"""

from __future__ import annotations

import errno
import hashlib
import os
import stat
import struct
from collections.abc import Iterable, Iterator
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from collector.checks.formats import sniff_format
from collector.checks.licences import licence_allowed, licence_deed_url
from collector.checks.likeness import Look, find_copies, look_at_file
from collector.checks.rights_statements import STATEMENTS
from collector.errors import CollectorError
from collector.exports.trace_format import attribution_line, recovered_words
from collector.safe_text import NOT_UNICODE
from collector.storage import queries, upkeep_queries
from collector.storage.collection import Collection, open_collection
from collector.storage.hashindex import HashFile, NearMatch
from collector.storage.ledger import Ledger, decode_row
from collector.storage.ledger_repair import RECOVERED_FLAG
from collector.storage.withdrawals import describe as describe_withdrawal

__all__ = [
    "DEFAULT_NEAR_DISTANCE",
    "IMAGE_EXTENSIONS",
    "PERSONAL_DATA_FLAGS",
    "FetchFacts",
    "FileRecord",
    "ItemRecord",
    "NearCandidate",
    "TraceInputError",
    "TraceResult",
    "Tracer",
    "collect_targets",
    "iter_image_files",
    "not_a_file",
    "sha256_file",
]

# libraries.md section 2: a threshold of 8 found every resized, re-encoded, brightened and
# (through the mirror hash) flipped copy, while no unrelated pair came closer than 14 bits.
DEFAULT_NEAR_DISTANCE = 8
# Flags set by collector.checks.images that point at a person (GPS, device serial, owner name).
PERSONAL_DATA_FLAGS = frozenset({"gps", "camera_serial", "owner_name"})
IMAGE_EXTENSIONS = frozenset({".jpg", ".jpeg", ".jpe", ".png", ".gif", ".webp", ".tif",
                              ".tiff", ".bmp"})
_CHUNK = 1 << 20
# What Pillow raises on a file it cannot decode (the same set collector.checks.images handles).
_DECODE_ERRORS = (OSError, SyntaxError, ValueError, EOFError, IndexError, TypeError,
                  struct.error)


class TraceInputError(CollectorError):
    """A path given to trace does not exist or holds nothing to trace (usage error)."""

    exit_code = 2


# --- records ---------------------------------------------------------------------------------
@dataclass
class FetchFacts:
    """The successful image download of an item (a ``fetches`` row)."""

    url: str | None
    status: int | None
    fetched_at: str | None
    etag: str | None
    last_modified: str | None
    robots_verdict: str | None
    robots_rule: str | None
    run_id: int | None


@dataclass
class ItemRecord:
    """One ledger item that brought a file: where it was listed and under which licence."""

    item_id: int
    source: str | None
    source_kind: str | None
    source_key: str
    state: str
    page_url: str | None
    image_url: str | None
    title: str | None
    creator: str | None
    licence_raw: str | None
    licence_url: str | None
    spdx_id: str | None
    deed_url: str | None
    date: str | None
    run_id: int | None
    local_path: str | None
    fetch: FetchFacts | None = None
    parent_sha256: str | None = None
    crop_box: list[int] | None = None
    scan: ItemRecord | None = None  # for a crop: the item of the scan it was cut from
    near_of: int | None = None  # the ledger's own near-duplicate note: the earlier item
    near_distance: int | None = None
    rights_statement: str | None = None  # RightsStatements.org id, when no SPDX licence
    size_request: dict[str, Any] | None = None  # how the image size was negotiated
    reservation_checks: str | None = None  # the mechanisms checked (collector.run.reservations)
    not_unicode: list[str] = field(default_factory=list)  # fields that held invalid text


@dataclass
class FileRecord:
    """A stored file and the items that brought it (the first one is the origin)."""

    sha256: str
    size: int | None
    format: str | None
    width: int | None
    height: int | None
    stored_at: str | None
    stored_path: str | None
    flags: list[str]
    copyright: str | None
    origin: ItemRecord | None
    others: list[ItemRecord] = field(default_factory=list)
    withdrawn: str | None = None  # "withdrawn on <date>: <reason>" while a withdrawal holds
    set_aside: str | None = None  # why a pixel rule sets the file aside (files.set_aside_detail)


@dataclass
class NearCandidate:
    """A stored file whose perceptual hash is close to the query's, confirmed by the second
    look (collector.checks.likeness): ``how`` is "same" (resized/re-encoded), a turn of
    collector.checks.phash.TURNS ("mirror", "rotate90", "rotate90+mirror", ...) or "crop"."""

    distance: int
    mirrored: bool
    file: FileRecord
    how: str = "same"
    score: float | None = None  # the second look's thumbnail correlation


@dataclass
class TraceResult:
    """What trace found for one file."""

    path: str
    sha256: str | None
    kind: str  # exact | near | none | unreadable | not_a_file
    file: FileRecord | None = None
    near: list[NearCandidate] = field(default_factory=list)
    allowed: str = "unknown"  # yes | no | unknown (against the recipe's allowlist)
    attribution: str | None = None
    note: str | None = None  # why no perceptual hash, why unreadable, what it is instead
    threshold: int = DEFAULT_NEAR_DISTANCE
    listed: bool = False  # found by walking a folder (shown in the table)

    @property
    def best(self) -> FileRecord | None:
        """The matched stored file: the exact one, or the closest near one."""
        if self.file is not None:
            return self.file
        return self.near[0].file if self.near else None

    @property
    def distance(self) -> int | None:
        """Hamming distance of the match (0 for exact, None without a match)."""
        if self.kind == "exact":
            return 0
        return self.near[0].distance if self.near else None

    @property
    def item(self) -> ItemRecord | None:
        """The origin item of the matched file."""
        best = self.best
        return best.origin if best else None

    @property
    def flags(self) -> list[str]:
        """Flags of the matched file (GPS, camera serial, licence conflict...)."""
        best = self.best
        return list(best.flags) if best else []

    @property
    def personal_data(self) -> bool:
        """Whether the matched file carries a personal-data flag."""
        return any(f in PERSONAL_DATA_FLAGS for f in self.flags)


# --- helpers -----------------------------------------------------------------------------------
def sha256_file(path: Path) -> str:
    """The sha256 hex digest of a file's bytes (FIPS 180-4), read in 1 MiB chunks."""
    digest = hashlib.sha256()
    with path.open("rb") as fh:
        while chunk := fh.read(_CHUNK):
            digest.update(chunk)
    return digest.hexdigest()


def _not_unicode(metadata: Any) -> list[str]:
    """The fields of an item that held text that was not valid Unicode (its metadata's
    ``invalid_unicode`` list, written where candidates enter), or none."""
    named = metadata.get(NOT_UNICODE) if isinstance(metadata, dict) else None
    return [str(name) for name in named] if isinstance(named, list) else []


def _looks_like_image(path: Path) -> bool:
    # is_file() reads the file type without opening: a FIFO would block the open.
    if not path.is_file():
        return False
    if path.suffix.lower() in IMAGE_EXTENSIONS:
        return True  # traced even when its bytes are broken: it shows up as unreadable
    try:
        with path.open("rb") as fh:
            return sniff_format(fh.read(16)) is not None
    except OSError:
        return True  # cannot be read: listed, and trace says why


def iter_image_files(folder: Path) -> Iterator[Path]:
    """Every entry below ``folder`` trace reports on (recursive, sorted, hidden folders
    skipped): files with an image extension or image magic bytes (standards.md section 9),
    and every entry that is not a regular file (FIFO, socket, device, broken link, link loop,
    link to a folder), so that none is silently left out. Links to folders are not followed,
    so a link loop cannot make the walk endless."""
    for dirpath, dirnames, filenames in os.walk(folder):
        linked = sorted(d for d in dirnames if (Path(dirpath) / d).is_symlink())
        dirnames[:] = sorted(d for d in dirnames if not d.startswith(".") and d not in linked)
        for name in sorted([*filenames, *linked]):
            path = Path(dirpath) / name
            if _looks_like_image(path) or not path.is_file():
                yield path


def collect_targets(paths: Iterable[Path]) -> list[tuple[Path, bool]]:
    """Expand the command's arguments into (path, came_from_a_folder) pairs. A path that is
    not a regular file (FIFO, socket, broken link) is kept: trace reports it as not_a_file.

    Raises TraceInputError for a missing path or a folder without images.
    """
    targets: list[tuple[Path, bool]] = []
    for path in paths:
        if path.is_dir():
            found = list(iter_image_files(path))
            if not found:
                raise TraceInputError(f"{path} holds no image files (looked for "
                                      f"{', '.join(sorted(IMAGE_EXTENSIONS))} with image "
                                      "signatures); give an image file or a folder of images")
            targets.extend((p, True) for p in found)
        elif path.exists() or path.is_symlink():
            targets.append((path, False))
        else:
            raise TraceInputError(f"{path} does not exist; give an image file or a folder")
    return targets


def not_a_file(path: Path) -> str | None:
    """Why ``path`` is not a regular file to trace (None when it is one)."""
    try:
        st = path.lstat()
    except OSError as exc:
        return f"cannot be read ({exc.strerror})"
    if stat.S_ISLNK(st.st_mode):
        try:
            target = path.stat()
        except OSError as exc:
            loop = exc.errno == errno.ELOOP
            return "a symbolic link loop" if loop else "a broken symbolic link"
        if stat.S_ISDIR(target.st_mode):
            return "a symbolic link to a folder (not followed)"
        st = target
    if stat.S_ISREG(st.st_mode):
        return None
    for test, words in ((stat.S_ISFIFO, "a FIFO (named pipe)"), (stat.S_ISSOCK, "a socket"),
                        (stat.S_ISDIR, "a folder"), (stat.S_ISCHR, "a device"),
                        (stat.S_ISBLK, "a device")):
        if test(st.st_mode):
            return words
    return "not a regular file"


# --- the tracer --------------------------------------------------------------------------------
class Tracer:
    """Traces files against one collection; open with :meth:`open`, use as a context manager.

    ``near_distance`` and ``allow`` come from the recipe when it loads; otherwise the threshold
    is :data:`DEFAULT_NEAR_DISTANCE` and the allowlist verdict is "unknown".
    """

    def __init__(self, collection: Collection, ledger: Ledger, hashes: HashFile, *,
                 near_distance: int = DEFAULT_NEAR_DISTANCE,
                 allow: list[str] | None = None, allow_unknown: bool = False,
                 recipe_problem: str | None = None) -> None:
        self.collection = collection
        self.ledger = ledger
        self.hashes = hashes
        self.near_distance = near_distance
        self.allow = allow
        self.allow_unknown = allow_unknown
        self.recipe_problem = recipe_problem
        self._sources: dict[int, tuple[str, str]] | None = None
        self._looks: dict[str, Look | None] = {}

    @classmethod
    def open(cls, root: Path, *, near_distance: int | None = None) -> Tracer:
        """Open a collection read-only and its hash file (rebuilt or extended if stale)."""
        collection = open_collection(root)
        allow: list[str] | None = None
        allow_unknown = False
        problem: str | None = None
        threshold = DEFAULT_NEAR_DISTANCE
        try:
            recipe = collection.recipe(check_source_kinds=False)  # only its rules are used
            threshold = recipe.images.near_distance
            allow = list(recipe.licences.allow)
            allow_unknown = recipe.licences.allow_unknown
        except CollectorError as exc:
            problem = str(exc)
        ledger = collection.ledger(readonly=True)
        try:
            collection.ensure_cache_dir()
            hashes = HashFile.open(ledger, collection.hash_index_path)
        except BaseException:
            ledger.close()
            raise
        return cls(collection, ledger, hashes,
                   near_distance=threshold if near_distance is None else near_distance,
                   allow=allow, allow_unknown=allow_unknown, recipe_problem=problem)

    def close(self) -> None:
        """Close the ledger."""
        self.ledger.close()

    def __enter__(self) -> Tracer:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    # -- lookups ----------------------------------------------------------------------------
    def lookup_exact(self, sha256: str) -> FileRecord | None:
        """The stored file with this sha256 and every item that brought it, or None."""
        row = self.ledger.file(sha256)
        if row is None:
            return None
        items = [self._item(r) for r in queries.items_of_file(self.ledger, sha256)]
        origin = next((i for i in items if i.item_id == row.get("first_item_id")),
                      items[0] if items else None)
        rights = row.get("rights") or {}
        notice = next((str(rights[k]) for k in ("exif_copyright", "iptc_copyright")
                       if isinstance(rights, dict) and rights.get(k)), None)
        stored = self.collection.store.find(sha256)
        return FileRecord(
            sha256=sha256, size=row.get("size"), format=row.get("format"),
            width=row.get("width"), height=row.get("height"), stored_at=row.get("stored_at"),
            stored_path=str(stored) if stored else None, flags=list(row.get("flags") or []),
            copyright=notice, origin=origin,
            others=[i for i in items if i is not origin], withdrawn=self._withdrawn(sha256),
            set_aside=f'pixel rule "{row["set_aside"]}": {row.get("set_aside_detail") or "?"}'
            if row.get("set_aside") else None)

    def _withdrawn(self, sha256: str) -> str | None:
        found = upkeep_queries.active_withdrawal_of_file(self.ledger, sha256)
        return describe_withdrawal(found) if found is not None else None

    def lookup_near(self, phash: int, mirror: int | None) -> list[NearMatch]:
        """Stored files within the threshold of the hash or the mirror hash, closest first."""
        return self.hashes.nearest(phash, mirror, self.near_distance)

    def allowed(self, spdx_id: str | None, statement: str | None = None) -> str:
        """'yes' / 'no' against the recipe's allowlist; 'unknown' without a licence or recipe.
        A RightsStatements.org statement is decided by its ``rs:<id>`` entry."""
        known = STATEMENTS.get(statement or "") if not spdx_id else None
        if self.allow is None or not (spdx_id or known):
            return "unknown"
        ok, reason = licence_allowed(spdx_id, self.allow, self.allow_unknown, known)
        if ok:
            return "yes"
        return "unknown" if reason == "licence_unknown" else "no"

    def trace_file(self, path: Path, *, listed: bool = False) -> TraceResult:
        """Trace one path: exact by sha256, else near by perceptual hash confirmed by a
        second look, else none; ``not_a_file`` and ``unreadable`` say why instead."""
        why_not = not_a_file(path)
        if why_not is not None:
            return TraceResult(str(path), None, "not_a_file", threshold=self.near_distance,
                               listed=listed, note=why_not)
        try:
            sha = sha256_file(path)
        except OSError as exc:
            return TraceResult(str(path), None, "unreadable", threshold=self.near_distance,
                               listed=listed, note=f"cannot be read ({exc.strerror or exc})")
        result = TraceResult(str(path), sha, "none", threshold=self.near_distance,
                             listed=listed)
        exact = self.lookup_exact(sha)
        if exact is not None:
            result.kind, result.file = "exact", exact
        else:
            self._trace_near(path, result)
        best = result.best
        if best is not None:
            origin = best.origin
            result.allowed = self.allowed(origin.spdx_id if origin else None,
                                          origin.rights_statement if origin else None)
            result.attribution = attribution_line(origin, modified=result.kind == "near",
                                                  copyright_notice=best.copyright)
            if origin is None and RECOVERED_FLAG in best.flags:
                result.attribution = f"No attribution: {recovered_words(best)}."
        return result

    def _trace_near(self, path: Path, result: TraceResult) -> None:
        """Candidates by pHash (8 turns, loose for crops), kept only if the second look
        (collector.checks.likeness) agrees."""
        from PIL import Image

        try:
            look = look_at_file(path)
        except (*_DECODE_ERRORS, Image.DecompressionBombError) as exc:
            result.kind = "unreadable"
            result.note = f"not a readable image ({type(exc).__name__}: {exc})"
            return
        if not look.comparable:
            result.note = ("its picture is blank or too plain (a flat fill or a smooth "
                           "gradient) to compare by look, and no stored file has these bytes")
            return
        def candidates(turns: dict[str, int], crops: bool) -> list[tuple[str, int, str]]:
            return self.hashes.candidates(turns, self.near_distance, crops)

        for found in find_copies(look, candidates, self._stored_look):
            record = self.lookup_exact(found.key)
            if record is not None:
                result.near.append(NearCandidate(found.distance, "mirror" in found.kind,
                                                 record, found.kind, found.score))
        if result.near:
            result.kind = "near"

    def _stored_look(self, sha256: str) -> Look | None:
        """The second-look picture of a stored file (None: missing or unreadable)."""
        from PIL import Image

        if sha256 not in self._looks:
            stored = self.collection.store.find(sha256)
            try:
                self._looks[sha256] = look_at_file(stored) if stored else None
            except (*_DECODE_ERRORS, Image.DecompressionBombError):  # damaged: not confirmed
                self._looks[sha256] = None
        return self._looks[sha256]

    def trace_all(self, targets: Iterable[tuple[Path, bool]]) -> Iterator[TraceResult]:
        """Trace each (path, listed) pair in turn."""
        for path, listed in targets:
            yield self.trace_file(path, listed=listed)

    # -- ledger rows -------------------------------------------------------------------------
    def _source(self, source_id: int | None) -> tuple[str | None, str | None]:
        if self._sources is None:
            self._sources = queries.source_names(self.ledger)
        return self._sources.get(source_id, (None, None)) if source_id is not None else (
            None, None)

    def _fetch(self, item_id: int) -> FetchFacts | None:
        r = queries.last_image_fetch(self.ledger, item_id)
        if r is None:
            return None
        return FetchFacts(url=r.url, status=r.status, fetched_at=r.fetched_at, etag=r.etag,
                          last_modified=r.last_modified, robots_verdict=r.robots_verdict,
                          robots_rule=r.robots_rule, run_id=r.run_id)

    def _item(self, raw: dict[str, Any], *, with_scan: bool = True) -> ItemRecord:
        row = decode_row(raw) or {}
        name, kind = self._source(row.get("source_id"))
        box = row.get("crop_box")
        item = ItemRecord(
            item_id=row["id"], source=name, source_kind=kind, source_key=row["source_key"],
            state=row["state"], page_url=row.get("page_url"), image_url=row.get("image_url"),
            title=row.get("title"), creator=row.get("creator"),
            licence_raw=row.get("licence_raw"), licence_url=row.get("licence_url"),
            spdx_id=row.get("spdx_id"), deed_url=licence_deed_url(row.get("spdx_id")),
            date=row.get("date"), run_id=row.get("run_id"), local_path=row.get("local_path"),
            rights_statement=row.get("rights_statement"),
            size_request=row.get("size_request") if isinstance(row.get("size_request"), dict)
            else None,
            fetch=self._fetch(row["id"]), parent_sha256=row.get("parent_sha256"),
            crop_box=list(box) if isinstance(box, list) else None,
            near_of=row.get("duplicate_of") if row.get("state") == "near_duplicate" else None,
            near_distance=row.get("near_distance"),
            reservation_checks=row.get("reservation_checks"),
            not_unicode=_not_unicode(row.get("metadata")))
        if with_scan and item.parent_sha256:
            scans = queries.items_of_file(self.ledger, item.parent_sha256, limit=1)
            if scans:
                item.scan = self._item(scans[0], with_scan=False)
        return item


