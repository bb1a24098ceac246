"""The disk fills up during a run (ENOSPC simulated on the store's rename or on the download's
write): the run stops cleanly with a clear message and exit code 1, the ledger stays
consistent (recovery finds nothing dangling), and once space is back the resumed run ends
exactly like an uninterrupted one.

ENOSPC is "No space left on device" (POSIX errno, IEEE Std 1003.1, <errno.h>).
"""

from __future__ import annotations

import errno
import os
from collections.abc import Callable
from pathlib import Path
from typing import Any

import pytest
from support.collections import Gathered, one_page_recipe
from typer.testing import CliRunner

from collector.cli import app
from collector.demo_site import DemoServer
from collector.run.gather import gather
from collector.storage.collection import Collection, init_collection, recover


def outcome(col: Collection) -> set[tuple]:
    """Every item's (key, state, reason, sha256)."""
    with col.ledger(readonly=True) as ledger:
        return {tuple(r.values()) for r in ledger.query(
            "SELECT source_key, state, reason, file_sha256 FROM items")}


def enospc() -> OSError:
    """The error a full disk gives."""
    return OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))


class FullAfter:
    """Counts calls; from call ``n + 1`` on, raises ENOSPC instead of calling through."""

    def __init__(self, real: Callable[..., Any], n: int) -> None:
        self.real, self.n, self.calls = real, n, 0

    def __call__(self, *args: Any, **kwargs: Any) -> Any:
        self.calls += 1
        if self.calls > self.n:
            raise enospc()
        return self.real(*args, **kwargs)


class _FullFile:
    """A file object whose writes fail with ENOSPC once ``budget`` bytes are written."""

    def __init__(self, fh: Any, state: dict[str, int]) -> None:
        self._fh, self._state = fh, state

    def write(self, data: bytes) -> int:
        if self._state["left"] < len(data):
            raise enospc()
        self._state["left"] -= len(data)
        return self._fh.write(data)

    def __getattr__(self, name: str) -> Any:
        return getattr(self._fh, name)

    def __enter__(self) -> _FullFile:
        return self

    def __exit__(self, *exc: object) -> None:
        self._fh.close()


@pytest.fixture(scope="module")
def reference(page_gathered: Gathered) -> set[tuple]:
    """The outcome of an uninterrupted run of the small recipe (the session's
    ``page_gathered``, conftest.py, read only)."""
    assert page_gathered.result.outcome == "finished"
    result = outcome(Collection(page_gathered.root))
    assert len(result) == 10
    return result


def run_cli(col: Collection) -> Any:
    """`collector gather COL --quiet` in this process."""
    return CliRunner().invoke(app, ["gather", str(col.root), "--quiet"])


def check_clean_stop(col: Collection, result: Any) -> None:
    """Exit 1, a disk-full message, a 'failed: the disk is full' run, nothing dangling."""
    assert result.exit_code == 1, result.output
    assert "failed: the disk is full" in result.output
    assert "Traceback" not in result.output
    with col.ledger() as ledger:
        runs = ledger.query("SELECT outcome FROM runs ORDER BY id")
        assert runs[-1]["outcome"].startswith("failed: the disk is full")
        stored = ledger.query("SELECT count(*) AS n FROM items WHERE state = 'stored'")[0]["n"]
        assert stored >= 1  # some files got in before the disk filled
        rec = recover(col, ledger)
    assert (rec.temp_files_removed, rec.orphan_files_removed, rec.rows_reset) == (0, 0, 0)


def test_disk_full_on_the_store_rename_stops_cleanly_and_resumes_to_the_same_result(
        fresh_demo_server: DemoServer, reference: set[tuple], tmp_path: Path,
        monkeypatch: pytest.MonkeyPatch) -> None:
    """os.replace fails with ENOSPC after 3 files: exit 1 with the disk-full message, a
    consistent ledger, then a resume equal to an uninterrupted run."""
    col = init_collection(tmp_path / "col", contact="x@example.org")
    col.recipe_path.write_text(one_page_recipe(fresh_demo_server.port))
    monkeypatch.setattr(os, "replace", FullAfter(os.replace, 3))
    result = run_cli(col)
    monkeypatch.undo()
    check_clean_stop(col, result)
    assert gather(col).outcome == "finished"
    assert outcome(col) == reference


def test_disk_full_while_downloading_stops_cleanly_and_resumes_to_the_same_result(
        fresh_demo_server: DemoServer, reference: set[tuple], tmp_path: Path,
        monkeypatch: pytest.MonkeyPatch) -> None:
    """Writes of downloaded bytes fail with ENOSPC after ~100 KB: exit 1 with the disk-full
    message, a consistent ledger, then a resume equal to an uninterrupted run."""
    col = init_collection(tmp_path / "col", contact="x@example.org")
    col.recipe_path.write_text(one_page_recipe(fresh_demo_server.port))
    state = {"left": 100_000}
    real_fdopen = os.fdopen

    def fdopen(fd: int, mode: str = "r", *args: Any, **kwargs: Any) -> Any:
        fh = real_fdopen(fd, mode, *args, **kwargs)
        return _FullFile(fh, state) if "w" in mode else fh

    monkeypatch.setattr(os, "fdopen", fdopen)
    result = run_cli(col)
    monkeypatch.undo()
    check_clean_stop(col, result)
    assert gather(col).outcome == "finished"
    assert outcome(col) == reference
