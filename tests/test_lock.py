"""Two `collector gather` processes on one collection folder: the second refuses with a clear
message while `status` and `trace` keep working during the first run; the lock dies with its
process (flock(2): the lock belongs to the open file description and is released on exit)."""

from __future__ import annotations

import os
import signal
import sqlite3
import subprocess
import sys
import time
from pathlib import Path

from collector.demo_site.hostile import CASES, HostileArchive
from collector.storage.collection import init_collection

SLOW = [c for c in CASES if c.name == "slow-drip"]


def cli(*args: str) -> subprocess.CompletedProcess[str]:
    """Run the collector command line in a child process."""
    return subprocess.run([sys.executable, "-m", "collector", *args], capture_output=True,
                          text=True, timeout=60)


def stored_sha(ledger: Path) -> str | None:
    """The sha256 of a stored file, read by a bystander connection, or None yet."""
    conn = sqlite3.connect(ledger, timeout=30)
    try:
        row = conn.execute("SELECT sha256 FROM files LIMIT 1").fetchone()
        return row[0] if row else None
    except sqlite3.OperationalError:
        return None
    finally:
        conn.close()


def test_a_second_gather_refuses_while_status_and_trace_work(tmp_path: Path) -> None:
    """While one gather holds the folder (held up by a slow-drip host), a second gather exits
    2 with "another gather is already running", status exits 0 and trace finds a stored file
    as an exact match; after the first is killed the lock can be taken again."""
    with HostileArchive(cases=SLOW, drip_interval=0.5) as archive:
        col = init_collection(tmp_path / "col", contact="x@example.org")
        col.recipe_path.write_text(archive.recipe(read_timeout=5.0, download_deadline=60.0))
        first = subprocess.Popen([sys.executable, "-m", "collector", "gather", str(col.root),
                                  "--quiet"], stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
        try:
            sha = None
            deadline = time.monotonic() + 30
            while sha is None and time.monotonic() < deadline and first.poll() is None:
                sha = stored_sha(col.ledger_path)
                time.sleep(0.05)
            assert sha is not None and first.poll() is None, "the first gather did not get going"

            second = cli("gather", str(col.root), "--quiet")
            assert second.returncode == 2
            assert "another gather is already running" in second.stderr
            assert f"process {first.pid}" in second.stderr
            assert "Traceback" not in second.stderr

            status = cli("status", str(col.root))
            assert status.returncode == 0, status.stderr
            assert "stored" in status.stdout

            stored = col.store.find(sha)
            assert stored is not None
            traced = cli("trace", str(stored), "--in", str(col.root))
            assert traced.returncode == 0, traced.stderr
            assert "exact" in traced.stdout
            assert first.poll() is None  # all of that happened during the first run
        finally:
            os.kill(first.pid, signal.SIGKILL)
            first.wait()
            if first.stderr:
                first.stderr.close()
    with col.gather_lock():
        pass  # released by the dead process: no error
