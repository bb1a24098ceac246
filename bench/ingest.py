"""Ingest cost against a bare Pillow decode (issue target: ingest <= 1.5x a bare full decode).

Generates N structured ~1 MP JPEGs (quality 90), then measures on the same files:
  bare      Image.open(p).load()  (a full RGB decode, the floor any checker pays)
  ingest    the ingest step a downloaded file goes through (it is already complete and fsynced
            in files/.incoming/ by the fetcher): magic bytes, decode check, EXIF/IPTC/XMP
            metadata, perceptual + mirror hash, exact and near-duplicate lookup, the move into
            the store and the ledger rows
  local     the whole `gather` over a local folder source, which also copies each file into the
            store with fsync (first files also create their ab/cd folders)
Prints a table of images/s and the ingest/bare ratio. Run: .venv/bin/python bench/ingest.py [N]
[POLICY]; POLICY sets [images] enlarged (default "keep"; "flag" decodes each JPEG's luma at full
size once more for the native-size estimate).
"""

from __future__ import annotations

import hashlib
import os
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
from PIL import Image

from collector.run.gather import gather, prepared_run
from collector.run.scheduling import Gatherer
from collector.storage.collection import init_collection


def make_images(folder: Path, count: int) -> list[Path]:
    """Structured 1224x816 JPEGs: smooth colour fields plus noise, like photos."""
    rng = np.random.default_rng(7)
    paths = []
    for i in range(count):
        small = rng.integers(0, 255, (8, 12, 3), dtype=np.uint8)
        im = Image.fromarray(small).resize((1224, 816), Image.BICUBIC)
        noise = rng.normal(0, 6, (816, 1224, 3))
        arr = np.clip(np.asarray(im, dtype=np.float32) + noise, 0, 255).astype(np.uint8)
        path = folder / f"img{i:04d}.jpg"
        Image.fromarray(arr).save(path, "JPEG", quality=90)
        paths.append(path)
    return paths


def bare_decode(paths: list[Path]) -> float:
    start = time.perf_counter()
    for p in paths:
        with Image.open(p) as im:
            im.load()
    return time.perf_counter() - start


POLICY = {"enlarged": "keep"}


def ingest_step(root: Path, paths: list[Path]) -> float:
    """Time Ingest.ingest_file on files already in the incoming folder, as after a download."""
    col = init_collection(root / "step", contact="bench@example.org")
    recipe = col.recipe_path.read_text().replace(
        'enlarged = "keep"', f'enlarged = "{POLICY["enlarged"]}"')
    col.recipe_path.write_text(recipe + SOURCE.format(folder=paths[0].parent))
    with prepared_run(col) as (recipe, ledger):
        gatherer = Gatherer(col, recipe, ledger, None)
        source_id = ledger.source_id("bench", "scans", {})
        jobs = []
        for p in paths:
            fd, tmp = col.store.new_temp()
            with os.fdopen(fd, "wb") as fh:
                fh.write(p.read_bytes())
                os.fsync(fh.fileno())
            sha = hashlib.sha256(p.read_bytes()).hexdigest()
            item = ledger.add_item(source_id, p.name, {"image_url": f"http://h/{p.name}"})
            jobs.append((item, tmp, sha))
        start = time.perf_counter()
        for item, tmp, sha in jobs:
            gatherer.ingest.ingest_file(item, "CC0-1.0", tmp, sha, content_type="image/jpeg",
                             url=f"http://h/{item}.jpg")
        elapsed = time.perf_counter() - start
        stored = ledger.scalar("SELECT count(*) FROM items WHERE state = 'stored'")
    assert stored == len(paths), stored
    return elapsed


SOURCE = ('\n[[sources]]\nname = "bench"\nkind = "scans"\npath = "{folder}"\n'
          'include = ["*.jpg"]\nlicence = "CC0-1.0"\n')


def ingest(root: Path, paths: list[Path]) -> float:
    col = init_collection(root / "c", contact="bench@example.org")
    col.recipe_path.write_text(col.recipe_path.read_text() + SOURCE.format(folder=paths[0].parent))
    start = time.perf_counter()
    result = gather(col, fetcher_factory=lambda recipe, ledger: None)
    elapsed = time.perf_counter() - start
    assert result.counts["stored"] == len(paths), result.counts
    return elapsed


def main() -> None:
    count = int(sys.argv[1]) if len(sys.argv) > 1 else 150
    POLICY["enlarged"] = sys.argv[2] if len(sys.argv) > 2 else "keep"
    with tempfile.TemporaryDirectory() as tmp:
        root = Path(tmp)
        (root / "src").mkdir()
        paths = make_images(root / "src", count)
        bare_decode(paths)  # warm the page cache
        bare = min(bare_decode(paths) for _ in range(2))
        step = ingest_step(root, paths)
        full = ingest(root, paths)
    print(f"{'step':<10} {'images':>7} {'seconds':>8} {'images/s':>9}")
    print(f"{'bare':<10} {count:>7} {bare:>8.2f} {count / bare:>9.1f}")
    print(f"{'ingest':<10} {count:>7} {step:>8.2f} {count / step:>9.1f}")
    print(f"{'local':<10} {count:>7} {full:>8.2f} {count / full:>9.1f}")
    ratio = step / bare
    verdict = 'ok' if ratio <= 1.5 else 'MISSED'
    print(f'[images] enlarged = "{POLICY["enlarged"]}"')
    print(f"ratio ingest/bare = {ratio:.2f}x (target <= 1.5x): {verdict}")


if __name__ == "__main__":
    main()
