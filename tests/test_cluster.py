"""A run on a Dask cluster (collector.run.cluster) ends like a local run: the demo archive's
manifest outcome, item by item, and the same politeness judged from the server's own log.

The fast test runs an in-process LocalCluster (threads, ``processes=False``); the slow test
starts a real scheduler and two worker processes and kills one mid-run.
"""

from __future__ import annotations

import itertools
from collections import Counter
from pathlib import Path
from typing import Any

import pytest
from support.cluster import is_image_request, wrong_items

from collector.demo_site import DemoServer
from collector.demo_site.recipes import render
from collector.run.cluster import connect, run_on_cluster
from collector.run.gather import prepared_run
from collector.storage.collection import Collection, init_collection


@pytest.fixture(scope="module")
def cluster_demo_run(demo_server: DemoServer, demo_content: Path,
                     tmp_path_factory: pytest.TempPathFactory) -> tuple[Collection, list, Any]:
    """One gather of the demo recipe on an in-process LocalCluster (one worker, threads)."""
    demo_server.reset()
    col = init_collection(tmp_path_factory.mktemp("cluster") / "c", contact="x@example.org")
    col.recipe_path.write_text(render("demo", demo_server.port, demo_content / "scans"))
    batches: list[Any] = []
    with connect(local_workers=1, processes=False, threads=8) as client, \
            prepared_run(col) as (recipe, ledger):
        result = run_on_cluster(col, recipe, ledger, client, on_batch=batches.append)
    return col, list(demo_server.log), (result, batches)


def test_cluster_run_ends_as_the_manifest_says(cluster_demo_run, demo_server) -> None:
    """Every manifest item (written by the archive's generator from what it planted) ends in
    its expected state and reason, as in the local run (tests/test_gather_demo.py)."""
    col, _, (result, batches) = cluster_demo_run
    assert result.outcome == "finished"
    assert batches, "no image was fetched on the cluster"
    assert all(b.shared for b in batches)  # one machine: the worker sees the folder
    assert wrong_items(col, demo_server) == []


def test_cluster_run_is_as_polite_as_a_local_one(cluster_demo_run) -> None:
    """Per host, arrivals are at least 0.98 x the interval apart (0.1 s, on the API host its
    Crawl-delay 0.2 s; common practice, no source), judged by the server's monotonic clock,
    and no image path was served twice with a 200."""
    _, log, _ = cluster_demo_run
    starts: dict[int, list[float]] = {}
    for record in log:
        starts.setdefault(record.host_index, []).append(record.t)
    for host, times in starts.items():
        times.sort()
        gaps = [b - a for a, b in itertools.pairwise(times)]
        floor = 0.2 if host == 1 else 0.1
        assert not gaps or min(gaps) >= 0.98 * floor, (host, min(gaps))
    images = Counter(r.path for r in log if is_image_request(r))
    assert [p for p, n in images.items() if n > 1] == []


def test_cluster_run_writes_every_request_to_the_ledger(cluster_demo_run) -> None:
    """The coordinator is the one writer: every request the server saw has a fetches row
    (the workers returned them), so status and resume count the same as locally."""
    col, log, _ = cluster_demo_run
    with col.ledger(readonly=True) as ledger:
        rows = ledger.query("SELECT count(*) AS n FROM fetches WHERE status IS NOT NULL")
    assert rows[0]["n"] == len(log)

