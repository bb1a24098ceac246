"""A collection folder: ``recipe.toml``, ``ledger.sqlite``, the ``files/`` store and
``collection.id`` (the folder's identity, the same uuid as the ledger's ``collection_id``).

Nothing is ever written outside the folder: every file and folder of ours below it is opened
without following symbolic links (:mod:`collector.storage.safe_paths`); a link planted where
collector keeps its own file or folder is refused (PathRefused, exit 2). A running
``gather`` holds ``.gather.lock`` so that a second one refuses to start, while ``status`` and
``trace`` keep reading the ledger.

Every command opens the folder through :func:`open_collection`, which refuses (exit 2, nothing
touched) a ledger that cannot describe the store beside it: unusable (see ``Ledger.open``),
another collection's, re-created empty beside stored files, or describing files while
``files/`` holds none at all. The store never deletes what the ledger cannot explain.
"""

from __future__ import annotations

import contextlib
import json
import os
import uuid
from collections.abc import Iterator
from dataclasses import dataclass
from importlib import resources
from pathlib import Path
from typing import IO

from collector.config.recipe import Recipe, load_recipe
from collector.errors import CollectionError, LedgerUnusable
from collector.storage import queries
from collector.storage.file_locks import LockHeldElsewhere, lock_exclusive
from collector.storage.ledger import Ledger, ways_out
from collector.storage.safe_paths import (
    open_own_file,
    own_file_exists,
    own_folder,
    refuse_ledger_links,
    refuse_link,
    write_new_file,
)
from collector.storage.store import Store

RECIPE_NAME = "recipe.toml"
LEDGER_NAME = "ledger.sqlite"
FILES_NAME = "files"
LOCK_NAME = ".gather.lock"
ERROR_LOG_NAME = "errors.log"
# Derived files (rebuilt from the ledger whenever they are missing or stale) and their locks
# live here, never in files/, which holds only content named by its SHA-256.
CACHE_NAME = "cache"
HASH_INDEX_NAME = "phash-index"
# Where an older collector kept the near-duplicate index: inside the store (files/).
_OLD_DERIVED = (".phash-index", ".phash-index.lock")
ID_NAME = "collection.id"


def recipe_template(contact: str = "", name: str = "My collection") -> str:
    """The commented recipe template that ``collector init`` writes."""
    text = resources.files("collector").joinpath("templates/recipe.toml").read_text("utf-8")
    # json.dumps gives a valid TOML basic string for any text (quotes and escapes included).
    return text.replace("__CONTACT__", json.dumps(contact)).replace("__NAME__", json.dumps(name))


@dataclass(frozen=True)
class Collection:
    """Paths of one collection folder."""

    root: Path

    @property
    def recipe_path(self) -> Path:
        return self.root / RECIPE_NAME

    @property
    def ledger_path(self) -> Path:
        return self.root / LEDGER_NAME

    @property
    def store(self) -> Store:
        return Store(self.root / FILES_NAME)

    @property
    def id_path(self) -> Path:
        return self.root / ID_NAME

    def folder_id(self) -> str | None:
        """The id in ``collection.id``, or None when the folder has none (older folders)."""
        if not own_file_exists(self.id_path):  # a link or a folder there is refused
            return None
        with os.fdopen(open_own_file(self.id_path, os.O_RDONLY), encoding="utf-8") as fh:
            text = fh.read(200).strip()
        try:
            return str(uuid.UUID(text))
        except ValueError as exc:
            raise CollectionError(f"{self.id_path} does not hold a collection id ({text[:40]!r});"
                                  " restore the file or remove it (the ledger's id is then "
                                  "written again)") from exc

    def write_folder_id(self, value: str) -> None:
        """Create ``collection.id``; an existing file (or a planted link) is never replaced."""
        write_new_file(self.id_path, value + "\n")

    def recipe(self, *, check_source_kinds: bool = True) -> Recipe:
        """Load and validate the folder's recipe (``check_source_kinds``: see
        :func:`collector.config.recipe.parse_recipe`)."""
        return load_recipe(self.recipe_path, check_source_kinds=check_source_kinds)

    def ledger(self, *, readonly: bool = False) -> Ledger:
        """Open the folder's ledger."""
        return Ledger.open(self.ledger_path, readonly=readonly)

    @property
    def cache_dir(self) -> Path:
        return self.root / CACHE_NAME

    @property
    def hash_index_path(self) -> Path:
        return self.cache_dir / HASH_INDEX_NAME

    def ensure_cache_dir(self) -> Path:
        """Create the cache folder; a symlink in its place is refused (it could point
        outside the collection)."""
        own_folder(self.root, self.cache_dir, create=True)
        return self.cache_dir

    def move_derived_out_of_store(self) -> int:
        """Remove derived files an older collector kept inside ``files/`` (they are rebuilt
        in the cache folder on demand); returns how many were removed. Links are removed as
        links, never followed."""
        store = self.root / FILES_NAME
        if not own_folder(self.root, store):  # files/ as a link: refused, never searched
            return 0
        stale = [store / name for name in _OLD_DERIVED]
        stale += list(store.glob(".phash-index.tmp-*"))
        removed = 0
        for path in stale:
            if path.is_symlink() or path.is_file():
                path.unlink(missing_ok=True)
                removed += 1
        return removed

    @property
    def error_log_path(self) -> Path:
        return self.root / ERROR_LOG_NAME

    def append_error_log(self, text: str) -> None:
        """Append ``text`` to the folder's error log; a symlink planted there is refused
        (O_NOFOLLOW), so the log never writes outside the folder."""
        try:
            fd = open_own_file(self.error_log_path, os.O_WRONLY | os.O_APPEND | os.O_CREAT)
        except OSError as exc:
            raise CollectionError(f"cannot write the error log {self.error_log_path}: {exc} "
                                  "(a symlink there is refused)") from exc
        with os.fdopen(fd, "a", encoding="utf-8") as fh:
            fh.write(text if text.endswith("\n") else text + "\n")

    @contextlib.contextmanager
    def gather_lock(self, command: str = "gather") -> Iterator[None]:
        """Hold the folder's gather lock for ``command`` (gather, remeasure, apply-rules...);
        a second holder gets a clear CollectionError naming the command and process that hold
        it. The lock file is opened with O_NOFOLLOW: a planted link is refused, never
        truncated. The lock itself is portalocker's (:mod:`collector.storage.file_locks`)."""
        path = self.root / LOCK_NAME
        with os.fdopen(open_own_file(path, os.O_RDWR | os.O_CREAT), "r+b", buffering=0) as fh:
            try:
                lock_exclusive(fh, wait=False)
            except LockHeldElsewhere as exc:
                pid, held_by = _lock_holder(fh)
                what = ("another gather is" if held_by == "gather"
                        else f"'collector {held_by}' is")
                raise CollectionError(
                    f"{what} already running on {self.root} (process {pid}); wait for it "
                    "to finish or stop it. 'collector status' works meanwhile."
                ) from exc
            fh.seek(0)
            fh.truncate()
            fh.write(f"{os.getpid()} {command}".encode())
            fh.flush()
            yield


def _lock_holder(fh: IO[bytes]) -> tuple[str, str]:
    """The process number and command the lock holder wrote ("?" and "gather" when unknown:
    a lock written by an older collector holds only the number, and Windows refuses reading
    a locked range from another handle)."""
    try:
        fh.seek(0)
        words = fh.read(64).decode(errors="replace").split()
    except OSError:
        words = []
    command = words[1] if len(words) > 1 and words[1].replace("-", "").isalpha() else "gather"
    return (words[0] if words else "?"), command


def store_has_files(collection: Collection) -> bool:
    """Whether ``files/`` holds at least one stored file (stops at the first)."""
    return next(iter(collection.store.iter_stored()), None) is not None


def check_ledger(collection: Collection, ledger: Ledger, *, bind: bool = False) -> None:
    """Refuse a ledger that cannot describe the store beside it; nothing is changed.

    - Its ``collection_id`` differs from the folder's ``collection.id``: another
      collection's ledger.
    - ``files/`` holds stored files while the ledger has no files, no items and no store
      intents: a re-created (or foreign, empty) ledger; recovery would take every file for
      debris.
    - The ledger has files rows while ``files/`` holds none at all: the disk is not mounted
      or the folder was moved without its files; recovery would reset every item.

    Binding an id (``bind``, write access only): a ledger migrated from version 1 has no
    ``collection_id``, and an older folder has no ``collection.id``. The missing one is
    written only when the store is empty or the ledger has a row (or an intent) for at least
    one stored file, so a ledger is never adopted by a folder whose files it knows nothing about.
    """
    ledger_id = ledger.collection_id()
    folder_id = collection.folder_id()
    root = collection.root
    if ledger_id and folder_id and ledger_id != folder_id:
        raise LedgerUnusable(
            f"this ledger belongs to another collection: {ledger.path} has collection id "
            f"{ledger_id}, the folder's {ID_NAME} says {folder_id}. " + ways_out(root))
    known, items = queries.counts(ledger)
    stored_any = store_has_files(collection)
    intents = ledger.store_intents()
    if stored_any and known == 0 and items == 0 and not intents:
        raise LedgerUnusable(
            f"{collection.store.root} holds stored files but the ledger {ledger.path} knows "
            "none of them and has no items: it was re-created or belongs elsewhere. "
            + ways_out(root))
    if known and not stored_any:
        raise CollectionError(
            f"the ledger {ledger.path} records {known} stored files but "
            f"{collection.store.root} holds none at all: is the disk mounted, or was the "
            "folder moved without files/? Nothing was changed; put the files back and run "
            "again (or restore the folder from your copy).")
    if ledger_id and folder_id:
        return
    if stored_any:
        hashes = ledger.known_sha256s() | intents
        if not any(sha in hashes for sha, _ in collection.store.iter_stored()):
            raise LedgerUnusable(
                f"cannot tell whether {ledger.path} belongs to this folder: "
                + ("the folder has no " + ID_NAME if not folder_id else "the ledger has no id")
                + " and the ledger knows none of the stored files. " + ways_out(root))
    if bind:
        value = ledger_id or folder_id or str(uuid.uuid4())
        if not ledger_id:
            ledger.set_fact("collection_id", value)
        if not folder_id:
            collection.write_folder_id(value)


def is_collection(root: Path) -> bool:
    """Whether ``root`` has the two files every collection folder has (nothing is opened)."""
    return (root / RECIPE_NAME).is_file() and (root / LEDGER_NAME).is_file()


def open_collection(root: Path) -> Collection:
    """The collection at ``root``, after checking that it is one and that its ledger can
    describe its store (:func:`check_ledger`; LedgerUnusable/CollectionError, exit 2)."""
    if not root.is_dir():
        raise CollectionError(f"{root} does not exist; create a collection with "
                              f"'collector init {root}'")
    collection = Collection(root)
    refuse_ledger_links(collection.ledger_path)  # SQLite would follow a link and write there
    if collection.recipe_path.is_file() and not collection.ledger_path.exists() and (
            store_has_files(collection)):
        raise LedgerUnusable(f"{root} has no {LEDGER_NAME} but {collection.store.root} holds "
                             "stored files. " + ways_out(root))
    if not collection.recipe_path.is_file() or not collection.ledger_path.is_file():
        raise CollectionError(f"{root} is not a collection folder (no {RECIPE_NAME} and "
                              f"{LEDGER_NAME}); create one with 'collector init {root}'")
    with Ledger.open(collection.ledger_path, readonly=True) as ledger:
        check_ledger(collection, ledger)
    with contextlib.suppress(OSError):  # a read-only folder keeps its old files, harmlessly
        collection.move_derived_out_of_store()
    return collection


def init_collection(root: Path, *, contact: str = "", name: str | None = None,
                    existing_ok: bool = False) -> Collection:
    """Create a collection folder. A non-empty folder is refused unless ``existing_ok``;
    even then nothing that exists is overwritten, only what is missing is added."""
    if root.exists() and not root.is_dir():
        raise CollectionError(f"{root} exists and is not a folder")
    if root.is_dir() and any(root.iterdir()) and not existing_ok:
        raise CollectionError(
            f"{root} is not empty; nothing was changed. Choose an empty or new folder, or "
            "pass --existing-ok to add the missing collection files without touching others")
    collection = Collection(root)
    if root.is_dir():
        refuse_init_links(collection)
    if root.is_dir() and not collection.ledger_path.exists() and store_has_files(collection):
        raise LedgerUnusable(f"{root} has no {LEDGER_NAME} but {collection.store.root} holds "
                             "stored files; a new empty ledger would not describe them. "
                             + ways_out(root))
    if collection.ledger_path.exists():
        with Ledger.open(collection.ledger_path, readonly=True) as ledger:
            check_ledger(collection, ledger)  # an unusable ledger stops before any write
    folder_id = collection.folder_id() if root.is_dir() else None
    root.mkdir(parents=True, exist_ok=True)
    if not collection.recipe_path.exists():
        write_new_file(collection.recipe_path,
                       recipe_template(contact=contact, name=name or root.resolve().name))
    if not collection.ledger_path.exists():
        with Ledger.create(collection.ledger_path, collection_id=folder_id) as ledger:
            if folder_id is None:
                collection.write_folder_id(ledger.collection_id() or "")
    collection.store.ensure()
    return collection


def refuse_init_links(collection: Collection) -> None:
    """Before init writes anything: a link at any path it writes is refused (nothing is
    written, inside or outside the folder)."""
    refuse_link(collection.recipe_path)
    own_file_exists(collection.id_path)
    refuse_ledger_links(collection.ledger_path)
    own_folder(collection.root, collection.store.incoming_dir)


@dataclass(frozen=True)
class Recovery:
    """What :func:`recover` mended after an interrupted run."""

    temp_files_removed: int
    orphan_files_removed: int
    rows_reset: int
    unknown_files: tuple[str, ...] = ()  # stored, no row, no intent: kept


def recover(collection: Collection, ledger: Ledger) -> Recovery:
    """Bring the store and the ledger back into step after a crash.

    The ledger is checked first (:func:`check_ledger`, binding the collection id): nothing
    is touched beside a ledger that cannot describe the store. A store intent is committed
    before a file enters (or leaves) the store and dropped with its ``files`` row, so a crash
    can leave a temp file (removed), or a stored file without a row that an intent names
    (removed: its item is still pending and will be fetched again). A stored file without a
    row and without an intent is unexplained: it is kept and returned in ``unknown_files``
    ('collector rebuild-ledger' registers it). A row whose file is missing (deleted by hand)
    goes back to pending.
    """
    check_ledger(collection, ledger, bind=True)
    store = collection.store
    temp_removed = store.clean_incoming()
    known = ledger.known_sha256s()
    intents = ledger.store_intents()
    orphans = 0
    unknown: list[str] = []
    for sha, path in list(store.iter_stored()):
        if sha in known:
            continue
        if sha in intents:
            path.unlink(missing_ok=True)
            orphans += 1
        else:
            unknown.append(sha)
    missing = [sha for sha in known if store.find(sha) is None]
    reset = 0
    with ledger.transaction():
        for sha in missing:
            reset += ledger.forget_missing_file(sha)
        if intents:
            ledger.drop_all_store_intents()
    return Recovery(temp_removed, orphans, reset, tuple(sorted(unknown)))
