"""Time demo archive generation and server start-up; prints a table (target: < 20 s, < 2 s).

Run: .venv/bin/python bench/demo_generate.py [runs]
"""

from __future__ import annotations

import os
import sys
import tempfile
import time
from pathlib import Path

from collector.demo_site import DemoServer, generate


def main(runs: int = 2) -> None:
    rows = []
    digests = set()
    with tempfile.TemporaryDirectory() as tmp:
        for n in range(runs):
            folder = Path(tmp) / f"run{n}"
            t0 = time.perf_counter()
            manifest = generate(folder)
            gen_s = time.perf_counter() - t0
            digests.add(manifest["digest"])
            t0 = time.perf_counter()
            server = DemoServer(folder).start()
            start_s = time.perf_counter() - t0
            server.stop()
            size = sum(p.stat().st_size for p in folder.rglob("*") if p.is_file())
            rows.append((n + 1, gen_s, start_s, len(manifest["items"]),
                         len(manifest["resources"]), size / 1e6))
    print(f"cpu count: {os.cpu_count()}; load average: {os.getloadavg()[0]:.2f}")
    print(f"{'run':>3} {'generate s':>10} {'start s':>8} {'items':>6} {'files':>6} {'MB':>6}")
    for run, gen_s, start_s, items, files, mb in rows:
        print(f"{run:>3} {gen_s:>10.2f} {start_s:>8.3f} {items:>6} {files:>6} {mb:>6.1f}")
    print(f"targets: generate < 20 s, start < 2 s; identical digests: {len(digests) == 1}")


if __name__ == "__main__":
    main(int(sys.argv[1]) if len(sys.argv) > 1 else 2)
