"""The recipe's address guard applies on every worker of a cluster run exactly as on one
machine: an image URL on an address the recipe does not allow, directly or through a
redirect, fails ``unsafe_url`` and no request reaches that address (the trap server on the
unlisted loopback address 127.0.0.9 counts them). And a host whose task Dask gives up on
(``KilledWorker``) is degraded while the run goes on."""

from __future__ import annotations

from pathlib import Path
from types import SimpleNamespace
from typing import Any

import pytest
from support.cluster import run_in_process
from support.collections import grid_picture, one_listing_recipe, serve_leaves
from support.server import LoopbackServer, json_answer

from collector.run import cluster
from collector.storage.collection import init_collection
from collector.urls import host_key


def test_the_address_guard_holds_on_the_workers(tmp_path: Path) -> None:
    """One image stored; the one on 127.0.0.9 and the one redirecting there fail unsafe_url
    with zero requests at the trap (the guard of collector.urls, run by the task's fetcher)."""
    with LoopbackServer("127.0.0.1") as server, LoopbackServer("127.0.0.9") as trap:
        trap.route("/secret.png", (200, grid_picture(9), {"Content-Type": "image/png"}))
        server.route("/robots.txt", (404, b""))
        server.route("/img/ok.png", (200, grid_picture(1), {"Content-Type": "image/png"}))
        server.route("/img/away.png", (302, b"", {"Location": trap.url("/secret.png")}))
        items = [{"id": name, "title": name, "licence": "CC0-1.0", "image": url}
                 for name, url in (("ok", server.url("/img/ok.png")),
                                   ("direct", trap.url("/secret.png")),
                                   ("redirected", server.url("/img/away.png")))]
        server.route("/items", json_answer({"results": items}))
        col = init_collection(tmp_path / "c", contact="x@example.org")
        col.recipe_path.write_text(one_listing_recipe(server.url("/items")))
        result = run_in_process(col)
        trap_hits = len(trap.hits)
    assert result.outcome == "finished"
    assert trap_hits == 0
    with col.ledger(readonly=True) as ledger:
        rows = ledger.query("SELECT source_key, state, reason FROM items")
    assert {r["source_key"]: (r["state"], r["reason"]) for r in rows} == {
        "ok": ("stored", None), "direct": ("failed", "unsafe_url"),
        "redirected": ("failed", "unsafe_url")}


def test_a_host_dask_gives_up_on_is_degraded_and_the_run_goes_on(
        tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    """Two hosts (two ports of 127.0.0.1); the task for the second ends in Dask's KilledWorker
    (its workers died too often, as Dask reports it): that host's items are deferred with
    reason host_degraded, the run notes why and still finishes, the other host's images are
    stored, and the degraded host is asked for no image."""
    from distributed import KilledWorker

    real = cluster.fetch_batch
    with LoopbackServer("127.0.0.1") as server, LoopbackServer("127.0.0.1") as lost:
        lost_host = host_key(lost.url("/"))

        def fetch_or_lose(spec: Any) -> Any:
            if spec.host == lost_host:
                gone = SimpleNamespace(address="tcp://127.0.0.1:1")  # the last worker it died on
                raise KilledWorker(task="lost-batch", last_worker=gone, allowed_failures=3)
            return real(spec)

        monkeypatch.setattr(cluster, "fetch_batch", fetch_or_lose)
        items = (serve_leaves(server, 2, prefix="kept")
                 + serve_leaves(lost, 2, first=10, prefix="lost"))
        server.route("/items", json_answer({"results": items}))
        col = init_collection(tmp_path / "c", contact="x@example.org")
        col.recipe_path.write_text(one_listing_recipe(server.url("/items")))
        result = run_in_process(col)
        lost_images = [h for h in lost.targets() if h.startswith("/img/")]
    assert result.outcome == "finished"
    assert lost_images == []
    with col.ledger(readonly=True) as ledger:
        rows = ledger.query("SELECT source_key, state, reason FROM items")
        notes = ledger.query("SELECT kind, message FROM notes WHERE kind = 'host_degraded'")
    assert {r["source_key"]: (r["state"], r["reason"]) for r in rows} == {
        "kept0": ("stored", None), "kept1": ("stored", None),
        "lost10": ("deferred", "host_degraded"), "lost11": ("deferred", "host_degraded")}
    assert len(notes) == 1 and lost_host in notes[0]["message"]
