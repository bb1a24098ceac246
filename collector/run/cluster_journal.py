"""A batch's journal: what a cluster task has fetched, written durably item by item, so that
a task Dask runs again (its worker died) takes the finished items from it instead of asking
the host again, and knows that it is a rerun.

The journal is a file beside the batch's files in the collection's incoming folder (the shared
folder of a cluster run; without a shared folder a task keeps no journal). Its name comes
from the task's key, so a rerun of the task (same key, same spec) opens the same file. It is
created, with O_EXCL, before the task's first request: a journal that exists already means an
earlier attempt may have contacted the host, so the rerun waits one full interval before its
first request (scale.md lesson 2). After every image, one line: the job's result, the
``fetches`` rows and host facts it owes the ledger, the attempt that wrote it; flushed and
fsynced before the next request. A line cut short by a killed process is ignored (that item is
fetched again: it was in flight).

Once the coordinator has a batch's result it appends a "collected" line. Dask may still run
the task again (a worker holding the finished result dies before the scheduler hears that the
coordinator released it): that attempt finds the line and asks nothing, and an attempt already
running stops before its next request. The coordinator deletes the run's journals at its end
(the next run's start clears the incoming folder of any left behind).

Lines are JSON (bytes as ``{"bytes": base64}``), never pickles: a journal is data read back
from a shared folder, and reading it must not run anything whoever wrote it put there. A
line that is not a whole record of the expected shape is passed over like a line cut short.
"""

from __future__ import annotations

import base64
import binascii
import contextlib
import dataclasses
import json
import os
import socket
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

SUFFIX = ".journal"


def journal_name(key: str) -> str:
    """The journal's file name for the task with Dask key ``key`` (no ":" of the host's
    port: a shared folder may be on a file system that refuses it)."""
    return f"{key.replace(':', '_')}{SUFFIX}"


def attempt_id() -> str:
    """Who writes: this machine and process (a bench finds the killed worker's lines)."""
    return f"{socket.gethostname()}:{os.getpid()}"


def clock_id() -> str:
    """The wall clock this process reads: the kernel's boot id on Linux (every process of one
    booted machine reads the same clock), "" where unknown. Times written on one clock are
    compared exactly only with the same clock."""
    try:
        return Path("/proc/sys/kernel/random/boot_id").read_text().strip()
    except OSError:
        return ""


@dataclass
class Entry:
    """One finished image of a batch, as journaled."""

    by: str
    result: Any  # collector.run.cluster_task.JobResult
    fetches: list[dict[str, Any]] = field(default_factory=list)
    host_updates: list[tuple[str, dict[str, Any]]] = field(default_factory=list)


COLLECTED = {"collected": True}  # the journal's last line once the coordinator has the result


def _plain(value: Any) -> Any:
    """``value`` with bytes as {"bytes": base64} and tuples as lists, for JSON."""
    if isinstance(value, bytes):
        return {"bytes": base64.b64encode(value).decode("ascii")}
    if isinstance(value, dict):
        return {k: _plain(v) for k, v in value.items()}
    if isinstance(value, list | tuple):
        return [_plain(v) for v in value]
    return value


def _restored(value: Any) -> Any:
    """The inverse of :func:`_plain` (lists stay lists)."""
    if isinstance(value, dict):
        if value.keys() == {"bytes"}:
            return base64.b64decode(value["bytes"], validate=True)
        return {k: _restored(v) for k, v in value.items()}
    if isinstance(value, list):
        return [_restored(v) for v in value]
    return value


def _line(record: dict[str, Any]) -> bytes:
    return json.dumps(_plain(record), separators=(",", ":")).encode() + b"\n"


def _entry(record: dict[str, Any]) -> Entry:
    """An entry line's record as an :class:`Entry` (TypeError/KeyError when malformed)."""
    from collector.run.cluster_task import JobResult  # the task module imports this one

    body = _restored(record["entry"])
    return Entry(str(body["by"]), JobResult(**body["result"]), list(body["fetches"]),
                 [(str(host), dict(fields)) for host, fields in body["host_updates"]])


def read_journal(path: Path) -> tuple[list[str], list[Entry], bool]:
    """The attempts that opened the journal, its whole entries in order, and whether the
    coordinator has collected the batch (a line cut short is passed over)."""
    attempts: list[str] = []
    entries: list[Entry] = []
    try:
        lines = path.read_bytes().split(b"\n")
    except FileNotFoundError:
        return attempts, entries, False
    collected = False
    for line in filter(None, lines):
        try:
            record = json.loads(line)
            if not isinstance(record, dict):
                continue
            if "entry" in record:
                entries.append(_entry(record))
            elif isinstance(record.get("attempt"), str):
                attempts.append(record["attempt"])
            collected = collected or record == COLLECTED
        except (binascii.Error, ValueError, TypeError, KeyError, AttributeError):
            continue  # cut short by a killed attempt, or not a record of ours
    return attempts, entries, collected


def mark_collected(path: Path) -> None:
    """The coordinator has the batch's result: no attempt of the task asks anything more.
    The line starts on a line of its own (after a killed attempt's cut line)."""
    fd = os.open(path, os.O_WRONLY | os.O_CREAT | os.O_APPEND, 0o600)
    try:
        os.write(fd, b"\n" + _line(COLLECTED))
        os.fsync(fd)
    finally:
        os.close(fd)


class Journal:
    """The journal of one attempt of a task (see the module doc); ``path`` None: none kept."""

    def __init__(self, path: Path | None) -> None:
        self.path = path
        self.rerun = False
        self.earlier: dict[int, Entry] = {}
        self._fd: int | None = None
        self._size = 0  # the file's size after this attempt's latest line
        self._collected = False
        self._by = attempt_id()
        if path is None:
            return
        try:
            self._open(path)
        except OSError:  # no journal (the folder refuses it): treated as a rerun, no exact
            self.close()  # spacing, and a rerun of this attempt fetches everything again
            self.path, self.rerun = None, True

    def _open(self, path: Path) -> None:
        try:
            self._fd = os.open(path, os.O_WRONLY | os.O_CREAT | os.O_EXCL | os.O_APPEND, 0o600)
        except FileExistsError:
            self.rerun = True
            _, entries, self._collected = read_journal(path)
            self.earlier = {e.result.item_id: e for e in entries}
            self._fd = os.open(path, os.O_WRONLY | os.O_APPEND)
            os.write(self._fd, b"\n")  # after a line cut short by the killed attempt
        self._write({"attempt": self._by})

    def collected(self) -> bool:
        """Has the coordinator the batch's result already? (Checked before every request:
        one fstat while nobody else wrote.)"""
        if self._fd is not None and not self._collected \
                and os.fstat(self._fd).st_size != self._size:
            assert self.path is not None
            self._collected = read_journal(self.path)[2]
        return self._collected

    def taken(self, item_id: int) -> Entry | None:
        """The item's entry from an earlier attempt, when its file is still there."""
        entry = self.earlier.get(item_id)
        if entry is None:
            return None
        path = getattr(entry.result, "path", None)
        if entry.result.kind == "file" and (path is None or not os.path.exists(path)):
            return None
        return entry

    def add(self, result: Any, fetches: list[dict[str, Any]],
            host_updates: list[tuple[str, dict[str, Any]]]) -> None:
        """Record one finished image durably before the next request."""
        if self._fd is not None and result.kind != "skipped":
            try:
                self._write({"entry": {"by": self._by, "result": dataclasses.asdict(result),
                                       "fetches": fetches, "host_updates": host_updates}})
            except OSError:  # a full disk: the task goes on without (a rerun asks again)
                self.close()

    def _write(self, record: dict[str, Any]) -> None:
        assert self._fd is not None
        os.write(self._fd, _line(record))
        os.fsync(self._fd)
        self._size = os.fstat(self._fd).st_size

    def close(self) -> None:
        if self._fd is not None:
            with contextlib.suppress(OSError):
                os.close(self._fd)
            self._fd = None
