"""A collection folder: ``recipe.toml``, ``ledger.sqlite`` and the ``files/`` store.

Nothing is ever written outside the folder. A running ``gather`` holds ``.gather.lock`` so that
a second one refuses to start, while ``status`` and ``trace`` keep reading the ledger.
"""

from __future__ import annotations

import contextlib
import fcntl
import json
import os
from collections.abc import Iterator
from dataclasses import dataclass
from importlib import resources
from pathlib import Path

from collector.errors import CollectionError
from collector.ledger import Ledger
from collector.recipe import Recipe, load_recipe
from collector.store import Store

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

    def recipe(self) -> Recipe:
        """Load and validate the folder's recipe."""
        return load_recipe(self.recipe_path)

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
        if self.cache_dir.is_symlink():
            raise CollectionError(f"{self.cache_dir} is a symlink; collector writes only "
                                  "inside the collection folder. Remove the link and run again")
        self.cache_dir.mkdir(exist_ok=True)
        return self.cache_dir

    def move_derived_out_of_store(self) -> int:
        """Remove derived files an older collector kept inside ``files/`` (they are rebuilt
        in the cache folder on demand); returns how many were removed. Links are removed as
        links, never followed."""
        store = self.root / FILES_NAME
        if not store.is_dir():
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
        flags = os.O_WRONLY | os.O_APPEND | os.O_CREAT | os.O_NOFOLLOW
        try:
            fd = os.open(self.error_log_path, flags, 0o644)
        except OSError as exc:
            raise CollectionError(f"cannot write the error log {self.error_log_path}: {exc} "
                                  "(a symlink there is refused)") from exc
        with os.fdopen(fd, "a", encoding="utf-8") as fh:
            fh.write(text if text.endswith("\n") else text + "\n")

    @contextlib.contextmanager
    def gather_lock(self) -> Iterator[None]:
        """Hold the folder's gather lock; a second holder gets a clear CollectionError."""
        path = self.root / LOCK_NAME
        fd = os.open(path, os.O_RDWR | os.O_CREAT, 0o644)
        try:
            try:
                fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
            except BlockingIOError as exc:
                holder = os.pread(fd, 64, 0).decode(errors="replace").strip() or "?"
                raise CollectionError(
                    f"another gather is already running on {self.root} (process {holder}); "
                    "wait for it to finish or stop it. 'collector status' works meanwhile."
                ) from exc
            os.ftruncate(fd, 0)
            os.pwrite(fd, str(os.getpid()).encode(), 0)
            yield
        finally:
            os.close(fd)


def open_collection(root: Path) -> Collection:
    """The collection at ``root``, after checking that it is one."""
    if not root.is_dir():
        raise CollectionError(f"{root} does not exist; create a collection with "
                              f"'collector init {root}'")
    collection = Collection(root)
    if not collection.recipe_path.is_file() or not collection.ledger_path.is_file():
        raise CollectionError(f"{root} is not a collection folder (no {RECIPE_NAME} and "
                              f"{LEDGER_NAME}); create one with 'collector init {root}'")
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
    root.mkdir(parents=True, exist_ok=True)
    collection = Collection(root)
    if not collection.recipe_path.exists():
        collection.recipe_path.write_text(
            recipe_template(contact=contact, name=name or root.resolve().name), "utf-8")
    if not collection.ledger_path.exists():
        Ledger.create(collection.ledger_path).close()
    collection.store.ensure()
    return collection


@dataclass(frozen=True)
class Recovery:
    """What :func:`recover` mended after an interrupted run."""

    temp_files_removed: int
    orphan_files_removed: int
    rows_reset: int


def recover(collection: Collection, ledger: Ledger) -> Recovery:
    """Bring the store and the ledger back into step after a crash.

    A file enters the store before its ledger row is committed, so a crash can leave a temp
    file (removed), or a stored file without a row (removed: its item is still pending and
    will be fetched again). A row whose file is missing (deleted by hand) goes back to pending.
    """
    store = collection.store
    temp_removed = store.clean_incoming()
    known = ledger.known_sha256s()
    orphans = 0
    for sha, path in list(store.iter_stored()):
        if sha not in known:
            path.unlink(missing_ok=True)
            orphans += 1
    missing = [sha for sha in known if store.find(sha) is None]
    reset = 0
    with ledger.transaction():
        for sha in missing:
            reset += ledger.db.execute(
                "UPDATE items SET state = 'pending', reason = NULL, file_sha256 = NULL "
                "WHERE file_sha256 = ?", [sha]).rowcount
            ledger.db.execute("DELETE FROM files WHERE sha256 = ?", [sha])
    return Recovery(temp_removed, orphans, reset)
