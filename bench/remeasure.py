"""What `collector remeasure` costs on an old collection, against a bare decode of its files.

Builds a collection from a local folder (no network) of ~1 MP colour JPEGs and 16-bit PNGs
(the files the first hash pipeline got wrong), gathers it, sets its ledger back to an old
collector's (hash_algo "dct-phash-64/draft-v1", no transparency share, native size or colour
facts), then times:

  dry run              counting the files due (queries only, no file read)
  remeasure            every fact of every file measured again and written
  bare decode          Image.open + load() of the same stored files at full size

and prints seconds, files per second and the ratio remeasure / bare decode. No target: the
command runs once per upgrade; the table says how long a big collection takes.
Run: .venv/bin/python bench/remeasure.py [--jpegs N] [--deep N]
"""

from __future__ import annotations

import argparse
import tempfile
import time
from pathlib import Path

import numpy as np
from PIL import Image, ImageDraw

from collector.run.gather import gather
from collector.run.remeasure import remeasure
from collector.storage.collection import Collection, init_collection

NULLED = ("transparent_share", "native_width", "native_height", "greyscale", "brightness",
          "contrast", "colourfulness", "sharpness", "background_share", "colours")


def picture(seed: int, size: tuple[int, int] = (1280, 800)) -> Image.Image:
    """A colour picture with a gradient, noise and shapes."""
    rng = np.random.default_rng(seed)
    w, h = size
    base = np.linspace(0, 255, w)[None, :, None] * rng.random(3)[None, None, :]
    img = Image.fromarray((base + rng.normal(0, 12, (h, w, 3))).clip(0, 255).astype(np.uint8))
    draw = ImageDraw.Draw(img)
    for _ in range(12):
        x, y = int(rng.integers(0, w - 200)), int(rng.integers(0, h - 200))
        draw.ellipse((x, y, x + int(rng.integers(40, 200)), y + int(rng.integers(40, 200))),
                     fill=tuple(int(v) for v in rng.integers(0, 256, 3)))
    return img


def build(root: Path, jpegs: int, deep: int) -> Collection:
    """A gathered collection of ``jpegs`` JPEGs and ``deep`` 16-bit PNGs."""
    col = init_collection(root, contact="bench@example.org")
    folder = col.root / "in"
    folder.mkdir()
    for n in range(jpegs):
        picture(n).save(folder / f"p{n}.jpg", quality=88)
    for n in range(deep):
        grey = np.asarray(picture(1000 + n).convert("L")).astype(np.uint32)
        Image.fromarray((grey * 257).astype(np.uint16)).save(folder / f"d{n}.png")
    col.recipe_path.write_text(col.recipe_path.read_text() + (
        '\n[[sources]]\nname = "desk"\nkind = "scans"\npath = "in"\n'
        'include = ["*.jpg", "*.png"]\nlicence = "CC0-1.0"\n'))
    gather(col, fetcher_factory=lambda recipe, ledger: None)
    return col


def make_old(col: Collection) -> None:
    """The ledger as an old collector left it."""
    with col.ledger() as ledger:
        ledger.db.execute("UPDATE files SET hash_algo = 'dct-phash-64/draft-v1', "
                          + ", ".join(f"{c} = NULL" for c in NULLED))
        ledger.db.conn.commit()


def timed(func) -> tuple[float, float]:  # type: ignore[no-untyped-def]
    """(wall seconds, CPU seconds) of one call."""
    wall, cpu = time.perf_counter(), time.process_time()
    func()
    return time.perf_counter() - wall, time.process_time() - cpu


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--jpegs", type=int, default=80)
    parser.add_argument("--deep", type=int, default=20)
    args = parser.parse_args()
    with tempfile.TemporaryDirectory() as tmp:
        col = build(Path(tmp) / "c", args.jpegs, args.deep)
        make_old(col)
        paths = [p for _, p in col.store.iter_stored()]
        dry = timed(lambda: remeasure(col, dry_run=True))
        result = []
        run = timed(lambda: result.append(remeasure(col)))
        bare = timed(lambda: [Image.open(p).load() for p in paths])
    n = len(paths)
    print(f"{n} stored files ({args.jpegs} JPEG 1280x800, {args.deep} 16-bit PNG 1280x800); "
          f"{result[0].measured} measured, {len(result[0].moved)} hashes moved beyond "
          "near_distance")
    print(f"{'step':<14}{'wall s':>9}{'CPU s':>9}{'files/s':>10}{'x bare':>9}")
    for name, (wall, cpu) in (("dry run", dry), ("remeasure", run), ("bare decode", bare)):
        print(f"{name:<14}{wall:>9.2f}{cpu:>9.2f}{n / wall:>10.1f}{cpu / bare[1]:>9.2f}")


if __name__ == "__main__":
    main()
