"""A hostile scans folder cannot stop, hang or leak a run: FIFOs, sockets, symlink loops,
dangling links and links leaving the folder are skipped with a note and never opened; a file
name that is not UTF-8 is stored under a name shown with escapes; ``trace`` on a folder with
a FIFO does not hang.

Each gather runs in a child process with a time limit, so a hang fails the test instead of
stopping the suite. File types per POSIX (IEEE Std 1003.1, <sys/stat.h>: S_ISFIFO, S_ISSOCK,
S_ISLNK); non-UTF-8 names are kept as surrogate escapes by Python (PEP 383).
"""

from __future__ import annotations

import os
import socket
import subprocess
import sys
from pathlib import Path

import pytest
from PIL import Image

from collector.storage.collection import Collection, init_collection

TIME_LIMIT = 120  # seconds; a run over this folder takes about two


def picture(path: Path | bytes, seed: int) -> None:
    """A small real image at ``path`` (bytes paths allowed, for non-UTF-8 names)."""
    im = Image.effect_mandelbrot((96, 64), (-2 + seed * 0.3, -1, 1, 1), 40 + seed).convert("RGB")
    with open(path, "wb") as fh:
        im.save(fh, "PNG")


@pytest.fixture
def hazard_collection(tmp_path: Path) -> Collection:
    """A scans folder holding one good image and every hazard."""
    col = init_collection(tmp_path / "c", contact="me@example.org")
    scans = col.root / "scans"
    scans.mkdir()
    picture(scans / "good.png", 1)
    picture(os.fsencode(scans) + b"/bad\xff-name.png", 2)
    os.mkfifo(scans / "pipe.png")
    (scans / "loop.png").symlink_to(scans / "loop.png")
    (scans / "gone.png").symlink_to(scans / "never-there.png")
    outside = tmp_path / "outside.png"
    picture(outside, 3)
    (scans / "outside.png").symlink_to(outside)
    sock = socket.socket(socket.AF_UNIX, socket.SOCK_STREAM)
    sock.bind(str(scans / "sock.png"))
    sock.close()
    col.recipe_path.write_text(col.recipe_path.read_text() + (
        '\n[[sources]]\nname = "desk"\nkind = "scans"\npath = "scans"\ninclude = ["*.png"]\n'
        'licence = "CC0-1.0"\n'))
    return col


def run(*args: str) -> subprocess.CompletedProcess[str]:
    """``collector ARGS`` in a child process, with the time limit."""
    return subprocess.run([sys.executable, "-m", "collector", *args], capture_output=True,
                          text=True, timeout=TIME_LIMIT)


def outcome(col: Collection) -> tuple[dict[str, str], dict[str, str]]:
    """(source_key -> state of items, source_key/url -> kind of notes)."""
    with col.ledger(readonly=True) as ledger:
        items = {r["source_key"]: r["state"]
                 for r in ledger.query("SELECT source_key, state FROM items")}
        notes = {r["url"]: r["kind"] for r in ledger.query("SELECT url, kind FROM notes")}
    return items, notes


def test_hazards_are_skipped_with_notes_and_the_rest_is_stored(
        hazard_collection: Collection) -> None:
    """The run finishes (exit 0); the good image and the non-UTF-8 name are stored; every
    hazard has its note and no item."""
    done = run("gather", str(hazard_collection.root), "--quiet")
    assert done.returncode == 0, done.stderr
    assert "Traceback" not in done.stderr
    items, notes = outcome(hazard_collection)
    assert items == {"good.png": "stored", "bad\\xff-name.png": "stored"}
    assert notes == {"pipe.png": "not_a_file", "sock.png": "not_a_file",
                     "loop.png": "link_loop", "gone.png": "unreadable_file",
                     "outside.png": "link_outside"}


def test_links_outside_are_read_when_the_recipe_allows_them(
        hazard_collection: Collection) -> None:
    """allow_outside_links = true: the link to an image outside the folder is stored too."""
    recipe = hazard_collection.recipe_path
    recipe.write_text(recipe.read_text() + "allow_outside_links = true\n")
    done = run("gather", str(hazard_collection.root), "--quiet")
    assert done.returncode == 0, done.stderr
    items, notes = outcome(hazard_collection)
    assert items["outside.png"] == "stored"
    assert "outside.png" not in notes


def test_trace_on_a_folder_with_a_fifo_does_not_hang(hazard_collection: Collection) -> None:
    """trace over the hazard folder ends within the limit; the FIFO and the socket are
    listed as not_a_file (never opened), real files are traced."""
    assert run("gather", str(hazard_collection.root), "--quiet").returncode == 0
    traced = run("trace", str(hazard_collection.root / "scans"), "--in",
                 str(hazard_collection.root), "--csv")
    assert traced.returncode == 1, traced.stderr  # not every path could be traced
    rows = {line.split(",")[0].rsplit("/", 1)[-1]: line.split(",")[1]
            for line in traced.stdout.splitlines()[1:]}
    assert rows["pipe.png"] == "not_a_file" and rows["sock.png"] == "not_a_file"
    assert rows["good.png"] in ("exact", "near")
