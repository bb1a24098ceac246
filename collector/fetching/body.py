"""Streaming one answer's body: a cap on decoded bytes, an overall deadline, and a temp file
(or memory) to hold it.

The fetcher calls :func:`read_body` once per answer that has content. Errors: ``TooLarge``
and ``DownloadTimeout`` (both with ``.size``, the bytes read so far),
:class:`collector.fetching.retry.Retryable`
for a read timeout or a broken connection, and ``StoreError`` when the temp file cannot be
written (a full disk stops the run, see :func:`write_error`).
"""

from __future__ import annotations

import contextlib
import errno
import hashlib
import os
from dataclasses import dataclass
from pathlib import Path
from typing import BinaryIO, Protocol

from collector.errors import DownloadTimeout, StoreError, TooLarge
from collector.fetching.budgets import Clock, Slot
from collector.fetching.retry import Retryable
from collector.fetching.transport import Answer, TransportError, TransportTimeout
from collector.storage.store import make_temp

CHUNK = 65536


@dataclass
class Body:
    """A read body: in memory (``data``) or in a temp file (``path``), with its sha256."""

    data: bytes | None = None
    path: Path | None = None
    sha256: str | None = None
    size: int = 0


class _Sink(Protocol):
    def write(self, chunk: bytes) -> None: ...

    def finish(self) -> None: ...

    def discard(self) -> None: ...

    def body(self, sha256: str, size: int) -> Body: ...


class _MemorySink:
    """Keeps the chunks in memory (pages, robots.txt)."""

    def __init__(self) -> None:
        self.chunks: list[bytes] = []

    def write(self, chunk: bytes) -> None:
        self.chunks.append(chunk)

    def finish(self) -> None:
        return None

    def discard(self) -> None:
        return None

    def body(self, sha256: str, size: int) -> Body:
        return Body(data=b"".join(self.chunks), path=None, sha256=sha256, size=size)


class _FileSink:
    """Writes the chunks to a new temp file in ``folder`` (made with O_EXCL by
    :func:`collector.storage.store.make_temp`, so never through a link), fsynced at the end;
    :meth:`discard` closes and removes it."""

    def __init__(self, folder: Path) -> None:
        self.folder = folder
        try:
            folder.mkdir(parents=True, exist_ok=True)
            fd, self.path = make_temp(folder, prefix=".part-")
        except OSError as exc:
            raise write_error(exc, folder) from exc
        self.handle: BinaryIO | None = os.fdopen(fd, "wb")

    def write(self, chunk: bytes) -> None:
        assert self.handle is not None
        try:
            self.handle.write(chunk)
        except OSError as exc:
            raise write_error(exc, self.folder) from exc

    def finish(self) -> None:
        assert self.handle is not None
        try:
            self.handle.flush()
            os.fsync(self.handle.fileno())
            self.handle.close()
        except OSError as exc:
            raise write_error(exc, self.folder) from exc
        self.handle = None

    def discard(self) -> None:
        if self.handle is not None:
            with contextlib.suppress(OSError):  # flushing on a full disk fails again
                self.handle.close()
        self.path.unlink(missing_ok=True)

    def body(self, sha256: str, size: int) -> Body:
        return Body(data=None, path=self.path, sha256=sha256, size=size)


def read_body(resp: Answer, *, shown: str, max_bytes: int, dest_dir: Path | None,
              slot: Slot, truncate: bool, clock: Clock, deadline_s: float) -> Body:
    """Stream the body with a decoded-byte cap and an overall deadline (libraries.md §6).

    With ``dest_dir`` the body goes to a temp file there, else into memory. With ``truncate``
    (robots.txt) bytes past ``max_bytes`` are dropped instead of raising TooLarge.
    """
    length = resp.headers.get("Content-Length")
    if not truncate and length and length.isdigit() and int(length) > max_bytes:
        raise TooLarge(shown, max_bytes, f"Content-Length {int(length):,} bytes")
    deadline = clock.monotonic() + deadline_s
    digest = hashlib.sha256()
    size = 0
    sink: _Sink = _FileSink(dest_dir) if dest_dir is not None else _MemorySink()
    try:
        while True:
            chunk = _next_chunk(resp)
            if chunk:
                chunk = _capped(chunk, size, max_bytes, shown, truncate)
                size += len(chunk)
                slot.add_bytes(len(chunk))
                digest.update(chunk)
                sink.write(chunk)
                if truncate and size >= max_bytes:
                    break
            elif resp.ended:
                break
            if clock.monotonic() > deadline:
                err = DownloadTimeout(shown, deadline_s)
                err.size = size  # type: ignore[attr-defined]
                raise err
        sink.finish()
    except BaseException:
        sink.discard()
        raise
    return sink.body(digest.hexdigest(), size)


def _next_chunk(resp: Answer) -> bytes:
    """The next decoded bytes that have arrived: "" at the end of the body
    (``resp.ended``), or when compressed bytes arrived that decoded to nothing yet."""
    try:
        # read_some returns what has arrived, and comes back after every read from the
        # network, so the deadline check in read_body runs even against a server that drips
        # one byte at a time (libraries.md §6) or sends compressed data that never decodes
        # to anything (empty deflate blocks).
        return resp.read_some(CHUNK)
    except TransportTimeout as exc:
        raise Retryable("timeout", resp.status_code, f"read timeout: {exc}") from None
    except TransportError as exc:  # reset, a body shorter than its length, corrupt coding
        raise Retryable("connection", resp.status_code, str(exc)) from None


def _capped(chunk: bytes, size: int, max_bytes: int, shown: str, truncate: bool) -> bytes:
    """``chunk`` if it stays within the cap; cut to fit when truncating, else TooLarge."""
    if size + len(chunk) <= max_bytes:
        return chunk
    if truncate:  # robots.txt: parse the first MAX bytes (RFC 9309 §2.5)
        return chunk[: max_bytes - size]
    err = TooLarge(shown, max_bytes, f"at least {size + len(chunk):,} bytes once decoded")
    err.size = size + len(chunk)  # type: ignore[attr-defined]
    raise err


def write_error(exc: OSError, folder: Path | None) -> StoreError:
    """A local write failure while saving a download: the run must stop, not the worker die."""
    if exc.errno == errno.ENOSPC:
        return StoreError(f"the disk is full while downloading into {folder}; free some space "
                          "and run again (the collection resumes where it stopped)",
                          errno=exc.errno)
    return StoreError(f"cannot write a download into {folder}: {exc}", errno=exc.errno)


def exc_size(exc: BaseException) -> int | None:
    """Bytes read before a TooLarge/DownloadTimeout was raised, if known."""
    return getattr(exc, "size", None)
