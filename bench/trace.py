"""Speed of ``collector trace`` on a collection of 1,000,000 files.

Builds a synthetic ledger in a temp dir (raw executemany in one transaction, indexes rebuilt
afterwards, libraries.md section 3): 1,000 real generated JPEGs plus 999,000 rows with random
sha256s and hashes, each with an item and an image fetch. Then prints a table:

  exact lookup (sha256 primary key + items + fetch rows)   target <= 5 ms
  near lookup (scan of 1M hashes for 8 turns, second look, records)  target <= 10 ms
  whole `collector trace one.jpg --in DIR` (subprocess)    target <= 1.5 s
  folder trace of 1,000 files (subprocess)                 target <= 10 s

Run: .venv/bin/python bench/trace.py [--files N]
"""

from __future__ import annotations

import argparse
import contextlib
import hashlib
import io
import os
import random
import shutil
import sqlite3
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
from PIL import Image, ImageDraw

from collector.checks.likeness import find_copies, look_at_file
from collector.checks.phash import HASH_ALGO, hash_image_file, to_signed64
from collector.exports.trace import Tracer
from collector.storage.collection import Collection, init_collection
from collector.storage.hashindex import HashFile, ledger_mark

REAL = 1000
NOW = "2026-03-01T21:53:28.123Z"


def picture(seed: int, size: tuple[int, int] = (256, 192)) -> Image.Image:
    """A deterministic picture: gradient plus random shapes."""
    rng = random.Random(seed)
    w, h = size
    ramp = np.linspace(0, 1, w)[None, :] * rng.uniform(0.3, 1) + np.linspace(
        0, 1, h)[:, None] * rng.uniform(-1, 1)
    base = ((ramp - ramp.min()) / (np.ptp(ramp) or 1) * 200 + 20).astype(np.uint8)
    im = Image.fromarray(np.stack([base, base[::-1], base[:, ::-1]], -1), "RGB")
    draw = ImageDraw.Draw(im)
    for _ in range(rng.randint(3, 7)):
        x0, y0 = rng.randrange(w - 30), rng.randrange(h - 30)
        box = (x0, y0, x0 + rng.randrange(20, w // 2), y0 + rng.randrange(20, h // 2))
        fill = tuple(rng.randrange(256) for _ in range(3))
        (draw.ellipse if rng.random() < 0.5 else draw.rectangle)(box, fill=fill)
    return im


def build(root: Path, total: int, work: Path) -> list[tuple[str, Path, Image.Image]]:
    """Create the collection; returns the real files as (sha256, path, picture)."""
    collection = init_collection(root, contact="bench@example.org")
    store = collection.store
    real: list[tuple[str, Path, Image.Image]] = []
    rows_real = []
    for n in range(REAL):
        im = picture(n)
        buf = io.BytesIO()
        im.save(buf, "JPEG", quality=90)
        data = buf.getvalue()
        sha = hashlib.sha256(data).hexdigest()
        path = store.path_for(sha, "jpg")  # written directly: no per-file fsync in a bench
        path.parent.mkdir(parents=True, exist_ok=True)
        path.write_bytes(data)
        ph, mirror = hash_image_file(path)
        real.append((sha, path, im))
        rows_real.append((sha, len(data), ph, mirror))
    rng = np.random.default_rng(1)
    fake = total - REAL
    fake_hashes = rng.integers(0, 2**63, size=(fake, 2), dtype=np.int64)
    fake_shas = [os.urandom(32).hex() for _ in range(fake)]

    conn = sqlite3.connect(collection.ledger_path)
    conn.execute("PRAGMA synchronous=OFF")
    indexes = [r[0] for r in conn.execute(
        "SELECT sql FROM sqlite_master WHERE type='index' AND sql IS NOT NULL "
        "AND tbl_name IN ('items', 'fetches')")]
    names = [r[0] for r in conn.execute(
        "SELECT name FROM sqlite_master WHERE type='index' AND sql IS NOT NULL "
        "AND tbl_name IN ('items', 'fetches')")]
    with conn:
        for name in names:
            conn.execute(f'DROP INDEX "{name}"')
        conn.execute("INSERT INTO sources (id, name, kind, config) VALUES "
                     "(1, 'society-api', 'json_api', '{}')")
        conn.execute("INSERT INTO runs (id, started_at, outcome) VALUES (1, ?, 'finished')",
                     (NOW,))

        def rows():
            for i, (sha, size, ph, mirror) in enumerate(rows_real):
                yield i + 1, sha, size, to_signed64(ph), to_signed64(mirror)
            for j in range(fake):
                yield (REAL + j + 1, fake_shas[j], 50_000, int(fake_hashes[j, 0]),
                       int(fake_hashes[j, 1]))

        all_rows = list(rows())
        conn.executemany(
            "INSERT INTO items (id, source_id, source_key, image_url, page_url, title, "
            "creator, licence_raw, spdx_id, state, file_sha256, run_id, created_at, "
            "updated_at) VALUES (?, 1, ?, ?, ?, ?, 'A. Moss', 'CC BY 4.0', 'CC-BY-4.0', "
            "'stored', ?, 1, ?, ?)",
            ((i, f"FH-{i}", f"http://127.0.0.2:8080/media/{i}.jpg",
              f"http://127.0.0.2:8080/specimens/{i}", f"Specimen {i}", sha, NOW, NOW)
             for i, sha, *_ in all_rows))
        conn.executemany(
            "INSERT INTO fetches (run_id, item_id, purpose, url, host, status, bytes, "
            "started_at, ended_at, attempt, robots_verdict, etag) VALUES "
            "(1, ?, 'image', ?, '127.0.0.2:8080', 200, ?, ?, ?, 1, 'allowed', ?)",
            ((i, f"http://127.0.0.2:8080/media/{i}.jpg", size, NOW, NOW, f'"e{i}"')
             for i, _sha, size, *_ in all_rows))
        conn.executemany(
            "INSERT INTO files (sha256, size, ext, format, width, height, phash, "
            "phash_mirror, hash_algo, first_item_id, stored_at, flags) VALUES "
            "(?, ?, 'jpg', 'JPEG', 256, 192, ?, ?, ?, ?, ?, '[]')",
            ((sha, size, ph, mirror, HASH_ALGO, i, NOW) for i, sha, size, ph, mirror in all_rows))
        for sql in indexes:
            conn.execute(sql)
    conn.close()
    return real


def stats_ms(samples: list[float]) -> tuple[float, float]:
    """(median, p95) in milliseconds."""
    ordered = sorted(samples)
    return (statistics.median(ordered) * 1000,
            ordered[min(len(ordered) - 1, int(0.95 * len(ordered)))] * 1000)


def main() -> int:
    """Build, measure, print the table."""
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--files", type=int, default=1_000_000)
    parser.add_argument("--keep", type=Path, default=None,
                        help="build in this new folder and keep it (default: a temp dir)")
    args = parser.parse_args()
    collector_cmd = str(Path(sys.executable).with_name("collector"))
    table: list[tuple[str, str, str]] = []
    with contextlib.ExitStack() as stack:
        if args.keep:
            args.keep.mkdir(parents=True)
            work = args.keep
        else:
            work = Path(stack.enter_context(tempfile.TemporaryDirectory(prefix="bench-trace-")))
        root = work / "collection"
        t0 = time.perf_counter()
        real = build(root, args.files, work)
        table.append((f"build synthetic ledger ({args.files:,} files)",
                      f"{time.perf_counter() - t0:.1f} s", "-"))

        t0 = time.perf_counter()
        with Tracer.open(root):
            pass
        table.append(("first open: hash file built from the ledger",
                      f"{time.perf_counter() - t0:.2f} s", "once"))
        index_path = Collection(root).hash_index_path
        table.append(("hash file size", f"{index_path.stat().st_size / 1e6:.0f} MB", "-"))

        with Tracer.open(root) as tracer:
            t0 = time.perf_counter()
            ledger_mark(tracer.ledger)
            table.append(("staleness check (count, max rowid, last sha)",
                          f"{(time.perf_counter() - t0) * 1000:.1f} ms", "-"))
            t0 = time.perf_counter()
            HashFile.open(tracer.ledger, index_path)
            table.append(("open fresh hash file (check + mmap)",
                          f"{(time.perf_counter() - t0) * 1000:.1f} ms", "-"))
            picks = random.Random(3).sample(real, 200)
            exact = []
            for sha, _, _ in picks:
                t0 = time.perf_counter()
                record = tracer.lookup_exact(sha)
                exact.append(time.perf_counter() - t0)
                assert record is not None and record.origin is not None
            med, p95 = stats_ms(exact)
            table.append(("exact lookup, median / p95", f"{med:.2f} / {p95:.2f} ms", "<= 5 ms"))
            near, scans, found = [], [], 0
            for sha, _, im in picks:
                buf = io.BytesIO()
                im.resize((128, 96)).save(buf, "JPEG", quality=80)
                q = work / "q.jpg"
                q.write_bytes(buf.getvalue())
                look = look_at_file(q)  # not timed: decoding and hashing the query file
                t0 = time.perf_counter()
                tracer.hashes.candidates(look.turns, tracer.near_distance)
                scans.append(time.perf_counter() - t0)
                t0 = time.perf_counter()
                confirmed = find_copies(look, lambda turns, crops: tracer.hashes.candidates(
                    turns, tracer.near_distance, crops), tracer._stored_look)
                records = [tracer.lookup_exact(c.key) for c in confirmed]
                near.append(time.perf_counter() - t0)
                found += bool(records) and records[0] is not None and confirmed[0].key == sha
            med, p95 = stats_ms(scans)
            table.append(("scan for all 8 turns + crop candidates, median / p95",
                          f"{med:.2f} / {p95:.2f} ms", "-"))
            med, p95 = stats_ms(near)
            table.append(("near lookup (upright+mirror scan, second look, records), median/p95",
                          f"{med:.2f} / {p95:.2f} ms", "<= 10 ms"))
            table.append(("near lookup found the right original", f"{found} / {len(picks)}",
                          "-"))

        one = work / "one.jpg"
        shutil.copyfile(real[0][1], one)
        env = {**os.environ, "OPENBLAS_NUM_THREADS": "1"}
        walls = []
        for _ in range(3):
            t0 = time.perf_counter()
            proc = subprocess.run([collector_cmd, "trace", str(one), "--in", str(root)],
                                  capture_output=True, text=True, env=env)
            walls.append(time.perf_counter() - t0)
            assert proc.returncode == 0, proc.stderr
        table.append(("`collector trace one.jpg --in DIR`, median of 3",
                      f"{statistics.median(walls):.2f} s", "<= 1.5 s"))

        folder = work / "folder"
        folder.mkdir()
        for n, (_sha, path, im) in enumerate(real):
            if n % 10 < 5:
                shutil.copyfile(path, folder / f"exact-{n}.jpg")
            elif n % 10 < 9:
                im.resize((192, 144)).save(folder / f"near-{n}.jpg", quality=80)
            else:
                picture(10_000 + n).save(folder / f"other-{n}.png")
        t0 = time.perf_counter()
        proc = subprocess.run([collector_cmd, "trace", str(folder), "--in", str(root),
                               "--csv"], capture_output=True, text=True, env=env)
        wall = time.perf_counter() - t0
        kinds = [line.split(",")[1] for line in proc.stdout.splitlines()[1:]]
        table.append(("folder trace of 1,000 files (--csv)", f"{wall:.2f} s", "<= 10 s"))
        table.append(("  exact / near / none", f"{kinds.count('exact')} / "
                      f"{kinds.count('near')} / {kinds.count('none')}", "expected 500 / 400 / 100"))

    width = max(len(r[0]) for r in table)
    print(f"{'measure':<{width}}  {'result':>18}  target")
    for name, value, target in table:
        print(f"{name:<{width}}  {value:>18}  {target}")
    print("Near lookup is a brute-force numpy bitwise_count scan: it finds every stored hash "
          "within the threshold (hash or mirror hash), so its guaranteed radius is the "
          "threshold itself.")
    return 0


if __name__ == "__main__":
    sys.exit(main())
