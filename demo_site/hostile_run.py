"""Running ``collector gather`` against the hostile archive and judging the ledger it leaves.

``run_gather`` starts a child process (it does not import ``collector``: like a user, it runs
``python -m collector``) and reaps it with ``os.wait4`` for its own peak RSS. ``judge`` reads
one case's outcome through any ledger object with a ``query`` method and compares it with the
table in ``demo_site.hostile``. Used by ``tests/test_hostile.py`` and ``bench/hostile.py``.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
import threading
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from collector.demo_site.hostile import Case


@dataclass
class RunStats:
    """A gather subprocess: exit code, peak RSS (KiB), wall seconds, stderr."""

    returncode: int
    max_rss_kib: int
    seconds: float
    stderr: str
    stdout: str = ""


def run_gather(folder: Path, *extra: str, timeout: float = 120.0,
               env: dict[str, str] | None = None, cwd: Path | None = None) -> RunStats:
    """Run ``collector gather FOLDER`` in a child process, reaped with ``os.wait4`` for its
    own peak RSS (``ru_maxrss``, KiB on Linux)."""
    started = time.monotonic()
    proc = subprocess.Popen([sys.executable, "-m", "collector", "gather", str(folder), *extra],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                            env={**os.environ, **(env or {})}, cwd=cwd)
    chunks: dict[str, bytes] = {}

    def drain(name: str, stream: Any) -> None:
        chunks[name] = stream.read()

    readers = [threading.Thread(target=drain, args=(n, s), daemon=True)
               for n, s in (("out", proc.stdout), ("err", proc.stderr))]
    for r in readers:
        r.start()
    deadline = time.monotonic() + timeout
    while True:
        pid, wstatus, usage = os.wait4(proc.pid, os.WNOHANG)
        if pid:
            break
        if time.monotonic() > deadline:
            proc.kill()
            os.wait4(proc.pid, 0)
            raise TimeoutError(f"gather did not end within {timeout} s")
        time.sleep(0.05)
    proc.returncode = os.waitstatus_to_exitcode(wstatus)
    for r in readers:
        r.join()
    return RunStats(proc.returncode, usage.ru_maxrss, time.monotonic() - started,
                    chunks.get("err", b"").decode(errors="replace"),
                    chunks.get("out", b"").decode(errors="replace"))


@dataclass
class Verdict:
    """What the ledger says about one case, and whether that is the expected outcome."""

    case: Case
    outcome: str
    reason: str
    ok: bool
    problems: list[str] = field(default_factory=list)


def judge(ledger: Any, case: Case) -> Verdict:
    """Read the ledger's record of one case and compare it with the table."""
    problems: list[str] = []
    if case.kind == "image":
        rows = ledger.query(
            "SELECT i.state, i.reason, i.detail, f.flags FROM items i JOIN sources s "
            "ON s.id = i.source_id LEFT JOIN files f ON f.sha256 = i.file_sha256 "
            "WHERE s.name = 'lister' AND i.source_key = ?", (case.name,))
        if not rows:
            return Verdict(case, "no ledger row", "", False, ["the item was never recorded"])
        row = rows[0]
        flags = json.loads(row["flags"]) if row["flags"] else []
        outcome = row["state"]
        reason = row["reason"] or (", ".join(flags) if flags else "")
        if row["state"] != case.state:
            problems.append(f"state {row['state']!r}, expected {case.state!r}")
        if row["reason"] != case.reason:
            problems.append(f"reason {row['reason']!r}, expected {case.reason!r}")
        if case.state in ("failed", "rejected", "blocked", "deferred") and not row["detail"]:
            problems.append("no detail text")
        if case.flag and case.flag not in flags:
            problems.append(f"flags {flags}, expected {case.flag!r}")
        if case.signal:
            seen = [r["value"] for r in ledger.query(
                "SELECT r.value FROM reservation_signals r JOIN items i ON i.id = r.item_id "
                "WHERE i.source_key = ?", (case.name,))]
            if not any(case.signal in v for v in seen):
                problems.append(f"reservation signals {seen}, expected {case.signal!r}")
        return Verdict(case, outcome, reason, not problems, problems)
    notes = [r["kind"] for r in ledger.query(
        "SELECT n.kind FROM notes n JOIN sources s ON s.id = n.source_id WHERE s.name = ?",
        (case.name,))]
    items = ledger.query(
        "SELECT i.state FROM items i JOIN sources s ON s.id = i.source_id WHERE s.name = ?",
        (case.name,))
    states = sorted(r["state"] for r in items)
    if case.reason is not None and case.reason not in notes:
        problems.append(f"notes {notes}, expected {case.reason!r}")
    if case.reason is None and notes:
        problems.append(f"unexpected notes {notes}")
    if any(s != "stored" for s in states):
        problems.append(f"item states {states}, expected all stored")
    if case.reason in (None, "loop") and not states:
        problems.append("no item was listed")
    outcome = f"note; {len(states)} item(s) stored" if notes else f"{len(states)} item(s) stored"
    return Verdict(case, outcome, ", ".join(notes) or "-", not problems, problems)
