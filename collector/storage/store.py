"""The content-addressed file store: ``files/ab/cd/<sha256>.<ext>``.

A file enters the store only whole: it is written to a temp file under ``files/.incoming/``
(same filesystem), fsynced, then moved into place with ``os.replace``. A stored file is never
overwritten. Nothing is written outside the store's root: ``files/``, ``files/.incoming/``
and the shard folders are never reached through a symbolic link (see
:mod:`collector.storage.safe_paths`); a link there, or a stored file that is a link, is refused.
"""

from __future__ import annotations

import contextlib
import errno
import hashlib
import os
import re
import stat
from collections.abc import Callable, Iterator
from pathlib import Path

from collector.errors import PathRefused, StoreError
from collector.storage.safe_paths import (
    link_refused,
    new_temp_file,
    own_folder,
    own_folder_fd,
    refuse_link,
)

SHA256_RE = re.compile(r"^[0-9a-f]{64}$")
EXT_RE = re.compile(r"^[a-z0-9]{1,5}$")
_SHARD_RE = re.compile(r"^[0-9a-f]{2}$")


def make_temp(folder: Path, prefix: str = "part-") -> tuple[int, Path]:
    """A new temp file in ``folder`` (not a link: refused) that will be readable like any
    stored file once moved into place; created with O_EXCL, so never through a link."""
    refuse_link(folder)
    return new_temp_file(folder, prefix)


def _store_error(exc: OSError, what: str) -> StoreError:
    if exc.errno == errno.ENOSPC:
        return StoreError(f"the disk is full while {what}; free some space and run again "
                          "(the collection resumes where it stopped)", errno=exc.errno)
    return StoreError(f"cannot write the store while {what}: {exc}", errno=exc.errno)


class Store:
    """The file store below ``root`` (a collection's ``files/`` folder)."""

    def __init__(self, root: Path) -> None:
        self.root = root
        self.incoming_dir = root / ".incoming"

    @property
    def _base(self) -> Path:
        """The collection folder: the store's own folders are checked from here down."""
        return self.root.parent

    def ensure(self) -> None:
        """Create the store folders if they are missing (a link in their place is refused)."""
        own_folder(self._base, self.incoming_dir, create=True)

    def path_for(self, sha256: str, ext: str) -> Path:
        """Where a file with this digest and extension lives (whether or not it exists)."""
        if not SHA256_RE.match(sha256):
            raise StoreError(f"not a sha256 hex digest: {sha256!r}")
        if not EXT_RE.match(ext):
            raise StoreError(f"not a safe file extension: {ext!r}")
        return self.root / sha256[:2] / sha256[2:4] / f"{sha256}.{ext}"

    def new_temp(self) -> tuple[int, Path]:
        """Open a new temp file in the incoming folder; returns (fd, path)."""
        self.ensure()
        try:
            return make_temp(self.incoming_dir)
        except OSError as exc:
            raise _store_error(exc, "creating a temp file") from exc

    def adopt(self, tmp_path: Path, sha256: str, ext: str, *, synced: bool = False,
              before_placing: Callable[[], None] | None = None) -> Path:
        """Move a complete temp file into place (fsynced here unless the writer already did:
        ``synced``). An existing file is kept as it is. The shard folder is opened without
        following links and the rename goes into that descriptor, so a link planted at
        ``files/ab`` or ``files/ab/cd`` never receives the file.

        ``before_placing`` is called just before the move, and only when no file of this
        digest is stored yet under any extension (what :meth:`find` would say): where a
        caller commits its write-ahead intent, found out from the one opening of the shard
        folder (no second walk down ``files/ab/cd``)."""
        target = self.path_for(sha256, ext)
        try:
            with own_folder_fd(self._base, target.parent, create=True) as shard:
                info = None
                if before_placing is not None and not self._stored_in(shard, target):
                    before_placing()  # and no file of the digest is there to look at
                else:
                    with contextlib.suppress(FileNotFoundError):
                        info = os.stat(target.name, dir_fd=shard, follow_symlinks=False)
                if info is not None:
                    if stat.S_ISLNK(info.st_mode):
                        raise link_refused(target)
                    tmp_path.unlink(missing_ok=True)
                    return target
                if not synced:
                    with open(tmp_path, "rb+") as fh:
                        os.fsync(fh.fileno())
                os.replace(tmp_path, target.name, dst_dir_fd=shard)
            # The folder is not fsynced: after a power loss a rename may be lost, and
            # collection.recover() then resets the item whose file is missing.
        except OSError as exc:
            with contextlib.suppress(OSError):
                tmp_path.unlink(missing_ok=True)
            raise _store_error(exc, f"storing {target.name}") from exc
        except PathRefused:
            with contextlib.suppress(OSError):
                tmp_path.unlink(missing_ok=True)
            raise
        return target

    @staticmethod
    def _stored_in(shard: int, target: Path) -> bool:
        """Whether the shard folder (a descriptor) holds a file of ``target``'s digest under
        any extension; a link there is refused, as :meth:`find` refuses it."""
        prefix = target.name.split(".", 1)[0] + "."
        with os.scandir(shard) as entries:
            for entry in entries:
                if entry.name.startswith(prefix):
                    if entry.is_symlink():
                        raise link_refused(target.with_name(entry.name))
                    return True
        return False

    def put_bytes(self, data: bytes, ext: str) -> tuple[str, Path]:
        """Store bytes (e.g. a crop); returns (sha256, path)."""
        sha = hashlib.sha256(data).hexdigest()
        target = self.path_for(sha, ext)
        if target.exists():  # a link there is refused by adopt, never written through
            return sha, target
        tmp = self.write_temp(data, f"writing {target.name}")
        return sha, self.adopt(tmp, sha, ext, synced=True)

    def write_temp(self, data: bytes, what: str) -> Path:
        """``data`` in a new temp file of the incoming folder, fsynced (ready for
        :meth:`adopt` with ``synced``); ``what`` names the work in an error."""
        fd, tmp = self.new_temp()
        try:
            with os.fdopen(fd, "wb") as fh:
                fh.write(data)
                fh.flush()
                os.fsync(fh.fileno())
        except OSError as exc:
            tmp.unlink(missing_ok=True)
            raise _store_error(exc, what) from exc
        return tmp

    def existing(self, sha256: str, ext: str) -> Path | None:
        """The stored file for this digest and extension if it is there, else None; reached
        without following links (a link on the way or in its place is refused)."""
        target = self.path_for(sha256, ext)
        if not own_folder(self._base, target.parent):
            return None
        if not refuse_link(target):
            return None
        return target if target.is_file() else None  # not a link: refuse_link checked

    def clean_incoming(self) -> int:
        """Remove temp files a crashed run left behind; returns how many were removed.
        A link at ``files/`` or ``files/.incoming`` is refused, never followed; links inside
        are removed as links."""
        removed = 0
        if own_folder(self._base, self.incoming_dir):
            for leftover in os.scandir(self.incoming_dir):
                with contextlib.suppress(OSError):
                    os.unlink(leftover.path)  # a folder fails (kept); a link goes as a link
                    removed += 1
        return removed

    def _checked_dirs(self, folder: Path) -> Iterator[Path]:
        """The shard folders (two hex digits) in ``folder``; a link is refused."""
        with os.scandir(folder) as entries:
            for entry in entries:
                if not _SHARD_RE.match(entry.name):
                    continue
                if entry.is_symlink():
                    raise link_refused(Path(entry.path))
                if entry.is_dir(follow_symlinks=False):
                    yield Path(entry.path)

    def iter_stored(self) -> Iterator[tuple[str, Path]]:
        """Every stored file as (sha256, path). A link in the store (``files/`` itself, a
        shard folder or a stored file) is refused: collector never reads or deletes through
        one."""
        if not own_folder(self._base, self.root):
            return
        for first in self._checked_dirs(self.root):
            for second in self._checked_dirs(first):
                with os.scandir(second) as entries:
                    found = [(e.name, e.is_symlink()) for e in entries]
                for name, is_link in found:
                    sha = name.split(".", 1)[0]
                    if SHA256_RE.match(sha):
                        if is_link:
                            raise link_refused(second / name)
                        yield sha, second / name

    def find(self, sha256: str) -> Path | None:
        """The stored path of a digest, whatever its extension, or None (a link on the way,
        or a stored file that is a link, is refused)."""
        if not SHA256_RE.match(sha256):
            return None
        folder = self.root / sha256[:2] / sha256[2:4]
        if not own_folder(self._base, folder):
            return None
        with os.scandir(folder) as entries:
            for entry in entries:
                if entry.name.startswith(f"{sha256}."):
                    if entry.is_symlink():
                        raise link_refused(Path(entry.path))
                    return Path(entry.path)
        return None
