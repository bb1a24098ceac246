"""Cost of the pixel facts (issue 17) per image against a bare decode, on ~1 MP JPEGs.

Generates N JPEGs of 1280x800 (gradients, shapes and grain, quality 88) and times, per file
(CPU time of this process, the best of several interleaved rounds, so that other work on a
shared machine counts as little as it can):

  bare decode          Image.open + load() at full size (what any ingest pays)
  draft                the one draft decode ingest makes of a JPEG (collector.checks.phash.
                       hash_draft with colour: YCbCr at 1/8 scale, whose Y band is the hash's)
  hash on draft        the pHash pair and the blank check on it
  facts on draft       every colour and tone fact (collector.checks.colour_facts) of the
                       YCbCr draft as ingest hands it over (reduced in YCbCr, then made
                       RGB), the target row
  native size         the enlargement estimate (collector.checks.pixel_facts): a full-size
                       luma decode and the estimate, paid only with [images] enlarged = "flag"
                       or "reject"

and prints each as milliseconds and as a multiple of the bare decode. Target (issue 17): the
facts <= 0.25x a bare decode (they run on the draft-size picture, never on a second full
decode). Run: .venv/bin/python bench/pixel_facts.py [--files N] [--rounds R]
"""

from __future__ import annotations

import argparse
import io
import time
from collections.abc import Callable

import numpy as np
from PIL import Image, ImageDraw

from collector.checks.colour_facts import colour_facts
from collector.checks.phash import hash_draft, phash_and_blank
from collector.checks.pixel_facts import estimate_enlargement

TARGET = 0.25


def picture(seed: int) -> bytes:
    """A 1280x800 JPEG: a colour ramp with grain and a dozen filled ellipses."""
    rng = np.random.default_rng(seed)
    w, h = 1280, 800
    base = np.linspace(0, 255, w)[None, :, None] * rng.random(3)[None, None, :]
    img = Image.fromarray((base + rng.normal(0, 12, (h, w, 3))).clip(0, 255).astype(np.uint8))
    draw = ImageDraw.Draw(img)
    for _ in range(12):
        x, y = int(rng.integers(0, w - 200)), int(rng.integers(0, h - 200))
        draw.ellipse((x, y, x + int(rng.integers(40, 200)), y + int(rng.integers(40, 200))),
                     fill=tuple(int(v) for v in rng.integers(0, 256, 3)))
    out = io.BytesIO()
    img.save(out, "JPEG", quality=88)
    return out.getvalue()


def draft(data: bytes) -> Image.Image:
    """The draft ingest decodes (one decode for hash and colour)."""
    im = Image.open(io.BytesIO(data))
    hash_draft(im, colour=True)
    im.load()
    return im


def bare(data: bytes) -> None:
    """A full decode, the picture let go at once (a list of 40 decoded pictures would time
    the allocation of 120 MB as well)."""
    with Image.open(io.BytesIO(data)) as im:
        im.load()


def native_size(data: bytes) -> None:
    """The full-size luma decode and the native-size estimate."""
    im = Image.open(io.BytesIO(data))
    im.draft("L", im.size)
    estimate_enlargement(im)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--files", type=int, default=40)
    parser.add_argument("--rounds", type=int, default=7)
    args = parser.parse_args()
    files = [picture(n) for n in range(args.files)]
    drafts = [draft(data) for data in files]
    steps: dict[str, Callable[[], object]] = {
        "bare decode": lambda: [bare(d) for d in files],
        "draft": lambda: [draft(d).close() for d in files],
        "hash on draft": lambda: [phash_and_blank(im) for im in drafts],
        "facts on draft": lambda: [colour_facts(im) for im in drafts],  # YCbCr, as ingest
        "native size": lambda: [native_size(d) for d in files],
    }
    best = dict.fromkeys(steps, float("inf"))
    for func in steps.values():
        func()  # imports and first-call set-up are not timed
    for _ in range(args.rounds):
        for label, func in steps.items():
            start = time.process_time()
            func()
            best[label] = min(best[label], time.process_time() - start)
    n, base = len(files), best["bare decode"]
    print(f"{n} JPEGs of 1280x800 (1.0 MP), CPU time, best of {args.rounds} interleaved rounds")
    print(f"{'step':<16} {'ms/file':>8} {'x bare decode':>14}")
    for label, seconds in best.items():
        print(f"{label:<16} {1000 * seconds / n:>8.2f} {seconds / base:>14.2f}")
    ratio = best["facts on draft"] / base
    print(f"target: facts on draft <= {TARGET}x a bare decode: {ratio:.2f}x -> "
          f"{'met' if ratio <= TARGET else 'NOT met'}")


if __name__ == "__main__":
    main()
