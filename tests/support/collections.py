"""Small real collections that many tests start from (real SQLite, real generated images).

- :func:`one_page_recipe`: the demo archive's smoke recipe over one listing page of 10 items,
  without an item limit (a quick web gather against ``fresh_demo_server``).
- :func:`gather_listing`: a collection over one JSON listing of :func:`serve_leaves`'
  leaves on a loopback server, gathered once.
- :func:`grid_picture`: a distinct small picture per seed, as PNG or JPEG bytes.
- :func:`scans_collection`: a collection over a few generated scans, gathered once, no network.
- :func:`gather_once` and :class:`Gathered`: a web gather made once per test session
  (``tests/conftest.py``: ``demo_gathered``, ``page_gathered``), which tests read as it is or
  change in a private copy (:meth:`Gathered.copy_to`).
"""

from __future__ import annotations

import hashlib
import io
import json
import shutil
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
from PIL import Image

from collector.demo_site import DemoServer, RequestRecord
from collector.demo_site.recipes import listing_source, render
from collector.run.gather import gather
from collector.run.scheduling import RunResult
from collector.storage.collection import Collection, init_collection

SCANS_SOURCE = ('\n[[sources]]\nname = "desk"\nkind = "scans"\npath = "in"\n'
                'include = ["*.png"]\nlicence = "CC0-1.0"\n')


def one_page_recipe(port: int) -> str:
    """The smoke recipe over one listing page of 10 items, without an item limit."""
    text = render("smoke", port)
    return (text.replace("max_items = 10", "max_items = 0")
            .replace("max_pages = 5", "max_pages = 1")
            .replace('per_page = "20"', 'per_page = "10"'))


def one_listing_recipe(url: str, *, min_interval: float | None = 0.1,
                       pagination: str = 'style = "none"') -> str:
    """A recipe over one JSON listing at ``url`` on 127.0.0.1 (``results`` with ``id``,
    ``title``, ``licence`` and ``image`` each), no pagination unless ``pagination`` (the
    lines of its table) says so; ``min_interval`` None keeps the default budget."""
    budget = f"[budgets]\nmin_interval = {min_interval}\n" if min_interval is not None else ""
    return ('contact = "x@example.org"\n' + budget
            + '[network]\nallow_addresses = ["127.0.0.1/32"]\n'
            + listing_source("leaves", url, pagination=pagination))


def gather_listing(server: Any, leaves: list[dict[str, str]],
                   folder: Path) -> tuple[Collection, RunResult]:
    """Serve ``leaves`` as the JSON listing ``/api`` on ``server``, make a collection at
    ``folder`` over it (:func:`one_listing_recipe`, no wait between requests) and gather it
    once: the collection and the run's result."""
    server.route("/api", (200, json.dumps({"results": leaves}).encode(),
                          {"Content-Type": "application/json"}))
    col = init_collection(folder, contact="x@example.org")
    col.recipe_path.write_text(one_listing_recipe(server.url("/api"), min_interval=0.0))
    return col, gather(col)


def serve_leaves(server: Any, count: int, *, first: int = 0,
                 prefix: str = "") -> list[dict[str, str]]:
    """Serve ``count`` PNG leaves ``/img/{n}.png`` (n from ``first``, each its own
    :func:`grid_picture`) and no robots.txt (404) on ``server``; their listing entries
    (``id`` is ``prefix`` + n, CC0-1.0) for :func:`one_listing_recipe`'s ``results``."""
    server.route("/robots.txt", (404, b""))
    items = []
    for n in range(first, first + count):
        server.route(f"/img/{n}.png", (200, grid_picture(n), {"Content-Type": "image/png"}))
        items.append({"id": f"{prefix}{n}", "title": f"Leaf {n}", "licence": "CC0-1.0",
                      "image": server.url(f"/img/{n}.png")})
    return items


def grid_picture(seed: int, fmt: str = "PNG") -> bytes:
    """A distinct 160x120 picture for each seed, as file bytes: a seeded random 8x6 grid of grey
    levels, enlarged (unrelated pictures, far apart in perceptual hash)."""
    grid = np.random.default_rng(seed).integers(0, 256, (6, 8), dtype=np.uint8)
    img = Image.fromarray(grid).resize((160, 120), Image.Resampling.NEAREST).convert("RGB")
    out = io.BytesIO()
    img.save(out, fmt, **({"quality": 85} if fmt == "JPEG" else {}))
    return out.getvalue()


def scan_image(seed: int, size: tuple[int, int] = (96, 64)) -> Image.Image:
    """A small structured picture (a Mandelbrot detail) that differs for every seed."""
    return Image.effect_mandelbrot(size, (-2 + seed * 0.3, -1, 1, 1), 40 + seed).convert("RGB")


def scans_collection(root: Path, count: int = 2, *, gathered: bool = True) -> Collection:
    """A collection at ``root`` whose ``desk`` scans source reads ``count`` generated PNGs
    from ``in/`` (CC0-1.0), gathered once without any network."""
    col = init_collection(root, contact="me@example.org")
    (col.root / "in").mkdir()
    for n in range(count):
        scan_image(n).save(col.root / "in" / f"{n}.png")
    col.recipe_path.write_text(col.recipe_path.read_text() + SCANS_SOURCE)
    if gathered:
        gather(col, fetcher_factory=lambda recipe, ledger: None)
    return col


@dataclass(frozen=True)
class Gathered:
    """A collection gathered once from an empty folder, with the server's request log of that
    run and the run's result. The folder stays as the run left it (``gather_once`` checks at
    the end of the session): tests that change anything change a copy."""

    root: Path
    log: tuple[RequestRecord, ...]
    result: RunResult

    def copy_to(self, target: Path) -> Collection:
        """A private copy of the collection at ``target`` (a new path). The ledger stores no
        path of the collection folder itself (only the recipe's paths, such as the demo's
        scans folder outside it), so the copy is the same collection in another place."""
        return Collection(Path(shutil.copytree(self.root, target, symlinks=True)))


def gather_once(server: DemoServer, root: Path, recipe: str) -> Gathered:
    """Gather ``recipe`` into a new collection at ``root`` from ``server``, reset just before
    (log cleared, rate buckets refilled, one-off misbehaviours re-armed) and again after, so
    the tests after it find the server as ``fresh_demo_server`` leaves it."""
    server.reset()
    col = init_collection(root, contact="x@example.org")
    col.recipe_path.write_text(recipe)
    result = gather(col)
    gathered = Gathered(col.root, tuple(server.log), result)
    server.reset()
    return gathered


def folder_digest(root: Path) -> dict[str, str]:
    """Every file below ``root`` (SQLite's -wal and -shm companions left out: a read-only
    reader may leave them) -> the sha256 of its bytes (FIPS 180-4)."""
    return {p.relative_to(root).as_posix(): hashlib.sha256(p.read_bytes()).hexdigest()
            for p in sorted(root.rglob("*"))
            if p.is_file() and not p.name.endswith(("-wal", "-shm"))}
