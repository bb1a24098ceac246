"""How fast the everyday commands start, in this environment (the dev venv has the test extra,
whose pandas and scipy used to be imported by every command).

Gathers the demo archive once into a temp folder (or uses --collection DIR), then runs each
command in a fresh process N times and prints the fastest and the median wall time beside
`python -c pass`:

  collector --help                                   target <= 0.3 s
  collector status DEMO                              target <= 0.4 s
  collector trace FILE --in DEMO                     target <= 0.6 s

The fastest run is the figure compared with the target (the others measure the machine's
other work, not the command); the least CPU time (user + system) of the runs is printed too.
Run: .venv/bin/python bench/startup.py [--runs N]
"""

from __future__ import annotations

import argparse
import resource
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

TARGETS = {"help": 0.3, "status": 0.4, "trace": 0.6}


def timed(args: list[str], runs: int) -> tuple[list[float], list[float]]:
    """Wall times and CPU times (user + system) of ``runs`` fresh processes running
    ``args`` (each must exit 0). CPU time barely moves when the machine is busy."""
    walls, cpus = [], []
    for _ in range(runs):
        before = resource.getrusage(resource.RUSAGE_CHILDREN)
        start = time.perf_counter()
        subprocess.run(args, check=True, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
        walls.append(time.perf_counter() - start)
        after = resource.getrusage(resource.RUSAGE_CHILDREN)
        cpus.append(after.ru_utime - before.ru_utime + after.ru_stime - before.ru_stime)
    return walls, cpus


def demo_collection(folder: Path) -> Path:
    """Gather the demo archive into ``folder`` (about half a minute)."""
    subprocess.run([sys.executable, "-m", "collector", "demo", str(folder), "--quiet",
                    "--port", "8733"], check=True, stdout=subprocess.DEVNULL)
    return folder


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--runs", type=int, default=7)
    parser.add_argument("--collection", type=Path, help="an existing demo collection")
    args = parser.parse_args()
    with tempfile.TemporaryDirectory() as tmp:
        demo = args.collection or demo_collection(Path(tmp) / "demo")
        stored = next(p for p in sorted((demo / "files").rglob("*.jpg")))
        py = [sys.executable]
        rows = [
            ("python -c pass", None, [*py, "-c", "pass"]),
            ("collector --help", "help", [*py, "-m", "collector", "--help"]),
            ("collector status DEMO", "status", [*py, "-m", "collector", "status", str(demo)]),
            ("collector trace FILE --in DEMO", "trace",
             [*py, "-m", "collector", "trace", str(stored), "--in", str(demo)]),
        ]
        print(f"{'command':<34} {'fastest':>8} {'median':>8} {'cpu':>8} {'target':>8}  met")
        for label, key, command in rows:
            times, cpus = timed(command, args.runs)
            target = TARGETS.get(key or "")
            met = "" if target is None else ("yes" if min(times) <= target else "NO")
            shown = "" if target is None else f"{target:.2f} s"
            print(f"{label:<34} {min(times):>6.2f} s {statistics.median(times):>6.2f} s "
                  f"{min(cpus):>6.2f} s "
                  f"{shown:>8}  {met}")


if __name__ == "__main__":
    main()
