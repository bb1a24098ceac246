"""The content-addressed file store: ``files/ab/cd/<sha256>.<ext>``.

A file enters the store only whole: it is written to a temp file under ``files/.incoming/``
(same filesystem), fsynced, then moved into place with ``os.replace``. A stored file is never
overwritten. Nothing is written outside the store's root.
"""

from __future__ import annotations

import contextlib
import errno
import hashlib
import os
import re
import tempfile
from collections.abc import Iterator
from pathlib import Path

from collector.errors import StoreError

SHA256_RE = re.compile(r"^[0-9a-f]{64}$")
EXT_RE = re.compile(r"^[a-z0-9]{1,5}$")


def make_temp(folder: Path, prefix: str = "part-") -> tuple[int, Path]:
    """A new temp file in ``folder`` that will be readable like any stored file once moved
    into place (mkstemp creates 0600 files, which released hard links would inherit)."""
    fd, name = tempfile.mkstemp(prefix=prefix, dir=folder)
    os.fchmod(fd, 0o644)
    return fd, Path(name)


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
        self._made: set[Path] = set()  # folders known to exist: mkdir is slow on some disks

    def _mkdir(self, folder: Path) -> None:
        if folder not in self._made:
            folder.mkdir(parents=True, exist_ok=True)
            self._made.add(folder)

    def ensure(self) -> None:
        """Create the store folders if they are missing."""
        self._mkdir(self.incoming_dir)

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

    def adopt(self, tmp_path: Path, sha256: str, ext: str, *, synced: bool = False) -> Path:
        """Move a complete temp file into place (fsynced here unless the writer already did:
        ``synced``). An existing file is kept as it is."""
        target = self.path_for(sha256, ext)
        try:
            if target.exists():
                tmp_path.unlink(missing_ok=True)
                return target
            self._mkdir(target.parent)
            if not synced:
                with open(tmp_path, "rb+") as fh:
                    os.fsync(fh.fileno())
            os.replace(tmp_path, target)
            # The folder is not fsynced: after a power loss a rename may be lost, and
            # collection.recover() then resets the item whose file is missing.
        except OSError as exc:
            with contextlib.suppress(OSError):
                tmp_path.unlink(missing_ok=True)
            raise _store_error(exc, f"storing {target.name}") from exc
        return target

    def put_bytes(self, data: bytes, ext: str) -> tuple[str, Path]:
        """Store bytes (e.g. a crop); returns (sha256, path)."""
        sha = hashlib.sha256(data).hexdigest()
        target = self.path_for(sha, ext)
        if target.exists():
            return sha, target
        fd, tmp = self.new_temp()
        try:
            with os.fdopen(fd, "wb") as fh:
                fh.write(data)
                fh.flush()
                os.fsync(fh.fileno())
        except OSError as exc:
            tmp.unlink(missing_ok=True)
            raise _store_error(exc, f"writing {target.name}") from exc
        return sha, self.adopt(tmp, sha, ext, synced=True)

    def clean_incoming(self) -> int:
        """Remove temp files a crashed run left behind; returns how many were removed."""
        removed = 0
        if self.incoming_dir.is_dir():
            for leftover in self.incoming_dir.iterdir():
                with contextlib.suppress(OSError):
                    leftover.unlink()
                    removed += 1
        return removed

    def iter_stored(self) -> Iterator[tuple[str, Path]]:
        """Every stored file as (sha256, path)."""
        if not self.root.is_dir():
            return
        for path in self.root.glob("[0-9a-f][0-9a-f]/[0-9a-f][0-9a-f]/*"):
            sha = path.name.split(".", 1)[0]
            if SHA256_RE.match(sha):
                yield sha, path

    def find(self, sha256: str) -> Path | None:
        """The stored path of a digest, whatever its extension, or None."""
        folder = self.root / sha256[:2] / sha256[2:4]
        if folder.is_dir():
            for path in folder.glob(f"{sha256}.*"):
                return path
        return None
