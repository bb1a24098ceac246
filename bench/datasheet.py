"""Datasheet export speed and memory on synthetic ledgers (10,000 and 100,000 items).

Target: 100,000 items export in <= 10 s with flat memory (rows are streamed from SQLite; all
aggregation is SQL). The files carry colour facts (five dominant colours each, a tenth of them
greyscale) and the items archive-style dates and near-duplicate links, so the datasheet's
diversity panel is measured with real work to do. Each size runs in a fresh subprocess so peak
RSS belongs to that size: the ledger is written first (not timed), then the export is timed,
then repeated under tracemalloc for the Python heap peak. Prints a table.
"""

from __future__ import annotations

import json
import random
import resource
import sqlite3
import subprocess
import sys
import tempfile
import time
import tracemalloc
from pathlib import Path

SIZES = (10_000, 100_000)
HOSTS = [f"img{n}.fernhollow.example:443" for n in range(12)]
LICENCES = ["CC-BY-4.0", "CC0-1.0", "CC-BY-SA-4.0", "CC-BY-NC-4.0", None]
STATES = ["stored"] * 80 + ["duplicate"] * 6 + ["near_duplicate"] * 4 + ["failed"] * 4 + \
         ["skipped"] * 4 + ["rejected"] * 2


# Item dates as archives write them (collector.checks.dates), filled with a year.
DATES = ["{}", "c. {}", "{}-03-14", "{}s", "", "19th century", "{}?"]


def colours(rng: random.Random) -> str:
    """Five dominant colours as ingest writes them (files.colours, schema 10)."""
    shares = sorted((rng.random() for _ in range(5)), reverse=True)
    total = sum(shares)
    return json.dumps([{"lab": [round(rng.uniform(0, 100), 2), round(rng.uniform(-80, 80), 2),
                                round(rng.uniform(-80, 80), 2)],
                        "share": round(x / total, 4), "hex": "#808080",
                        "hue": round(rng.uniform(0, 360), 1)} for x in shares])


def build(root: Path, n: int) -> None:
    """A collection whose ledger holds ``n`` items, their fetches and files (no image bytes)."""
    from collector.storage.collection import init_collection

    collection = init_collection(root, contact="bench@fernhollow.example",
                                 name="Synthetic leaves")
    rng = random.Random(8)
    conn = sqlite3.connect(root / "ledger.sqlite")
    conn.execute("INSERT INTO runs (started_at, ended_at, recipe_sha256, outcome, tool_version) "
                 "VALUES ('2026-12-01T20:00:00.000Z', '2026-12-02T06:00:00.000Z', 'x', "
                 "'finished', '0.1.0')")
    conn.execute("INSERT INTO sources (id, name, kind, config) VALUES (1, 'api', 'json_api', "
                 "'{}')")
    for h in HOSTS:
        conn.execute("INSERT INTO hosts (host, robots_status, effective_budget) VALUES (?, 200, ?)",
                     (h, json.dumps({"min_interval": 3.0, "requests_per_hour": 1000,
                                     "max_connections": 1, "effective_interval": 3.0})))
    items, fetches, files = [], [], []
    for i in range(1, n + 1):
        host = HOSTS[i % len(HOSTS)]
        state = rng.choice(STATES)
        spdx = rng.choice(LICENCES)
        sha = f"{i:064x}"
        t = f"2026-12-0{1 + (i * 10 // n) // 6}T{(20 + i * 10 // n) % 24:02d}:{i % 60:02d}:00.000Z"
        has_file = state in ("stored", "near_duplicate", "duplicate")
        items.append((i, 1, f"k{i}", f"https://{host}/img/{i}.jpg", f"https://{host}/item/{i}",
                      f"Leaf {i}", f"Member {i % 97}", spdx or "see page", spdx, state,
                      None if state in ("stored",) else state, sha if has_file else None, 1, t, t,
                      DATES[i % len(DATES)].format(1800 + i % 200),
                      max(1, i - 1 - i % 7) if state == "near_duplicate" else None))
        fetches.append((1, i, "image", f"https://{host}/img/{i}.jpg", host,
                        429 if i % 500 == 0 else 200, 50_000, t, t, 3.0, 1, "allowed"))
        if state in ("stored", "near_duplicate"):
            flags = '["gps"]' if i % 250 == 0 else "[]"
            files.append((sha, 50_000, "jpg", "JPEG", "image/jpeg", 400 + i % 1600,
                          300 + (i * 7) % 1200, "RGB", i, t, flags, int(i % 10 == 0),
                          colours(rng)))
    conn.executemany("INSERT INTO items (id, source_id, source_key, image_url, page_url, title, "
                     "creator, licence_raw, spdx_id, state, reason, file_sha256, run_id, "
                     "created_at, updated_at, date, duplicate_of) "
                     "VALUES (?,?,?,?,?,?,?,?,?,?,?,?,?,?,?,?,?)", items)
    conn.executemany("INSERT INTO fetches (run_id, item_id, purpose, url, host, status, bytes, "
                     "started_at, ended_at, waited_s, attempt, robots_verdict) "
                     "VALUES (?,?,?,?,?,?,?,?,?,?,?,?)", fetches)
    conn.executemany("INSERT INTO files (sha256, size, ext, format, mime, width, height, mode, "
                     "first_item_id, stored_at, flags, greyscale, colours) "
                 "VALUES (?,?,?,?,?,?,?,?,?,?,?,?,?)", files)
    conn.commit()
    conn.close()
    # One placeholder in the store: a ledger of stored files beside an empty files/ folder
    # is refused (an unmounted disk); no image bytes are needed to export metadata.
    placeholder = collection.store.path_for(files[0][0], files[0][2])
    placeholder.parent.mkdir(parents=True, exist_ok=True)
    placeholder.write_bytes(b"")


def one(n: int) -> None:
    """Measure one size in this process and print a JSON line."""
    from collector.exports.datasheet import export_datasheet

    root = Path(tempfile.mkdtemp()) / "c"
    build(root, n)
    rss_before = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    t0 = time.perf_counter()
    result = export_datasheet(root)
    seconds = time.perf_counter() - t0
    rss_after = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    tracemalloc.start()
    export_datasheet(root, out=root / "again")
    _, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    print(json.dumps({"items": n, "files": result.counts.files, "seconds": seconds,
                      "rss_before_mb": rss_before / 1024, "rss_peak_mb": rss_after / 1024,
                      "tracemalloc_peak_mb": peak / 2**20,
                      "csv_mb": (result.out / "provenance.csv").stat().st_size / 2**20}))


def main() -> int:
    if len(sys.argv) == 3 and sys.argv[1] == "--one":
        one(int(sys.argv[2]))
        return 0
    rows = []
    for n in SIZES:
        out = subprocess.run([sys.executable, __file__, "--one", str(n)], capture_output=True,
                             text=True, check=True)
        rows.append(json.loads(out.stdout.strip().splitlines()[-1]))
    print(f"{'items':>8} {'files':>7} {'export s':>9} {'RSS before':>11} {'RSS peak':>9} "
          f"{'py heap peak':>13} {'csv':>7}")
    for r in rows:
        print(f"{r['items']:>8} {r['files']:>7} {r['seconds']:>9.2f} "
              f"{r['rss_before_mb']:>9.0f}MB {r['rss_peak_mb']:>7.0f}MB "
              f"{r['tracemalloc_peak_mb']:>11.1f}MB {r['csv_mb']:>5.1f}MB")
    big = rows[-1]
    ok = big["seconds"] <= 10.0
    print(f"target: {SIZES[-1]} items in <= 10 s: {'met' if ok else 'NOT met'}")
    return 0 if ok else 1


if __name__ == "__main__":
    raise SystemExit(main())
