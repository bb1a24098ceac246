"""Admission bench: the CPU a run spends admitting listed items before any image is requested.

One JSON listing of HOSTS x PER_HOST items (as bench/cluster.py: 40 hosts x 40 images, licence
"CC0-1.0", loopback image URLs), mapped by the json_api kind and admitted into a real ledger
in a fresh collection: one by one (:meth:`collector.run.ingest.Ingest.admit`, a transaction
per item), then grouped as a run's listing thread admits them (listed.ListedGroup and
:meth:`~collector.run.ingest.Ingest.admit_group`, a transaction per group), then again as a
resumed run (every item already in the ledger, none stored yet).
No request is made: the page is handed to the adapter as it was fetched and the jobs
admission gives the hosts are only counted. Printed: items, jobs, wall and process CPU for
listing (field mapping) and for admission, CPU per item (target: admission <= 0.15 ms per
item). Usage: python bench/admission.py [--items N] [--profile]
"""

from __future__ import annotations

import argparse
import cProfile
import json
import pstats
import sys
import tempfile
import time
from collections.abc import Iterable, Mapping
from pathlib import Path
from typing import Any

from collector import sources as adapters
from collector.demo_site.recipes import listing_source
from collector.run.gather import prepared_run
from collector.run.listed import ListedGroup
from collector.run.scheduling import Gatherer
from collector.storage.collection import Collection, init_collection

HOSTS, PER_HOST = 40, 40
LISTING = "http://127.0.0.50:8000/items"


class _Page:
    """A fetched page as the adapters see it (sources.base.Page)."""

    def __init__(self, url: str, body: bytes) -> None:
        self.url, self.status, self.body = url, 200, body
        self.headers = {"Content-Type": "application/json"}
        self.links: dict[str, Any] = {}

    @property
    def text(self) -> str:
        return self.body.decode()

    def json(self) -> Any:
        return json.loads(self.body)


class _Pages:
    """Hands the one listing page out (sources.base.PageFetcher); nothing goes on the wire."""

    def __init__(self, body: bytes) -> None:
        self.body = body

    def get_page(self, url: str, *, purpose: str = "listing", item_id: int | None = None,
                 params: Mapping[str, str] | None = None,
                 headers: Mapping[str, str] | None = None,
                 secret_params: Iterable[str] = (), keep_for: float = 0.0) -> _Page:
        return _Page(url, self.body)


def _listing(items: int) -> bytes:
    rows = [{"id": f"{n // PER_HOST}-{n % PER_HOST}", "title": f"h{n // PER_HOST} i{n % PER_HOST}",
             "licence": "CC0-1.0",
             "image": f"http://127.0.0.{10 + n // PER_HOST % 200}:8001/img/{n % PER_HOST}.png"}
            for n in range(items)]
    return json.dumps({"results": rows}).encode()


RECIPE = ('contact = "bench@example.org"\n[network]\nallow_addresses = ["127.0.0.0/8"]\n'
          + listing_source("bench", LISTING))


def _timed(work: Iterable[Any]) -> tuple[list[Any], float, float]:
    wall, cpu = time.perf_counter(), time.process_time()
    out = list(work)
    return out, time.perf_counter() - wall, time.process_time() - cpu


class _Jobs:
    """Takes the jobs a run would send to its hosts (collector.run.scheduling.HostDispatch)."""

    def __init__(self) -> None:
        self.jobs = 0

    def attach(self, gatherer: Any) -> None:
        pass

    def put(self, host: str, job: Any) -> None:
        self.jobs += 1

    def finish(self) -> None:
        pass


def one_pass(folder: Path, body: bytes, *, grouped: bool,
             profile: cProfile.Profile | None) -> dict[str, Any]:
    """List and admit every item once: grouped as a run's listing thread admits them
    (listed.ListedGroup, Ingest.admit_group), or one by one (Ingest.admit)."""
    col = (Collection(folder) if folder.exists()
           else init_collection(folder, contact="bench@example.org"))
    col.recipe_path.write_text(RECIPE)
    with prepared_run(col) as (recipe, ledger):
        jobs = _Jobs()
        g = Gatherer(col, recipe, ledger, None, dispatch=jobs)
        g.run_id = ledger.start_run("bench", {}, "bench")
        source, sid = recipe.sources[0], g._source_ids[0]
        cands, l_wall, l_cpu = _timed(adapters.iter_candidates(
            source, _Pages(body), lambda n: None, col.root))
        if profile is not None:
            profile.enable()
        wall, cpu = time.perf_counter(), time.process_time()
        if grouped:
            listed = ListedGroup(g, sid, None)
            for c in cands:
                listed.add(c)
            listed.flush()
        else:
            for c in cands:
                if (job := g.ingest.admit(sid, c)) is not None:
                    g._enqueue(job)
        a_wall, a_cpu = time.perf_counter() - wall, time.process_time() - cpu
        if profile is not None:
            profile.disable()
        ledger.end_run(g.run_id, "stopped")
    return {"items": len(cands), "jobs": jobs.jobs, "list_wall": l_wall, "list_cpu": l_cpu,
            "admit_wall": a_wall, "admit_cpu": a_cpu}


def main(argv: list[str]) -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--items", type=int, default=HOSTS * PER_HOST)
    ap.add_argument("--profile", action="store_true")
    args = ap.parse_args(argv)
    body = _listing(args.items)
    prof = cProfile.Profile() if args.profile else None
    with tempfile.TemporaryDirectory() as tmp:
        rows = [("new, one by one", one_pass(Path(tmp) / "a", body, grouped=False,
                                             profile=None)),
                ("new, grouped", one_pass(Path(tmp) / "b", body, grouped=True, profile=prof)),
                ("resumed", one_pass(Path(tmp) / "b", body, grouped=True, profile=None))]
    print(f"{'pass':<16} {'items':>6} {'jobs':>6} {'list ms/item':>13} "
          f"{'admit ms/item':>14} {'admit wall s':>13} {'items/s':>8}")
    for name, r in rows:
        n = max(r["items"], 1)
        print(f"{name:<16} {r['items']:>6} {r['jobs']:>6} {1000 * r['list_cpu'] / n:>13.3f} "
              f"{1000 * r['admit_cpu'] / n:>14.3f} {r['admit_wall']:>13.2f} "
              f"{n / max(r['admit_wall'], 1e-9):>8.0f}")
    print("target: admit <= 0.15 ms CPU per item (new, grouped: as a run admits them)")
    if prof is not None:
        pstats.Stats(prof).sort_stats("tottime").print_stats(25)


if __name__ == "__main__":
    main(sys.argv[1:])
