"""Hostile servers, one at a time: each misbehaviour of demo_site/hostile.py gets its own
`collector gather` child process (with the normal item beside it), and the table shows the
ledger outcome, the reason and the child's peak RSS (wait4 ru_maxrss), next to a run of the
normal item alone. Every row must end in a handled outcome; exit status 1 otherwise.

Then the hostile folders, recipes and texts of bench/hostile_folders.py (when no case is named).

Usage: python bench/hostile.py [case-name ...]
"""

from __future__ import annotations

import sys
import tempfile
from pathlib import Path

import hostile_folders

from collector.demo_site.hostile import CASES, HostileArchive
from collector.demo_site.hostile_run import judge, run_gather
from collector.storage.collection import init_collection


def one(cases: list, folder: Path) -> tuple[int, float, int, list, int]:
    """Gather over ``cases``; (peak RSS KiB, seconds, exit code, verdicts, requests the trap
    site on the unlisted loopback address received)."""
    with HostileArchive(cases=cases, outside=folder) as archive:
        col = init_collection(folder / "col", contact="bench@example.org")
        col.recipe_path.write_text(archive.recipe())
        stats = run_gather(col.root, "--quiet", cwd=folder)
        with col.ledger(readonly=True) as ledger:
            verdicts = [judge(ledger, c) for c in cases]
            normal = ledger.query("SELECT state FROM items WHERE source_key = 'normal'")
        if not normal or normal[0]["state"] != "stored":
            verdicts.append(None)  # the normal item was not stored: a failure
        trap_hits = len(archive.forbidden.hits)
    return stats.max_rss_kib, stats.seconds, stats.returncode, verdicts, trap_hits


def main(names: list[str]) -> int:
    cases = [c for c in CASES if not names or c.name in names]
    with tempfile.TemporaryDirectory() as tmp:
        base_rss, base_s, base_rc, _, _ = one([], Path(tmp) / "baseline")
        print(f"baseline (normal item only): peak RSS {base_rss / 1024:.0f} MiB, "
              f"{base_s:.1f} s, exit {base_rc}\n")
        head = (f"{'misbehaviour':<52} | {'outcome':<22} | {'ledger reason':<34} | "
                f"trap | peak MiB (+)")
        print(head)
        print("-" * len(head))
        bad = 0
        for n, case in enumerate(cases):
            rss, _secs, rc, verdicts, trap = one([case], Path(tmp) / f"case-{n}")
            v = verdicts[0]
            handled = rc == 0 and v.ok and None not in verdicts and trap == 0
            bad += not handled
            mark = "" if handled else "  <-- NOT HANDLED " + "; ".join(v.problems)
            print(f"{case.misbehaviour[:52]:<52} | {v.outcome[:22]:<22} | {v.reason[:34]:<34} | "
                  f"{trap:4d} | {rss / 1024:5.0f} ({(rss - base_rss) / 1024:+4.0f}){mark}")
    print(f"\n{len(cases) - bad} of {len(cases)} misbehaviours handled; the normal item was "
          "stored beside each; 'trap' counts requests that reached the site on the unlisted "
          "loopback address (must be 0).\n")
    folders = 0 if names else hostile_folders.main()  # the non-server findings, one row each
    return 1 if bad or folders else 0


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
