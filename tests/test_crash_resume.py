"""Crash safety: a gather killed with SIGKILL at several points, then resumed, ends exactly
like an uninterrupted run, and never fetches again what it had already stored.

The archive runs in this test process; the collector runs in a subprocess that is killed.
Both the server's request log and this process use the same monotonic clock, so "after the
kill" is judged on the server's own timestamps.
"""

from __future__ import annotations

import hashlib
import os
import signal
import sqlite3
import subprocess
import sys
import time
from pathlib import Path

import pytest
from support.collections import Gathered
from support.probes import files_count

from collector.demo_site import DemoServer
from collector.run.gather import gather
from collector.storage.collection import Collection, init_collection


def outcome(col: Collection) -> set[tuple]:
    """Every item's (source, key, state, reason, sha256), and nothing else."""
    with col.ledger(readonly=True) as ledger:
        return {tuple(r.values()) for r in ledger.query(
            "SELECT s.name, i.source_key, i.state, i.reason, i.file_sha256 FROM items i "
            "JOIN sources s ON s.id = i.source_id")}


def stored_urls(ledger_path: Path) -> set[str]:
    """Image URLs of items committed as stored (read with plain sqlite3, as a bystander)."""
    conn = sqlite3.connect(ledger_path, timeout=30)
    try:
        return {r[0] for r in conn.execute(
            "SELECT image_url FROM items WHERE state IN ('stored', 'near_duplicate') "
            "AND image_url IS NOT NULL")}
    finally:
        conn.close()


def run_and_kill(col: Collection, files_at_least: int, timeout: float = 90) -> None:
    """Start `collector gather` in a subprocess and SIGKILL it once the ledger holds
    ``files_at_least`` stored files (0: about half a second after it started)."""
    proc = subprocess.Popen([sys.executable, "-m", "collector", "gather", str(col.root),
                             "--quiet"], stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
    started = time.monotonic()
    try:
        while proc.poll() is None and time.monotonic() - started < timeout:
            if files_at_least == 0:
                if time.monotonic() - started > 0.5:
                    break
            elif files_count(col.ledger_path) >= files_at_least:
                break
            time.sleep(0.02)
        assert proc.poll() is None, f"the run ended before the kill: {proc.stderr.read()!r}"
        os.kill(proc.pid, signal.SIGKILL)
    finally:
        proc.wait()
        if proc.stderr:
            proc.stderr.close()
    assert proc.returncode == -signal.SIGKILL


@pytest.mark.slow
def test_killed_runs_resume_to_the_same_result_without_refetching(
        demo_gathered: Gathered, demo_server: DemoServer, tmp_path: Path) -> None:
    """SIGKILL at start-up and at 10, 40 and 80 stored files; the resumed run equals an
    uninterrupted one (item states and sha256 set), leaves no temp file, re-verifies every
    stored file's sha256, and never requests again an image it had already stored."""
    # The uninterrupted run: the session's gather of the same demo recipe from the same
    # server (conftest.py), read only.
    reference = Collection(demo_gathered.root)
    recipe = reference.recipe_path.read_text()

    col = init_collection(tmp_path / "killed", contact="x@example.org")
    col.recipe_path.write_text(recipe)
    demo_server.reset()
    kills: list[tuple[float, set[str]]] = []
    for point in (0, 10, 40, 80):
        run_and_kill(col, point)
        kills.append((time.monotonic(), stored_urls(col.ledger_path)))
    gather(col)

    for killed_at, done in kills:
        again = [r.path for r in demo_server.log if r.t > killed_at and r.status == 200
                 and any(url.endswith(r.path) for url in done)]
        assert again == []
    assert len(kills[-1][1]) > len(kills[1][1]) > 0
    with col.ledger(readonly=True) as ledger:
        outcomes = [r["outcome"] for r in ledger.query("SELECT outcome FROM runs ORDER BY id")]
    # The kill at start-up may come before the run's row exists.
    assert outcomes[-1] == "finished" and len(outcomes) >= 4
    assert set(outcomes[:-1]) == {"killed: did not end cleanly"}
    assert outcome(col) == outcome(reference)
    stored = dict(col.store.iter_stored())
    assert set(stored) == set(dict(reference.store.iter_stored()))
    assert list(col.store.incoming_dir.iterdir()) == []
    assert stored  # the resumed run stored the demo's files
    for sha, path in stored.items():
        assert hashlib.sha256(path.read_bytes()).hexdigest() == sha
