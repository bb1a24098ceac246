"""Throughput of the image ingest step against a bare Pillow full decode.

Generates ~100 synthetic 1 MP JPEGs (quality 90) in a temporary folder and prints images/s for:
bare ``Image.open(p).load()``, the luma draft and pHash alone, the one YCbCr draft ingest
decodes, and ``inspect_image`` (full decode; the draft path ingest uses; the draft path with
the native-size estimate of ``enlarged = "flag"``). bench/ingest.py measures the whole ingest
step against its target (<= 1.0x). Best of 5 interleaved passes of CPU time, one process.
"""

from __future__ import annotations

import sys
import tempfile
import time
from collections.abc import Callable
from pathlib import Path

import numpy as np
from PIL import Image, ImageDraw, ImageFilter

from collector.checks.images import inspect_image
from collector.checks.phash import hash_draft, hash_image_file

COUNT = 100
SIZES = [(1000, 1000), (1224, 816), (816, 1224), (1152, 864)]


def make_images(folder: Path) -> list[Path]:
    """Gradient/noise backgrounds with shapes, some blurred, saved as JPEG q90."""
    rng = np.random.default_rng(42)
    paths = []
    for i in range(COUNT):
        w, h = SIZES[i % len(SIZES)]
        y, x = np.mgrid[0:h, 0:w] / max(w, h)
        field = np.sin(x * rng.uniform(2, 12)) + np.cos(y * rng.uniform(2, 12))
        field = (field - field.min()) / np.ptp(field) * 255
        rgb = np.stack([field, field[::-1], 255 - field], -1) + rng.normal(0, 6, (h, w, 3))
        im = Image.fromarray(np.clip(rgb, 0, 255).astype(np.uint8))
        draw = ImageDraw.Draw(im)
        for _ in range(int(rng.integers(2, 12))):
            x0, x1 = sorted(rng.integers(0, w, 2))
            y0, y1 = sorted(rng.integers(0, h, 2))
            draw.ellipse(
                [x0, y0, x1 + 5, y1 + 5], fill=tuple(int(c) for c in rng.integers(0, 256, 3))
            )
        if i % 3 == 0:
            im = im.filter(ImageFilter.GaussianBlur(1.5))
        path = folder / f"img{i:03d}.jpg"
        im.save(path, quality=90)
        paths.append(path)
    return paths


def bare_decode(path: Path) -> None:
    with Image.open(path) as im:
        im.load()


def ycbcr_decode(path: Path) -> None:
    with Image.open(path) as im:
        im.draft("YCbCr", im.size)
        im.load()


def draft_checked(path: Path) -> None:
    inspect_image(path, full_decode=False)


def draft_with_native_size(path: Path) -> None:
    inspect_image(path, full_decode=False, enlarged="flag")


def one_draft(path: Path) -> None:
    with Image.open(path) as im:
        hash_draft(im, colour=True)
        im.load()


def rates(fns: list[Callable[[Path], object]], paths: list[Path], passes: int = 5) -> list[float]:
    """Best images/s per function; passes interleave the functions so load noise hits all."""
    best = [float("inf")] * len(fns)
    for _ in range(passes):
        for i, fn in enumerate(fns):
            start = time.process_time()
            for p in paths:
                fn(p)
            best[i] = min(best[i], time.process_time() - start)
    return [len(paths) / b for b in best]


def main() -> int:
    with tempfile.TemporaryDirectory() as tmp:
        paths = make_images(Path(tmp))
        for p in paths[:3]:  # warm the page cache and scipy's lazy import
            inspect_image(p)
        names = [
            "Pillow open + load() (full RGB decode)",
            "full-size decode without RGB conversion (YCbCr)",
            "draft('L') + scipy DCT pHash + mirror",
            "the one draft ingest decodes (YCbCr, 1/8)",
            "inspect_image (decode check + metadata + hash + facts)",
            "inspect_image(full_decode=False) (draft is the check)",
            "the same with enlarged = \"flag\" (+ full-size luma)",
        ]
        fns = [bare_decode, ycbcr_decode, hash_image_file, one_draft, inspect_image,
               draft_checked, draft_with_native_size]
        rows = list(zip(names, rates(fns, paths), strict=True))
    base = rows[0][1]
    print(f"{COUNT} JPEGs of about 1 MP, quality 90; best of 5 interleaved passes of CPU "
          "time, one process")
    print(f"{'step':<56} {'images/s':>9} {'cost vs bare':>13}")
    for name, r in rows:
        print(f"{name:<56} {r:>9.0f} {base / r:>12.2f}x")
    ratio = base / rows[5][1]
    print(f"the check gather runs (full_decode=False) / bare decode = {ratio:.2f}x "
          "(bench/ingest.py measures the whole ingest step, target <= 1.0x)")
    return 0


if __name__ == "__main__":
    sys.exit(main())
