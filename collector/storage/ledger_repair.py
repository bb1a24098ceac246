"""Ledger backups and the two ways back from a lost ledger.

- :func:`backup_ledger`: at the end of every gather run the ledger is copied with SQLite's
  online backup API (https://www.sqlite.org/backup.html) into ``ledger-backups/``; the newest
  :data:`KEEP_BACKUPS` copies are kept.
- :func:`restore_ledger` (``collector restore-ledger``): the current ledger is set aside and
  the newest (or a named) backup is copied in. Stored files added after the backup are then
  unknown to the ledger: kept, and re-attached when a gather lists their items again.
- :func:`rebuild_ledger` (``collector rebuild-ledger``): an unusable ledger is set aside and a
  new one (with the folder's collection id) registers every stored file, re-hashed, as
  recovered with unknown provenance; beside a usable ledger only the stored files it does not
  know are registered.

A ledger is never deleted here: it is renamed to ``ledger.sqlite.<why>-<UTC time>`` (its
``-wal``/``-shm`` files follow it, so SQLite still reads it whole).
"""

from __future__ import annotations

import hashlib
import os
import re
import uuid
from dataclasses import dataclass, field
from datetime import UTC, datetime
from pathlib import Path

from collector.checks.images import inspect_image
from collector.errors import CollectionError, CollectorError, LedgerError, LedgerUnusable
from collector.storage import queries
from collector.storage.collection import (
    LEDGER_NAME,
    Collection,
    check_ledger,
)
from collector.storage.ledger import Ledger, utc_now
from collector.storage.safe_paths import open_own_file, own_folder, remove_own_file

BACKUP_DIR = "ledger-backups"
# How many backups are kept: five runs back is enough to step past a bad night while the
# folder stays small (common practice, no source).
KEEP_BACKUPS = 5
BACKUP_RE = re.compile(r"^ledger-(\d+)-(\d{8}T\d{6}\.\d{3}Z)\.sqlite$")
RECOVERED_FLAG = "recovered"
_CHUNK = 1 << 20


def _stamp() -> str:
    """A UTC time for file names, sortable as text (20261202T101530.123Z)."""
    return datetime.now(UTC).strftime("%Y%m%dT%H%M%S.%f")[:-3] + "Z"


def _collection_folder(root: Path) -> Collection:
    if not root.is_dir():
        raise CollectionError(f"{root} does not exist or is not a folder; give the "
                              "collection folder")
    collection = Collection(root)
    if not collection.recipe_path.is_file() and not collection.store.root.is_dir():
        raise CollectionError(f"{root} is not a collection folder (no recipe.toml and no "
                              "files/); give the collection folder")
    return collection


# --- backups ---------------------------------------------------------------------------------
def backup_folder(collection: Collection, *, create: bool = False) -> Path:
    """``ledger-backups/`` of the collection; a link or a non-folder there is refused."""
    folder = collection.root / BACKUP_DIR
    own_folder(collection.root, folder, create=create)
    return folder


def list_backups(collection: Collection) -> list[Path]:
    """The collection's ledger backups, newest first (plain files named by collector)."""
    folder = backup_folder(collection)
    if not folder.is_dir():
        return []
    found: list[tuple[str, int, Path]] = []
    for entry in os.scandir(folder):
        match = BACKUP_RE.match(entry.name)
        if match and entry.is_file(follow_symlinks=False):
            found.append((match.group(2), int(match.group(1)), Path(entry.path)))
    return [path for _, _, path in sorted(found, reverse=True)]


def backup_ledger(collection: Collection, ledger: Ledger, run_id: int) -> Path:
    """Copy the ledger into ``ledger-backups/ledger-<run id>-<UTC time>.sqlite`` and keep
    the newest KEEP_BACKUPS. The copy is written under a new name created with
    O_EXCL|O_NOFOLLOW (a planted link is not followed) and renamed into place whole."""
    folder = backup_folder(collection, create=True)
    name = f"ledger-{run_id}-{_stamp()}.sqlite"
    partial = folder / f".{name}.partial"
    try:
        os.close(open_own_file(partial, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o600))
    except OSError as exc:
        raise LedgerError(f"cannot write a ledger backup in {folder}: {exc}") from exc
    try:
        ledger.backup_to(partial)
        os.replace(partial, folder / name)
    except BaseException:
        partial.unlink(missing_ok=True)
        raise
    for old in list_backups(collection)[KEEP_BACKUPS:]:
        old.unlink(missing_ok=True)
    return folder / name


# --- setting a ledger aside --------------------------------------------------------------------
def set_aside(collection: Collection, why: str) -> Path | None:
    """Rename the ledger (and its -wal/-shm) to ``ledger.sqlite.<why>-<UTC time>``; a
    rename moves a link itself, never what it points to."""
    path = collection.ledger_path
    if not os.path.lexists(path):
        return None
    aside = path.with_name(f"{LEDGER_NAME}.{why}-{_stamp()}")
    for suffix in ("-wal", "-shm"):
        extra = path.with_name(path.name + suffix)
        if os.path.lexists(extra):
            os.replace(extra, aside.with_name(aside.name + suffix))
    os.replace(path, aside)
    return aside


def _fresh_temp(collection: Collection, name: str) -> Path:
    """A new empty file of ours in the collection folder (an old leftover is replaced)."""
    temp = collection.root / name
    for suffix in ("", "-journal", "-wal", "-shm"):
        remove_own_file(temp.with_name(temp.name + suffix))  # a link goes as a link
    os.close(open_own_file(temp, os.O_WRONLY | os.O_CREAT | os.O_EXCL))
    return temp


def _unknown_count(collection: Collection, ledger: Ledger) -> int:
    known = ledger.known_sha256s()
    return sum(1 for sha, _ in collection.store.iter_stored() if sha not in known)


# --- restore ---------------------------------------------------------------------------------
@dataclass(frozen=True)
class RestoreResult:
    """What ``restore-ledger`` did."""

    backup: Path
    set_aside: Path | None
    files: int
    items: int
    unknown_files: int


def restore_ledger(root: Path, backup: Path | None = None) -> RestoreResult:
    """Set the current ledger aside and copy in ``backup`` (default: the newest one).

    The backup is checked first (a usable ledger, this collection's id, able to describe
    the store); if it is not, nothing is changed.
    """
    collection = _collection_folder(root)
    with collection.gather_lock("restore-ledger"):
        if backup is None:
            backups = list_backups(collection)
            if not backups:
                raise CollectionError(
                    f"{root} has no ledger backups in {BACKUP_DIR}/; nothing was changed. "
                    f"Register the stored files instead with 'collector rebuild-ledger {root}'")
            backup = backups[0]
        if not backup.is_file():
            raise CollectionError(f"{backup} is not a file; name a backup from "
                                  f"{collection.root / BACKUP_DIR}")
        temp = _fresh_temp(collection, f".{LEDGER_NAME}.restoring")
        try:
            try:
                Ledger.copy_file(backup, temp)
            except LedgerUnusable as exc:
                raise LedgerUnusable(f"the backup {backup} cannot be read ({exc.__cause__}); "
                                     "nothing was changed. Name another backup") from exc
            try:
                with Ledger.open(temp) as ledger:  # migrates a backup of an older version
                    check_ledger(collection, ledger)
                    files, items = queries.counts(ledger)
            except LedgerUnusable as exc:
                raise LedgerUnusable(f"the backup {backup} does not fit this collection; "
                                     f"nothing was changed. ({exc})") from exc
            aside = set_aside(collection, "before-restore")
            os.replace(temp, collection.ledger_path)
        finally:
            temp.unlink(missing_ok=True)
        with Ledger.open(collection.ledger_path) as ledger:
            check_ledger(collection, ledger, bind=True)
            unknown = _unknown_count(collection, ledger)
            ledger.add_note("ledger_restored", f"ledger restored from {backup.name}"
                            + (f"; the previous ledger was set aside as {aside.name}"
                               if aside else "")
                            + (f"; {unknown} stored files are newer than the backup (kept)"
                               if unknown else ""))
    return RestoreResult(backup, aside, files, items, unknown)


# --- rebuild ---------------------------------------------------------------------------------
@dataclass
class RebuildResult:
    """What ``rebuild-ledger`` did."""

    set_aside: Path | None
    registered: int = 0
    already_known: int = 0
    damaged: list[Path] = field(default_factory=list)


def _sha256_file(path: Path) -> str:
    digest = hashlib.sha256()  # FIPS 180-4
    with path.open("rb") as fh:
        while chunk := fh.read(_CHUNK):
            digest.update(chunk)
    return digest.hexdigest()


def _register(ledger: Ledger, sha: str, path: Path, result: RebuildResult) -> None:
    """A files row for one stored file: re-hashed, image facts, flagged as recovered."""
    if _sha256_file(path) != sha:
        result.damaged.append(path)  # its bytes do not match its name: kept, not registered
        return
    row: dict[str, object] = {"sha256": sha, "size": path.stat().st_size,
                              "ext": path.suffix.lstrip("."), "first_item_id": None,
                              "stored_at": utc_now()}
    flags = [RECOVERED_FLAG]
    try:
        facts = inspect_image(path, full_decode=False)
    except CollectorError:
        flags.append("unreadable")
    else:
        row.update(facts.file_columns())
        row["ext"] = path.suffix.lstrip(".")  # the name it is stored under, whatever it holds
        flags = [*facts.flags, RECOVERED_FLAG]
    row["flags"] = flags
    ledger.add_file(row)
    result.registered += 1


def _usable_ledger(collection: Collection) -> Ledger | None:
    """The folder's ledger when it can describe the store, else None (set aside later)."""
    if not os.path.lexists(collection.ledger_path):
        return None
    try:
        ledger = Ledger.open(collection.ledger_path)
    except LedgerUnusable:
        return None
    try:
        check_ledger(collection, ledger, bind=True)
    except LedgerUnusable:
        ledger.close()
        return None
    except BaseException:
        ledger.close()
        raise
    return ledger


def rebuild_ledger(root: Path) -> RebuildResult:
    """Register every stored file the ledger cannot explain, as recovered with unknown
    provenance. An unusable ledger (empty, no schema, not SQLite, another collection's,
    re-created) is set aside first and a new one is made with the folder's collection id."""
    collection = _collection_folder(root)
    with collection.gather_lock("rebuild-ledger"):
        ledger = _usable_ledger(collection)
        if ledger is not None:
            result = RebuildResult(None)
            with ledger:
                known = ledger.known_sha256s()
                for sha, path in sorted(collection.store.iter_stored()):
                    if sha in known:
                        result.already_known += 1
                    else:
                        _register(ledger, sha, path, result)
                _note(ledger, result)
            return result
        folder_id = collection.folder_id() or str(uuid.uuid4())
        temp = _fresh_temp(collection, f".{LEDGER_NAME}.rebuilding")
        temp.unlink()  # Ledger.create makes it
        try:
            with Ledger.create(temp, collection_id=folder_id) as fresh:
                result = RebuildResult(None)
                for sha, path in sorted(collection.store.iter_stored()):
                    _register(fresh, sha, path, result)
            result.set_aside = set_aside(collection, "unusable")
            os.replace(temp, collection.ledger_path)
        finally:
            for suffix in ("", "-wal", "-shm"):
                temp.with_name(temp.name + suffix).unlink(missing_ok=True)
        if collection.folder_id() is None:
            collection.write_folder_id(folder_id)
        collection.store.ensure()
        with Ledger.open(collection.ledger_path) as ledger:
            _note(ledger, result)
        return result


def _note(ledger: Ledger, result: RebuildResult) -> None:
    parts = [f"{result.registered} stored files registered as recovered (provenance unknown)"]
    if result.set_aside:
        parts.append(f"the unusable ledger was set aside as {result.set_aside.name}")
    if result.damaged:
        parts.append(f"{len(result.damaged)} stored files kept unregistered because their "
                     "bytes do not match their names: "
                     + ", ".join(p.name for p in result.damaged[:5]))
    ledger.add_note("ledger_rebuilt", "; ".join(parts))
