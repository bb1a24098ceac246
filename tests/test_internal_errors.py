"""A bug in collector never ends a run as "finished": an exception injected into a listing
thread, a host worker or the local ingest fails the item in hand, ends the run
``failed: internal error in ...`` with exit 1, leaves the traceback in the folder's error log
and the ledger's notes, loses nothing stored, and the next run resumes. SIGTERM ends a run
like Ctrl-C.
"""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

import pytest
from support.collections import one_page_recipe
from typer.testing import CliRunner

from collector.cli import app
from collector.demo_site import DemoServer
from collector.run.ingest import Ingest
from collector.run.scheduling import Gatherer, RunResult
from collector.storage.collection import Collection, init_collection


class Injected(RuntimeError):
    """The stand-in for a bug."""


class FailOn:
    """Calls through, except that call number ``n`` (1-based) raises :class:`Injected`."""

    def __init__(self, real: Callable[..., Any], n: int) -> None:
        self.real, self.n, self.calls = real, n, 0

    def __call__(self, *args: Any, **kwargs: Any) -> Any:
        self.calls += 1
        if self.calls == self.n:
            raise Injected("injected for the test")
        return self.real(*args, **kwargs)


def _method(fail: FailOn) -> Callable[..., Any]:
    """``fail`` as a plain function, so that monkeypatching a method passes ``self``."""
    def method(self: Any, *args: Any, **kwargs: Any) -> Any:
        return fail(self, *args, **kwargs)
    return method




def states(col: Collection) -> dict[str, str]:
    """source_key -> state of every item."""
    with col.ledger(readonly=True) as ledger:
        return {r["source_key"]: r["state"]
                for r in ledger.query("SELECT source_key, state FROM items")}


def last_run(col: Collection) -> dict[str, Any]:
    """The newest runs row."""
    with col.ledger(readonly=True) as ledger:
        return ledger.query("SELECT * FROM runs ORDER BY id DESC LIMIT 1")[0]


def stored_files(col: Collection) -> dict[str, bytes]:
    """Every stored file's name and bytes."""
    return {p.name: p.read_bytes() for _, p in col.store.iter_stored()}


@pytest.fixture
def web_collection(tmp_path: Path, fresh_demo_server: DemoServer) -> Collection:
    """A collection over ten items of the demo archive."""
    col = init_collection(tmp_path / "c", contact="me@example.org")
    col.recipe_path.write_text(one_page_recipe(fresh_demo_server.port))
    return col


def assert_failed_by_bug(col: Collection, result: Any, where: str) -> None:
    """Exit 1, outcome 'failed: internal error in <where>', traceback in log and notes."""
    assert result.exit_code == 1, result.output
    outcome = last_run(col)["outcome"]
    assert outcome.startswith(f"failed: internal error in {where}"), outcome
    log = col.error_log_path.read_text()
    assert "Traceback (most recent call last)" in log
    assert "Injected: injected for the test" in log
    with col.ledger(readonly=True) as ledger:
        notes = ledger.query("SELECT message FROM notes WHERE kind = 'internal_error'")
    assert len(notes) == 1
    assert "Injected: injected for the test" in notes[0]["message"]


def test_a_bug_in_a_host_worker_fails_the_run_and_the_next_run_resumes(
        web_collection: Collection, monkeypatch: pytest.MonkeyPatch) -> None:
    """The third download raises: that item is failed (internal_error), the run is failed
    (exit 1), stored files stay, and a clean rerun stores all ten without refetching."""
    col = web_collection
    monkeypatch.setattr(Gatherer, "_fetch_and_ingest",
                        _method(FailOn(Gatherer._fetch_and_ingest, 3)))
    result = CliRunner().invoke(app, ["gather", str(col.root), "--quiet"])
    assert_failed_by_bug(col, result, "the worker for host 127.0.0.1:")
    with col.ledger(readonly=True) as ledger:
        failed = ledger.query("SELECT reason, detail FROM items WHERE state = 'failed'")
    assert [r["reason"] for r in failed] == ["internal_error"]
    assert "internal error in the worker for host" in failed[0]["detail"]
    kept = stored_files(col)
    assert kept  # the two downloads before the bug were stored

    monkeypatch.undo()
    again = CliRunner().invoke(app, ["gather", str(col.root), "--quiet"])
    assert again.exit_code == 0, again.output
    assert last_run(col)["outcome"] == "finished"
    assert set(states(col).values()) <= {"stored", "duplicate", "near_duplicate", "rejected",
                                         "skipped"}
    assert len(states(col)) == 10
    after = stored_files(col)
    assert all(after[name] == data for name, data in kept.items())
    with col.ledger(readonly=True) as ledger:
        refetched = ledger.scalar(
            "SELECT count(*) FROM fetches f JOIN items i ON i.id = f.item_id "
            "WHERE f.purpose = 'image' AND f.run_id = 2 AND i.file_sha256 IN "
            f"({','.join('?' * len(kept))})", tuple(n.split('.')[0] for n in kept))
    assert refetched == 0


def test_a_bug_in_a_listing_thread_fails_the_run_and_the_next_run_resumes(
        web_collection: Collection, monkeypatch: pytest.MonkeyPatch) -> None:
    """Admitting the fourth candidate raises: the run is failed (exit 1) instead of
    'finished', and a clean rerun lists and stores every item."""
    col = web_collection
    monkeypatch.setattr(Ingest, "_decide", _method(FailOn(Ingest._decide, 4)))
    result = CliRunner().invoke(app, ["gather", str(col.root), "--quiet"])
    assert_failed_by_bug(col, result, "the listing of source 'api-pages'")
    kept = stored_files(col)
    # The listing stopped at the bug. The fourth candidate is failed (internal_error); the
    # others of its group (collector.run.listed: the candidates of its page) were decided
    # as usual and queued: an image already under way when the run failed is finished and
    # stored (a failing run lets in-flight files land), the others stay pending.
    with col.ledger(readonly=True) as ledger:
        failed = ledger.query("SELECT reason, detail FROM items WHERE state = 'failed'")
    assert [r["reason"] for r in failed] == ["internal_error"]
    assert "Injected: injected for the test" in failed[0]["detail"]
    found = states(col)
    assert 4 <= len(found) <= 10
    assert set(found.values()) <= {"pending", "stored", "failed"}

    monkeypatch.undo()
    again = CliRunner().invoke(app, ["gather", str(col.root), "--quiet"])
    assert again.exit_code == 0, again.output
    assert len(states(col)) == 10
    after = stored_files(col)
    assert all(after[name] == data for name, data in kept.items())


def test_a_bug_in_local_ingest_fails_the_item_and_the_run(tmp_path: Path,
                                                          monkeypatch: pytest.MonkeyPatch) -> None:
    """A scans source runs ingest in its listing thread: a bug there is an internal error
    too (not a silently shortened source)."""
    from PIL import Image

    col = init_collection(tmp_path / "c", contact="me@example.org")
    (col.root / "in").mkdir()
    for n in range(3):
        Image.new("RGB", (80, 60), (40 * n, 90, 200 - 30 * n)).save(col.root / "in" / f"{n}.png")
    col.recipe_path.write_text(col.recipe_path.read_text() + (
        '\n[[sources]]\nname = "desk"\nkind = "scans"\npath = "in"\ninclude = ["*.png"]\n'
        'licence = "CC0-1.0"\n'))
    monkeypatch.setattr(Ingest, "ingest_local", _method(FailOn(Ingest.ingest_local, 2)))
    result = CliRunner().invoke(app, ["gather", str(col.root), "--quiet"])
    assert_failed_by_bug(col, result, "the listing of source 'desk'")


def test_the_error_log_refuses_a_planted_symlink(tmp_path: Path) -> None:
    """errors.log is opened without following symlinks: a link to an outside file is refused
    and the outside file is unchanged."""
    from collector.errors import CollectionError

    col = init_collection(tmp_path / "c", contact="me@example.org")
    outside = tmp_path / "outside.txt"
    outside.write_text("keep me")
    col.error_log_path.symlink_to(outside)
    with pytest.raises(CollectionError, match="is a symbolic link"):
        col.append_error_log("x")
    assert outside.read_text() == "keep me"


def test_sigterm_ends_a_run_like_ctrl_c(web_collection: Collection,
                                        fresh_demo_server: DemoServer) -> None:
    """SIGTERM during a gather: exit 143 (128 + 15, common practice, no source), the run is
    marked 'interrupted' (not left 'running'), and no traceback is printed."""
    col = web_collection
    # Slow the run down so that it is surely still going when the signal arrives.
    col.recipe_path.write_text(col.recipe_path.read_text().replace("min_interval = 0.1",
                                                                   "min_interval = 0.5"))
    proc = subprocess.Popen([sys.executable, "-m", "collector", "gather", str(col.root),
                             "--quiet"], stdout=subprocess.PIPE, stderr=subprocess.PIPE)
    deadline = time.monotonic() + 60
    while time.monotonic() < deadline:
        if col.ledger_path.exists():
            with col.ledger(readonly=True) as ledger:
                if ledger.scalar("SELECT count(*) FROM fetches WHERE purpose = 'image'"):
                    break
        time.sleep(0.1)
    os.kill(proc.pid, signal.SIGTERM)
    _, err = proc.communicate(timeout=60)
    assert proc.returncode == 143, err.decode()
    assert b"Traceback" not in err
    assert last_run(col)["outcome"] == "interrupted"


def test_exit_code_143_for_a_terminated_run() -> None:
    """A run interrupted by SIGTERM exits 143, by Ctrl-C 130 (128 + signal number, common
    practice, no source)."""
    assert RunResult(1, "interrupted", terminated=True).exit_code == 143
    assert RunResult(1, "interrupted").exit_code == 130


def test_sigterm_is_handled_from_the_first_statement_of_the_run(
        tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    """The slow start (first imports, the run's row) runs before the SIGTERM handler is
    installed, so a SIGTERM then ends the process as usual (the next run marks the run
    killed) instead of escaping as an uncaught exception; from the run loop's first statement
    on, the handler is in place and inside its try."""
    import collector.run.scheduling as scheduling

    col = init_collection(tmp_path / "c", contact="me@example.org")
    (col.root / "in").mkdir()
    col.recipe_path.write_text(col.recipe_path.read_text() + (
        '\n[[sources]]\nname = "desk"\nkind = "scans"\npath = "in"\nlicence = "CC0-1.0"\n'))
    seen: dict[str, Any] = {}
    real_start, real_run = Gatherer._start, Gatherer._run

    def start(self: Gatherer, options: Any) -> None:
        seen["at start"] = signal.getsignal(signal.SIGTERM)
        real_start(self, options)

    def run(self: Gatherer) -> RunResult:
        seen["at run"] = signal.getsignal(signal.SIGTERM)
        return real_run(self)

    monkeypatch.setattr(Gatherer, "_start", start)
    monkeypatch.setattr(Gatherer, "_run", run)
    before = signal.getsignal(signal.SIGTERM)
    from collector.run.gather import gather

    gather(col, fetcher_factory=lambda recipe, ledger: None)
    assert seen["at start"] is before
    assert seen["at run"] is scheduling._raise_terminated
    assert signal.getsignal(signal.SIGTERM) is before  # put back after the run
