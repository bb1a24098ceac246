"""A run on a Dask cluster (collector.run.cluster) ends like a local run: the demo archive's
manifest outcome, item by item, and the same politeness judged from the server's own log.

The fast test runs an in-process LocalCluster (threads, ``processes=False``); the slow test
starts a real scheduler and two worker processes and kills one mid-run.
"""

from __future__ import annotations

import itertools
import os
import signal
import time
from collections import Counter
from pathlib import Path
from typing import Any

import pytest
from support.cluster import is_image_request, run_in_process, wrong_items
from support.collections import one_listing_recipe, serve_leaves
from support.server import LoopbackServer, json_answer

from collector.demo_site import DemoServer
from collector.demo_site.recipes import render
from collector.run.cluster import run_on_cluster
from collector.run.cluster_setup import connect
from collector.run.gather import prepared_run
from collector.run.scheduling import StopRules
from collector.storage.collection import Collection, init_collection


@pytest.fixture(scope="module")
def cluster_demo_run(demo_server: DemoServer, demo_content: Path,
                     tmp_path_factory: pytest.TempPathFactory) -> tuple[Collection, list, Any]:
    """One gather of the demo recipe on an in-process LocalCluster (one worker, threads)."""
    demo_server.reset()
    col = init_collection(tmp_path_factory.mktemp("cluster") / "c", contact="x@example.org")
    col.recipe_path.write_text(render("demo", demo_server.port, demo_content / "scans"))
    batches: list[Any] = []
    result = run_in_process(col, threads=8, on_batch=batches.append)
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





def _terminate_once() -> Any:
    """A batch hook that sends SIGTERM to this process once the run is under way (its first
    batch came back)."""
    sent: list[bool] = []

    def hook(batch: Any) -> None:
        if not sent:
            sent.append(True)
            os.kill(os.getpid(), signal.SIGTERM)

    return hook


@pytest.mark.parametrize("ask", ["sigterm", "time limit"])
def test_a_cluster_run_asked_to_stop_stops(ask: str, tmp_path: Path) -> None:
    """SIGTERM once the first batch is back, or the time limit 1.5 s into a run of 300 images
    (30 s at 10 requests/s): the run ends within seconds (the task in flight finishes its
    batch, about 5 s), as interrupted (exit 143) or stopped, with well under half the images
    stored; nothing failed and the rest stays pending for the next run."""
    with LoopbackServer("127.0.0.1") as server:
        server.route("/items", json_answer({"results": serve_leaves(server, 300)}))
        col = init_collection(tmp_path / "c", contact="x@example.org")
        col.recipe_path.write_text(one_listing_recipe(server.url("/items")))
        with connect(local_workers=1, processes=False, threads=4) as client, \
                prepared_run(col) as (recipe, ledger):
            began = time.monotonic()
            stop = StopRules(deadline=None if ask == "sigterm" else time.time() + 1.5)
            result = run_on_cluster(col, recipe, ledger, client, stop=stop,
                                    on_batch=_terminate_once() if ask == "sigterm" else None)
            took = time.monotonic() - began
    assert result.outcome == ("interrupted" if ask == "sigterm"
                              else "stopped: the time limit was reached")
    assert result.exit_code == (143 if ask == "sigterm" else 0)
    assert took < 15, took  # 1.5 s + one batch of 50 at 0.1 s + start-up, with room
    with col.ledger(readonly=True) as ledger:
        rows = ledger.query("SELECT state, count(*) AS n FROM items GROUP BY state")
    states = {r["state"]: r["n"] for r in rows}
    # Items listed and not fetched stay pending; those not listed yet are not in the ledger.
    assert set(states) <= {"stored", "pending"} and states.get("stored", 0) < 150, states
