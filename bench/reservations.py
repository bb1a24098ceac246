"""Cost of reading reservations against text-and-data mining (collector.checks.reservations).

Prints one row per tdmrep.json size: parsing the file once per origin, and deciding one URL
that no rule matches (every rule is tried, the worst case; TDMRep §3.1 takes the first match),
for plain prefix rules and for "*"/"$" patterns; then the header and meta readers per page.
No target: the table shows what the caps (512 KiB, 10,000 rules) bound. Best of 5 passes.
"""

from __future__ import annotations

import json
import time
from collections.abc import Callable

from collector.checks.reservations import (
    MAX_TDMREP_RULES,
    header_signals,
    meta_signals,
    parse_tdmrep,
)

URL = "https://archive.example/collection/media/no-rule-matches.jpg"
PAGE = ('<!DOCTYPE html><html><head><meta charset="utf-8"><meta name="robots" content="index">'
        '<meta name="tdm-reservation" content="1"><title>x</title></head><body>'
        + "<p>text</p>" * 5000 + "</body></html>")


def best(func: Callable[[], object], repeat: int = 5) -> float:
    """Best wall time of ``repeat`` calls, in milliseconds."""
    times = []
    for _ in range(repeat):
        start = time.perf_counter()
        func()
        times.append(time.perf_counter() - start)
    return min(times) * 1000


def main() -> None:
    print(f"{'rules':>7} | {'pattern':<8} | {'bytes':>9} | {'parse ms':>9} | "
          f"{'decide 1 URL ms':>15}")
    print("-" * 62)
    for count in (10, 1_000, MAX_TDMREP_RULES):
        for kind in ("prefix", "wildcard"):
            rules = [{"location": f"/d{n}/" if kind == "prefix" else f"/d{n}/*.jpg$",
                      "tdm-reservation": 1} for n in range(count)]
            body = json.dumps(rules).encode()
            parsed = parse_tdmrep(body)
            parsed.first_match(URL)  # compile the patterns once, as a run does
            print(f"{count:>7,} | {kind:<8} | {len(body):>9,} | "
                  f"{best(lambda b=body: parse_tdmrep(b)):>9.2f} | "
                  f"{best(lambda p=parsed: p.first_match(URL)):>15.3f}")
    headers = {"tdm-reservation": "1", "X-Robots-Tag": "noindex, noimageai"}
    print(f"\nheader fields of one answer: {best(lambda: header_signals(URL, headers, ['c'])):.4f}"
          f" ms; meta elements of a {len(PAGE):,}-character page: "
          f"{best(lambda: meta_signals(URL, PAGE, ['c'])):.3f} ms")


if __name__ == "__main__":
    main()
