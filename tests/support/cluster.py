"""What the cluster tests compare: the demo manifest's item states against a collection's
ledger, and which logged requests were image requests; and a run on an in-process cluster."""

from __future__ import annotations

from typing import Any

from collector.demo_site import DemoServer
from collector.run.cluster import run_on_cluster
from collector.run.cluster_setup import connect
from collector.run.gather import prepared_run
from collector.run.scheduling import RunResult
from collector.storage.collection import Collection


def run_in_process(col: Collection, *, threads: int = 4, **options: Any) -> RunResult:
    """One gather of ``col`` on an in-process LocalCluster (one worker, ``threads``
    threads); ``options`` go to :func:`collector.run.cluster.run_on_cluster`."""
    with connect(local_workers=1, processes=False, threads=threads) as client, \
            prepared_run(col) as (recipe, ledger):
        result: RunResult = run_on_cluster(col, recipe, ledger, client, **options)
    return result


def _states(col: Collection) -> dict[tuple[str, str], tuple[str, str | None]]:
    with col.ledger(readonly=True) as ledger:
        rows = ledger.query("SELECT s.name AS source, i.source_key, i.page_url, i.state, "
                            "i.reason FROM items i JOIN sources s ON s.id = i.source_id")
    keyed = {}
    for row in rows:
        keyed[(row["source"], row["source_key"])] = (row["state"], row["reason"])
        if row["page_url"]:
            keyed[(row["source"], "page:" + row["page_url"])] = (row["state"], row["reason"])
    return keyed


def wrong_items(col: Collection, server: DemoServer) -> list[Any]:
    """Manifest items whose (state, reason) in the ledger is not the expected one."""
    keyed = _states(col)
    wrong = []
    for item in server.manifest["items"]:
        got = keyed.get((item["source"], item["key"]))
        if got is None and item.get("page_url"):
            got = keyed.get((item["source"], "page:" + server.fill(item["page_url"])))
        if got != (item["state"], item["reason"]):
            wrong.append((item["source"], item["key"], item["state"], item["reason"], got))
    return wrong


def is_image_request(record: Any) -> bool:
    """A request the demo server answered 200 that was not a listing, page or robots.txt
    (the filter of tests/test_gather_demo.py)."""
    path = record.path
    return (record.status == 200 and "/api/" not in path and not path.startswith("/oai?")
            and not path.endswith(("/", ".html", "robots.txt")))
