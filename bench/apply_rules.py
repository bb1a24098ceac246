"""How long ``collector apply-rules`` takes on large collections (collector.run.set_aside).

Builds a ledger of N files rows with varied colour and tone facts (no images: the command
reads only the ledger), then times, best of a few rounds:

  judge      reading every file's facts and judging them by three pixel rules (a dry run)
  record     writing the moves and their rule_changes rows (one transaction), from a ledger
             where nothing was set aside yet

and prints a table with the moves and the time per 1,000 files. No target: the command runs
offline on the curator's request; the table shows it stays a matter of seconds.
Run: .venv/bin/python bench/apply_rules.py [--files 10000 100000]
"""

from __future__ import annotations

import argparse
import json
import shutil
import tempfile
import time
from pathlib import Path

import numpy as np

from collector.config.recipe import parse_recipe
from collector.run.set_aside import plan, record
from collector.storage.ledger import Ledger

RULES = '''contact = "bench@example.org"
[[pixel_rules]]
name = "colour"
greyscale = false
[[pixel_rules]]
name = "greens"
hues = [70, 170]
min_hue_share = 0.3
[[pixel_rules]]
name = "sharp"
min_sharpness = 50
max_background_share = 0.8
'''


def fill(ledger: Ledger, n: int) -> None:
    """N files rows with facts drawn at random (fixed seed)."""
    rng = np.random.default_rng(0)
    with ledger.transaction():
        for i in range(n):
            hues = rng.uniform(0, 360, 5)
            shares = rng.dirichlet(np.ones(5))
            colours = [{"lab": [50.0, 30.0, 20.0], "share": round(float(s), 4),
                        "hex": "#808080", "hue": round(float(h), 1)}
                       for h, s in zip(hues, shares, strict=True)]
            ledger.add_file({
                "sha256": f"{i:064x}", "size": 1000, "ext": "jpg",
                "greyscale": int(rng.random() < 0.05), "brightness": float(rng.uniform(0, 100)),
                "contrast": float(rng.uniform(0, 40)),
                "colourfulness": float(rng.uniform(0, 100)),
                "sharpness": float(rng.lognormal(5, 1.5)),
                "background_share": float(rng.random()), "colours": json.dumps(colours)})


def best(fn, rounds: int = 3) -> float:  # type: ignore[no-untyped-def]
    times = []
    for _ in range(rounds):
        start = time.perf_counter()
        fn()
        times.append(time.perf_counter() - start)
    return min(times)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--files", type=int, nargs="+", default=[10_000, 100_000])
    args = parser.parse_args()
    recipe = parse_recipe(RULES, Path("bench-recipe.toml"))
    print(f"{'files':>8} {'moves':>8} {'judge s':>8} {'record s':>9} {'judge ms/1000':>14}")
    for n in args.files:
        folder = Path(tempfile.mkdtemp(prefix="apply-rules-"))
        try:
            with Ledger.create(folder / "ledger.sqlite") as ledger:
                fill(ledger, n)
                judge = best(lambda ledger=ledger: plan(ledger, recipe))
                report = plan(ledger, recipe)
                start = time.perf_counter()
                record(ledger, recipe, report)
                write = time.perf_counter() - start
            print(f"{n:>8,} {len(report.moves):>8,} {judge:>8.2f} {write:>9.2f} "
                  f"{judge * 1e6 / n:>14.1f}")
        finally:
            shutil.rmtree(folder, ignore_errors=True)


if __name__ == "__main__":
    main()
