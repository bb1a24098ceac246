"""SIGKILL at random points: `collector gather` over the demo archive is killed again and
again (random delays from a fixed seed); after each kill the resume's first step
(collection.recover) runs and the folder is checked:

- every stored file has its ledger row, and every files row points at a file whose bytes
  hash to its name (sha256 re-verified, FIPS 180-4 via hashlib);
- no temp file remains in files/.incoming;
- no image already stored before a kill was served again after it (the server's own log);
- at the end, a last resume finishes and equals an uninterrupted run.

Prints one row per kill. Usage: python bench/crash.py [kills] [seed]
"""

from __future__ import annotations

import hashlib
import os
import random
import signal
import sqlite3
import subprocess
import sys
import tempfile
import time
from pathlib import Path

from collector.demo_site import DemoServer, generate
from collector.demo_site.recipes import render
from collector.run.gather import gather
from collector.storage.collection import Collection, init_collection, recover


def stored_urls(col: Collection) -> set[str]:
    """Image URLs of items committed as stored (a bystander's read)."""
    conn = sqlite3.connect(col.ledger_path, timeout=30)
    try:
        return {r[0] for r in conn.execute(
            "SELECT image_url FROM items WHERE state IN ('stored', 'near_duplicate') "
            "AND image_url IS NOT NULL")}
    except sqlite3.OperationalError:
        return set()
    finally:
        conn.close()


def outcome(col: Collection) -> set[tuple]:
    """Every item's (source, key, state, reason, sha256)."""
    with col.ledger(readonly=True) as ledger:
        return {tuple(r.values()) for r in ledger.query(
            "SELECT s.name, i.source_key, i.state, i.reason, i.file_sha256 FROM items i "
            "JOIN sources s ON s.id = i.source_id")}


def check(col: Collection) -> tuple[int, int, int, list[str]]:
    """Recover as a resume would, then (files, temp removed, orphans removed, problems)."""
    problems: list[str] = []
    with col.ledger() as ledger:
        rec = recover(col, ledger)
        rows = {r["sha256"]: r["ext"] for r in ledger.query("SELECT sha256, ext FROM files")}
        pointed = {r["file_sha256"] for r in ledger.query(
            "SELECT file_sha256 FROM items WHERE file_sha256 IS NOT NULL "
            "AND state IN ('stored', 'near_duplicate', 'duplicate')")}
    on_disk = dict(col.store.iter_stored())
    problems += [f"file without row: {s[:12]}" for s in set(on_disk) - set(rows)]
    problems += [f"row without file: {s[:12]}" for s in set(rows) - set(on_disk)]
    problems += [f"item points at a missing file: {s[:12]}" for s in pointed - set(rows)]
    for sha, path in on_disk.items():
        if hashlib.sha256(path.read_bytes()).hexdigest() != sha:
            problems.append(f"wrong bytes: {sha[:12]}")
        if sha in rows and path.suffix != f".{rows[sha]}":
            problems.append(f"wrong extension: {path.name}")
    if any(col.store.incoming_dir.iterdir()):
        problems.append("temp files remain after recovery")
    return len(on_disk), rec.temp_files_removed, rec.orphan_files_removed, problems


def main(kills: int = 20, seed: int = 20260301) -> int:
    rng = random.Random(seed)
    with tempfile.TemporaryDirectory() as tmp_name:
        tmp = Path(tmp_name)
        generate(tmp / "content")
        with DemoServer(tmp / "content") as server:
            recipe = render("demo", server.port, tmp / "content" / "scans")
            reference = init_collection(tmp / "reference", contact="bench@example.org")
            reference.recipe_path.write_text(recipe)
            server.reset()
            started = time.monotonic()
            gather(reference)
            full = time.monotonic() - started
            print(f"uninterrupted run: {full:.1f} s, {len(outcome(reference))} items\n")

            col = init_collection(tmp / "killed", contact="bench@example.org")
            col.recipe_path.write_text(recipe)
            server.reset()
            head = (f"{'kill':>4} | {'after s':>7} | {'stored files':>12} | {'temp rm':>7} | "
                    f"{'orphans rm':>10} | {'refetched':>9} | problems")
            print(head)
            print("-" * len(head))
            failures = 0
            prev: tuple[float, set[str]] = (time.monotonic(), set())

            def refetches(since: tuple[float, set[str]]) -> int:
                return sum(1 for r in server.log if r.t > since[0] and r.status == 200
                           and any(url.endswith(r.path) for url in since[1]))

            for n in range(1, kills + 1):
                delay = rng.uniform(0.2, max(0.5, full / 4))
                proc = subprocess.Popen([sys.executable, "-m", "collector", "gather",
                                         str(col.root), "--quiet"],
                                        stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
                time.sleep(delay)
                finished = proc.poll() is not None
                if not finished:
                    os.kill(proc.pid, signal.SIGKILL)
                proc.wait()
                again = refetches(prev)
                prev = (time.monotonic(), stored_urls(col))
                files, temps, orphans, problems = check(col)
                if again:
                    problems.append(f"{again} stored image(s) fetched again")
                failures += bool(problems)
                note = " (run had finished)" if finished else ""
                print(f"{n:>4} | {delay:>7.2f} | {files:>12} | {temps:>7} | {orphans:>10} | "
                      f"{again:>9} | {'; '.join(problems) or 'ok'}{note}")
            gather(col)
            again = refetches(prev)
            same = outcome(col) == outcome(reference)
            files, _, _, problems = check(col)
            print(f"\nfinal resume: {files} files; equals the uninterrupted run: {same}; "
                  f"stored images fetched again: {again}; "
                  f"problems: {'; '.join(problems) or 'none'}")
            return 1 if failures or again or not same or problems else 0


if __name__ == "__main__":
    args = [int(a) for a in sys.argv[1:3]]
    sys.exit(main(*args))
