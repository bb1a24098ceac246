"""Cost of the colour and tone facts (collector.checks.colour_facts) against a bare decode.

Generates ~1 MP JPEGs (varied content: gradients, shapes, noise), then per file times (best of
several rounds, one core):

  bare decode          Image.open + load() at full size (what any ingest pays)
  draft + facts        the 1/8-scale draft decode the hash uses, then every pixel fact on it
  facts alone          colour_facts on that draft image

and prints the totals and the ratio facts / bare decode. Target: facts alone <= 0.25x a bare
decode (they run on the draft-size image, never on a second full decode).
Run: .venv/bin/python bench/colour_facts.py [--files N]
"""

from __future__ import annotations

import argparse
import io
import time

import numpy as np
from PIL import Image, ImageDraw

from collector.checks.colour_facts import colour_facts


def picture(seed: int) -> bytes:
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


def best(func, rounds: int = 3) -> float:  # type: ignore[no-untyped-def]
    times = []
    for _ in range(rounds):
        start = time.process_time()
        func()
        times.append(time.process_time() - start)
    return min(times)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--files", type=int, default=40)
    args = parser.parse_args()
    files = [picture(n) for n in range(args.files)]

    def bare() -> None:
        for data in files:
            Image.open(io.BytesIO(data)).load()

    drafts = []
    for data in files:
        img = Image.open(io.BytesIO(data))
        img.draft("RGB", (img.width // 8, img.height // 8))
        img.load()
        drafts.append(img)

    def draft_and_facts() -> None:
        for data in files:
            img = Image.open(io.BytesIO(data))
            img.draft("RGB", (img.width // 8, img.height // 8))
            colour_facts(img)

    def facts_alone() -> None:
        for img in drafts:
            colour_facts(img)

    t_bare, t_both, t_facts = best(bare), best(draft_and_facts), best(facts_alone)
    n = len(files)
    print(f"{n} JPEGs of 1280x800 (1.0 MP), CPU time, best of 3 rounds")
    print(f"{'step':<22} {'ms/file':>8} {'x bare decode':>14}")
    for label, t in (("bare decode", t_bare), ("draft + facts", t_both),
                     ("facts alone", t_facts)):
        print(f"{label:<22} {1000 * t / n:>8.2f} {t / t_bare:>14.2f}")
    print(f"target: facts alone <= 0.25x a bare decode -> "
          f"{'met' if t_facts / t_bare <= 0.25 else 'NOT met'}")


if __name__ == "__main__":
    main()
