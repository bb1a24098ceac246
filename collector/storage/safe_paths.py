"""Files and folders of ours inside a collection folder, never reached through a symbolic link.

Collection folders are shared between people, so anyone who can write to one can plant a
symbolic link where collector keeps its own file or folder (``.gather.lock`` pointing at a
file elsewhere, ``files/.incoming`` pointing at a folder elsewhere). Every path collector
writes, truncates, renames into or deletes below a collection folder goes through here:

- folders of ours are checked component by component with ``lstat`` (a link is never
  followed, a missing folder is created with ``mkdir``, which never follows one either), or
  opened with ``O_DIRECTORY | O_NOFOLLOW`` one component at a time (``dir_fd``) where a rename
  goes into them;
- files of ours are opened with ``O_NOFOLLOW`` and checked with ``fstat``; new files are
  created with ``O_CREAT | O_EXCL`` (which never follows a link that is already there);
- a whole file is written under a new temp name and renamed into place (a rename replaces a
  link in the target's place; it does not write through it).

A link (or a folder where a file belongs, or the reverse) is refused with
:class:`~collector.errors.PathRefused` (exit 2) naming the path. The collection folder itself
(the path the user gives) may be a link: that is the user's choice.

Files read from outside (a scan folder's) are opened with :func:`open_regular`: only a
regular file is read, so a FIFO or device never blocks or feeds a run.
"""

from __future__ import annotations

import contextlib
import errno
import os
import stat
import tempfile
from collections.abc import Iterator
from pathlib import Path
from typing import BinaryIO

from collector.errors import PathRefused

_DIR_FLAGS = os.O_RDONLY | getattr(os, "O_DIRECTORY", 0) | getattr(os, "O_CLOEXEC", 0)
# SQLite keeps these beside a database and opens them following links.
LEDGER_SIDECARS = ("-wal", "-shm", "-journal")


def platform_problem() -> str | None:
    """Why this platform cannot keep the promises above, or None.

    The no-link guarantees rest on POSIX calls: ``O_NOFOLLOW``, ``O_DIRECTORY`` and opening
    relative to a folder descriptor (``dir_fd``). Windows has none of them; rather than
    write through a planted link there, collector refuses to start (README, "Platforms")."""
    missing = [name for name in ("O_NOFOLLOW", "O_DIRECTORY") if not hasattr(os, name)]
    if os.open not in os.supports_dir_fd:
        missing.append("dir_fd")
    if not missing:
        return None
    return (f"this platform lacks {', '.join(missing)}, which collector needs to write only "
            "inside a collection folder and never through a link; run it under Linux, macOS "
            "or the Windows Subsystem for Linux (README, \"Platforms\")")


def link_refused(path: Path) -> PathRefused:
    """The one wording for a planted link."""
    return PathRefused(f"{path} is a symbolic link; collector writes only inside the "
                       "collection folder and never through a link. Remove the link and run "
                       "again")


def _wrong_kind(path: Path, want: str) -> PathRefused:
    return PathRefused(f"{path} is not a {want}; collector keeps its own {want} there. Rename "
                       "or remove it and run again")


def _check(path: Path, info: os.stat_result, *, folder: bool) -> None:
    if stat.S_ISLNK(info.st_mode):
        raise link_refused(path)
    if folder and not stat.S_ISDIR(info.st_mode):
        raise _wrong_kind(path, "folder")
    if not folder and not stat.S_ISREG(info.st_mode):
        raise _wrong_kind(path, "plain file")


def refuse_link(path: Path) -> bool:
    """Refuse a link at ``path`` (its last component only); True when something is there."""
    try:
        info = os.lstat(path)
    except FileNotFoundError:
        return False
    if stat.S_ISLNK(info.st_mode):
        raise link_refused(path)
    return True


def own_file_exists(path: Path) -> bool:
    """Whether our plain file ``path`` exists; a link or a non-file there is refused."""
    try:
        info = os.lstat(path)
    except FileNotFoundError:
        return False
    _check(path, info, folder=False)
    return True


def _parts(root: Path, path: Path) -> tuple[str, ...]:
    below, inside = os.path.normpath(path), os.path.normpath(root)
    if below == inside:
        return ()
    prefix = inside if inside.endswith(os.sep) else inside + os.sep
    if below.startswith(prefix):  # the usual case, read without pathlib (it runs per file)
        return tuple(below[len(prefix):].split(os.sep))
    try:  # anything else as pathlib reads it (case-insensitive on Windows)
        return Path(below).relative_to(inside).parts
    except ValueError as exc:
        raise PathRefused(f"{path} is not inside {root}; collector writes only inside the "
                          "collection folder") from exc


def own_folder(root: Path, path: Path, *, create: bool = False) -> bool:
    """Check that every component of ``path`` below ``root`` is a plain folder (no link);
    missing ones are created when ``create``. Returns whether ``path`` exists afterwards."""
    current = root
    for part in _parts(root, path):
        current = current / part
        try:
            info = os.lstat(current)
        except FileNotFoundError:
            if not create:
                return False
            with contextlib.suppress(FileExistsError):  # made meanwhile: checked below
                os.mkdir(current)
            info = os.lstat(current)
        _check(current, info, folder=True)
    return True


def open_own_folder(root: Path, path: Path, *, create: bool = False) -> int:
    """A descriptor of the folder ``path`` below ``root``, each component opened with
    ``O_NOFOLLOW`` relative to the one before (``dir_fd``): no link is followed, even one
    swapped in after a check. Missing folders are created when ``create``."""
    fd = os.open(root, _DIR_FLAGS)
    parts = _parts(root, path)
    try:
        for n, part in enumerate(parts):
            try:
                child = os.open(part, _DIR_FLAGS | os.O_NOFOLLOW, dir_fd=fd)
            except FileNotFoundError:
                if not create:
                    raise
                with contextlib.suppress(FileExistsError):
                    os.mkdir(part, dir_fd=fd)
                child = _open_child(fd, part, root.joinpath(*parts[:n + 1]))
            except OSError as exc:
                if exc.errno in (errno.ELOOP, errno.ENOTDIR):
                    current = root.joinpath(*parts[:n + 1])  # named only when refused
                    _check(current, os.lstat(current), folder=True)
                raise
            os.close(fd)
            fd = child
    except BaseException:
        os.close(fd)
        raise
    return fd


def _open_child(fd: int, part: str, current: Path) -> int:
    try:
        return os.open(part, _DIR_FLAGS | os.O_NOFOLLOW, dir_fd=fd)
    except OSError as exc:
        if exc.errno in (errno.ELOOP, errno.ENOTDIR):
            _check(current, os.lstat(current), folder=True)
        raise


@contextlib.contextmanager
def own_folder_fd(root: Path, path: Path, *, create: bool = False) -> Iterator[int]:
    """:func:`open_own_folder` as a context manager (the descriptor is closed after)."""
    fd = open_own_folder(root, path, create=create)
    try:
        yield fd
    finally:
        os.close(fd)


def open_own_file(path: Path, flags: int, mode: int = 0o644) -> int:
    """``os.open`` with ``O_NOFOLLOW``: a link at ``path`` is refused, and so is anything
    but a plain file (checked on the open descriptor)."""
    try:
        fd = os.open(path, flags | os.O_NOFOLLOW | os.O_CLOEXEC, mode)
    except OSError as exc:
        if exc.errno == errno.ELOOP:
            raise link_refused(path) from exc
        if exc.errno == errno.EISDIR:
            raise _wrong_kind(path, "plain file") from exc
        if exc.errno == errno.EEXIST and flags & os.O_EXCL:
            refuse_link(path)
        raise
    try:
        if not stat.S_ISREG(os.fstat(fd).st_mode):
            raise _wrong_kind(path, "plain file")
    except BaseException:
        os.close(fd)
        raise
    return fd


def new_temp_file(folder: Path, prefix: str, suffix: str = "") -> tuple[int, Path]:
    """A new file in ``folder`` under a random name, created with ``O_EXCL`` (a link already
    there is never followed) and readable by others (0644, as stored files are). The folder
    itself must have been checked by the caller (or be the user's own choice)."""
    fd, name = tempfile.mkstemp(prefix=prefix, suffix=suffix, dir=folder)
    try:
        os.fchmod(fd, 0o644)  # mkstemp makes 0600; released hard links would inherit it
    except BaseException:
        os.close(fd)
        Path(name).unlink(missing_ok=True)
        raise
    return fd, Path(name)


def write_new_file(path: Path, text: str) -> None:
    """Create ``path`` with ``text``; anything already there (a link included) is refused."""
    try:
        fd = open_own_file(path, os.O_WRONLY | os.O_CREAT | os.O_EXCL)
    except FileExistsError as exc:
        raise PathRefused(f"{path} appeared while collector was writing it; run the command "
                          "again") from exc
    with os.fdopen(fd, "w", encoding="utf-8") as fh:
        fh.write(text)
        fh.flush()
        os.fsync(fh.fileno())


def replace_file(path: Path, data: bytes | str) -> None:
    """Write a whole file: a new temp file in the same folder (O_EXCL, 0644), then
    ``os.replace``, which replaces a link at ``path`` instead of writing through it."""
    fd, tmp = new_temp_file(path.parent, f".{path.name}.")
    try:
        with os.fdopen(fd, "wb") as fh:
            fh.write(data.encode("utf-8") if isinstance(data, str) else data)
        os.replace(tmp, path)
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise


def remove_own_file(path: Path) -> None:
    """Remove ``path`` if it is there: a plain file, or a link (removed as a link, never
    followed); a folder there is refused."""
    try:
        info = os.lstat(path)
    except FileNotFoundError:
        return
    if stat.S_ISDIR(info.st_mode):
        raise _wrong_kind(path, "plain file")
    with contextlib.suppress(FileNotFoundError):
        os.unlink(path)


def refuse_ledger_links(path: Path) -> None:
    """A ledger (or a -wal/-shm/-journal beside it) that is a link is refused: SQLite would
    follow it and write through it."""
    for candidate in (path, *(path.with_name(path.name + s) for s in LEDGER_SIDECARS)):
        refuse_link(candidate)


class NotARegularFile(OSError):
    """A local file turned out to be a FIFO, socket, device or folder when it was opened."""


def open_regular(path: Path) -> BinaryIO:
    """Open a local file for reading only if it is a regular file: opened non-blocking (a
    FIFO would otherwise block until a writer comes) and checked with fstat before any read."""
    fd = os.open(path, os.O_RDONLY | os.O_NONBLOCK)
    try:
        mode = os.fstat(fd).st_mode
        if not stat.S_ISREG(mode):
            raise NotARegularFile(errno.EINVAL, "not a regular file (FIFO, socket, device or "
                                                "folder); not read", str(path))
        os.set_blocking(fd, True)
        return os.fdopen(fd, "rb")
    except BaseException:
        os.close(fd)
        raise
