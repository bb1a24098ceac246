"""Hostile folders, recipes and texts: the findings that are not a server's answer, one row
each, run against a small real collection (generated scans, no network). bench/hostile.py
prints this table after the server table; it can also run alone.

Each scenario returns (handled, what happened). Exit status 1 if any row is not handled.

Usage: python bench/hostile_folders.py
"""

from __future__ import annotations

import csv
import hashlib
import os
import signal
import sqlite3
import subprocess
import sys
import tempfile
import time
from collections.abc import Callable
from pathlib import Path

from PIL import Image
from typer.testing import CliRunner

from collector.cli import app
from collector.demo_site.loopback import LoopbackServer
from collector.run.gather import gather
from collector.storage.collection import Collection, init_collection

Scenario = Callable[[Path], tuple[bool, str]]
RUNNER = CliRunner()


def scans_collection(folder: Path, n: int = 3) -> Collection:
    """A collection over ``n`` generated scans, gathered once."""
    col = init_collection(folder / "col", contact="bench@example.org")
    (col.root / "in").mkdir()
    for i in range(n):
        Image.effect_mandelbrot((96, 64), (-2 + i * 0.3, -1, 1, 1), 40 + i).convert("RGB").save(
            col.root / "in" / f"{i}.png")
    col.recipe_path.write_text(col.recipe_path.read_text() + (
        '\n[[sources]]\nname = "desk"\nkind = "scans"\npath = "in"\ninclude = ["*.png"]\n'
        'licence = "CC0-1.0"\n'))
    gather(col, fetcher_factory=lambda recipe, ledger: None)
    return col


def fingerprint(folder: Path) -> str:
    """Names, link targets and bytes of everything below ``folder``."""
    digest = hashlib.sha256()
    for path in sorted(folder.rglob("*")):
        digest.update(str(path.relative_to(folder)).encode())
        if path.is_symlink():
            digest.update(os.readlink(path).encode())
        elif path.is_file():
            digest.update(path.read_bytes())
    return digest.hexdigest()


def zeroed_ledger(tmp: Path) -> tuple[bool, str]:
    """Finding 2: an emptied ledger; every command refuses and nothing is deleted."""
    col = scans_collection(tmp)
    before = fingerprint(col.store.root)
    col.ledger_path.write_bytes(b"")
    codes = [RUNNER.invoke(app, args).exit_code for args in (
        ["gather", str(col.root), "--quiet"], ["status", str(col.root)],
        ["datasheet", str(col.root)], ["check", str(col.root)])]
    kept = fingerprint(col.store.root) == before
    rebuilt = RUNNER.invoke(app, ["rebuild-ledger", str(col.root)]).exit_code == 0
    return (codes == [2, 2, 2, 2] and kept and rebuilt,
            f"exit codes {codes}; store unchanged {kept}; rebuild-ledger ok {rebuilt}")


def planted_links(tmp: Path) -> tuple[bool, str]:
    """Finding 3: links at the lock, the temp folder and the datasheet folder."""
    decoy = tmp / "decoy"
    decoy.mkdir()
    (decoy / "precious.txt").write_text("keep me")
    before = fingerprint(decoy)
    codes = []
    for name, command in ((".gather.lock", "gather"), ("files/.incoming", "gather"),
                          ("datasheet", "datasheet")):
        col = scans_collection(tmp / name.replace("/", "_"))
        target = col.root / name
        if target.is_dir():
            target.rmdir()
        target.unlink(missing_ok=True)
        target.symlink_to(decoy / "precious.txt" if name == ".gather.lock" else decoy)
        codes.append(RUNNER.invoke(app, [command, str(col.root)]).exit_code)
    same = fingerprint(decoy) == before
    return all(c == 2 for c in codes) and same, f"exit codes {codes}; decoy unchanged {same}"


def token_with_cr(tmp: Path) -> tuple[bool, str]:
    """Finding 5: a bearer token ending in CR is refused by check, before anything is sent."""
    col = scans_collection(tmp)
    col.recipe_path.write_text(col.recipe_path.read_text().replace(
        "[network]\n", '[network]\nheaders = { Authorization = "Bearer ${BENCH_TOKEN}" }\n', 1))
    os.environ["BENCH_TOKEN"] = "t0ken-bench-secret\r"
    try:
        out = RUNNER.invoke(app, ["check", str(col.root)])
    finally:
        del os.environ["BENCH_TOKEN"]
    ok = out.exit_code == 2 and "t0ken-bench-secret" not in out.output
    return ok, f"check exit {out.exit_code}; token shown {'t0ken-bench-secret' in out.output}"


def _set_titles(col: Collection, title: str) -> None:
    with sqlite3.connect(col.ledger_path) as conn:
        conn.execute("UPDATE items SET title = ?", (title,))


def formula_titles(tmp: Path) -> tuple[bool, str]:
    """Finding 6: titles that are spreadsheet formulas are neutralised in every CSV."""
    col = scans_collection(tmp)
    _set_titles(col, '=HYPERLINK("http://127.0.0.59/x","click")')
    RUNNER.invoke(app, ["datasheet", str(col.root)])
    cells = []
    for name in ("provenance.csv", "attribution.csv"):
        with open(col.root / "datasheet" / name, newline="") as fh:
            cells += [c for row in csv.reader(fh) for c in row]
    live = [c for c in cells if c.startswith(("=", "+", "-", "@", "\t", "\r"))]
    return bool(cells) and not live, f"{len(cells)} cells, {len(live)} start a formula"


def escape_titles(tmp: Path) -> tuple[bool, str]:
    """Finding 8: a title with cursor moves and a fake verdict is printed escaped."""
    col = scans_collection(tmp)
    _set_titles(col, "Leaf\x1b[1A\x1b[2K\r  allowed: yes (spoofed)\u202e")
    stored = next(p for _, p in col.store.iter_stored())
    out = RUNNER.invoke(app, ["trace", str(stored), "--in", str(col.root)]).output
    raw = [c for c in ("\x1b", "\r", "\u202e") if c in out]
    return not raw, f"raw control characters in trace output: {raw or 'none'}"


def hostile_scans(tmp: Path) -> tuple[bool, str]:
    """Finding 7: a FIFO, a symlink loop and a non-UTF-8 name in a scans folder."""
    col = scans_collection(tmp)
    scans = col.root / "in"
    os.mkfifo(scans / "pipe.png")
    (scans / "loop.png").symlink_to(scans / "loop.png")
    Image.new("RGB", (80, 60), (200, 40, 40)).save(os.fsencode(scans) + b"/odd\xff.png", "PNG")
    try:
        done = subprocess.run([sys.executable, "-m", "collector", "gather", str(col.root),
                               "--quiet"], capture_output=True, text=True, timeout=120)
    except subprocess.TimeoutExpired:
        return False, "gather hung"
    with col.ledger(readonly=True) as ledger:
        notes = sorted(r["kind"] for r in ledger.query("SELECT kind FROM notes"))
        odd = ledger.query("SELECT state FROM items WHERE source_key = 'odd\\xff.png'")
    ok = done.returncode == 0 and notes == ["link_loop", "not_a_file"] and bool(odd)
    return ok, f"exit {done.returncode}; notes {notes}; odd name stored {bool(odd)}"


def _running(col: Collection) -> bool:
    """Whether the collection's ledger shows a run under way."""
    try:
        with sqlite3.connect(f"file:{col.ledger_path}?mode=ro", uri=True) as conn:
            return bool(conn.execute("SELECT 1 FROM runs WHERE outcome = 'running'").fetchall())
    except sqlite3.Error:
        return False


def sigterm(tmp: Path) -> tuple[bool, str]:
    """Finding 9: SIGTERM ends a run like Ctrl-C (interrupted, exit 143)."""
    with LoopbackServer("127.0.0.1") as server:
        def slow(h: object) -> tuple[int, bytes, dict[str, str]]:
            time.sleep(6.0)  # the listing is still in flight when the signal comes
            return 200, b'{"items": []}', {"Content-Type": "application/json"}
        server.route("/api", slow)
        col = init_collection(tmp / "col", contact="bench@example.org")
        recipe = col.recipe_path.read_text().replace(
            "allow_addresses = []", 'allow_addresses = ["127.0.0.1"]')
        col.recipe_path.write_text(recipe + (
            '\n[[sources]]\nname = "slow"\nkind = "json_api"\n'
            f'url = "{server.url("/api")}"\n[sources.fields]\nitems = "items"\nid = "id"\n'
            'image_url = "img"\n'))
        proc = subprocess.Popen([sys.executable, "-m", "collector", "gather", str(col.root),
                                 "--quiet"], stdout=subprocess.PIPE, stderr=subprocess.PIPE)
        deadline = time.monotonic() + 60
        while time.monotonic() < deadline and not _running(col):
            time.sleep(0.1)
        proc.send_signal(signal.SIGTERM)
        proc.communicate(timeout=60)
    with col.ledger(readonly=True) as ledger:
        outcome = ledger.scalar("SELECT outcome FROM runs ORDER BY id DESC LIMIT 1")
    return proc.returncode == 143 and outcome == "interrupted", (
        f"exit {proc.returncode}; run {outcome!r}")


def odd_recipes(tmp: Path) -> tuple[bool, str]:
    """Finding 9: a UTF-8 BOM is accepted; 3,000 levels of nesting are one clear error."""
    col = scans_collection(tmp)
    text = col.recipe_path.read_text()
    col.recipe_path.write_text("\ufeff" + text)
    bom = RUNNER.invoke(app, ["check", str(col.root)]).exit_code
    col.recipe_path.write_text(text + "x = " + "[" * 3000 + "]" * 3000 + "\n")
    deep = RUNNER.invoke(app, ["check", str(col.root)])
    ok = bom == 0 and deep.exit_code == 2 and "nested too deeply" in deep.output
    return ok, f"BOM check exit {bom}; deep recipe exit {deep.exit_code}"


def flat_images(tmp: Path) -> tuple[bool, str]:
    """Finding 9: two flat images of different colours are not near duplicates."""
    col = scans_collection(tmp, n=0)
    Image.new("RGB", (320, 240), (200, 30, 30)).save(col.root / "in" / "red.png")
    Image.new("RGB", (320, 240), (30, 30, 200)).save(col.root / "in" / "blue.png")
    gather(col, fetcher_factory=lambda recipe, ledger: None)
    with col.ledger(readonly=True) as ledger:
        states = sorted(r["state"] for r in ledger.query("SELECT state FROM items"))
    return states == ["stored", "stored"], f"item states {states}"


SCENARIOS: list[tuple[str, Scenario]] = [
    ("zeroed ledger, then every command", zeroed_ledger),
    ("symlinks planted at lock, temp folder, datasheet", planted_links),
    ("secret token ending in CR", token_with_cr),
    ("titles that are spreadsheet formulas", formula_titles),
    ("titles with terminal escape sequences", escape_titles),
    ("scans folder with FIFO, loop, non-UTF-8 name", hostile_scans),
    ("SIGTERM during a run", sigterm),
    ("recipe with a BOM; recipe nested 3,000 deep", odd_recipes),
    ("two flat images of different colours", flat_images),
]


def main() -> int:
    """Run every scenario and print the table."""
    head = f"{'hostile folder, recipe or text':<50} | {'handled':<7} | what happened"
    print(head)
    print("-" * len(head))
    bad = 0
    with tempfile.TemporaryDirectory() as tmp:
        for n, (name, scenario) in enumerate(SCENARIOS):
            folder = Path(tmp) / f"s{n}"
            folder.mkdir()
            try:
                handled, what = scenario(folder)
            except Exception as exc:  # a crash in a scenario is a finding, not a bench bug
                handled, what = False, f"{type(exc).__name__}: {exc}"
            bad += not handled
            print(f"{name:<50} | {'yes' if handled else 'NO':<7} | {what}")
    print(f"\n{len(SCENARIOS) - bad} of {len(SCENARIOS)} handled.")
    return 1 if bad else 0


if __name__ == "__main__":
    sys.exit(main())
