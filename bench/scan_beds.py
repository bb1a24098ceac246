"""Scanner-bed splitting on generated A4 beds at 300 dpi (demo_site.scan_beds).

For each kind of bed (white bed with photos, white bed with pale white-margined paper, leaves
with drop shadows, pale items on a dark backing sheet) generates N beds of 3-8 items rotated up
to 4 degrees, with uneven lighting and sensor noise, splits each with the splitter and matches
found boxes to true boxes (greedy, best IoU first). Prints per kind: items, found, missed,
extra, share of items at IoU >= 0.9, median IoU, seconds per bed; and the detected bed.
Targets: >= 95 % of items at IoU >= 0.9, no missed or extra items, on every kind.
Run: .venv/bin/python bench/scan_beds.py [N per kind] [dpi]
"""

from __future__ import annotations

import statistics
import sys
import time

from collector.demo_site.scan_beds import BED_KINDS, iou, make_bed
from collector.sources import splitter


def match(found: list[tuple[int, int, int, int]],
          truth: list[tuple[int, int, int, int]]) -> tuple[list[float], int, int]:
    """(IoU of each true item, 0 if missed; missed count; extra count), greedy by best IoU."""
    pairs = sorted(((iou(f, t), i, j) for i, f in enumerate(found) for j, t in enumerate(truth)),
                   reverse=True)
    used_f: set[int] = set()
    scores = [0.0] * len(truth)
    for score, i, j in pairs:
        if score <= 0.1 or i in used_f or scores[j] > 0:
            continue
        used_f.add(i)
        scores[j] = score
    missed = sum(1 for s in scores if s == 0)
    return scores, missed, len(found) - len(used_f)


def main() -> None:
    per_kind = int(sys.argv[1]) if len(sys.argv) > 1 else 8
    dpi = float(sys.argv[2]) if len(sys.argv) > 2 else 300.0
    print(f"{per_kind} beds per kind, A4 at {dpi:.0f} dpi, 3-8 items each")
    print(f"{'bed':<8} {'items':>6} {'found':>6} {'missed':>7} {'extra':>6} {'IoU>=0.9':>9} "
          f"{'median':>7} {'s/bed':>6}  background")
    ok = True
    for k, kind in enumerate(BED_KINDS):
        scores: list[float] = []
        missed = extra = found = 0
        seconds = 0.0
        backgrounds = set()
        for n in range(per_kind):
            bed = make_bed(kind, 1000 * k + n, 3 + n % 6, dpi=dpi)
            start = time.perf_counter()
            result = splitter.analyse_scan(bed.image)
            seconds += time.perf_counter() - start
            s, m, e = match([i.box for i in result.items], bed.boxes)
            scores += s
            missed, extra, found = missed + m, extra + e, found + len(result.items)
            backgrounds.add(getattr(result, "background", "?"))
        good = sum(1 for s in scores if s >= 0.9) / len(scores)
        ok = ok and good >= 0.95 and missed == 0 and extra == 0
        print(f"{kind:<8} {len(scores):>6} {found:>6} {missed:>7} {extra:>6} {good:>8.1%} "
              f"{statistics.median(scores):>7.3f} {seconds / per_kind:>6.2f}  "
              f"{', '.join(sorted(str(b) for b in backgrounds))}")
    print("target (>= 95 % at IoU >= 0.9, none missed or extra, every kind):",
          "ok" if ok else "MISSED")


if __name__ == "__main__":
    main()
