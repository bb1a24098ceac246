"""A cluster task's journal (collector.run.cluster_journal), judged from a loopback server's
own log: a task that Dask runs again after its worker died takes the images its dead attempt
had finished from the journal, asks the host only for the rest, and waits one full interval
before its first request (scale.md lesson 2: "a task for a host that has an earlier attempt on
record waits one full interval before its first request"); once the coordinator has collected
the batch, an attempt asks nothing; a follow-on task on the same clock spaces its first
request from the previous task's end instead of waiting a full interval from its own start.
"""

from __future__ import annotations

import json
import time
from pathlib import Path

from support.collections import grid_picture
from support.server import LoopbackServer

from collector.config.recipe import Budget
from collector.fetching.fetcher import FetchSettings
from collector.run.cluster_journal import clock_id, mark_collected, read_journal
from collector.run.cluster_task import BatchSpec, HostCarry, fetch_batch
from collector.urls import host_key

IMAGES = 4


def _server() -> LoopbackServer:
    server = LoopbackServer("127.0.0.1")
    server.route("/robots.txt", (404, b""))
    for n in range(IMAGES):
        server.route(f"/img/{n}.png", (200, grid_picture(n), {"Content-Type": "image/png"}))
    return server


def _spec(server: LoopbackServer, folder: Path, interval: float, *, clock: str = "",
          carry: HostCarry = HostCarry(), images: int = IMAGES) -> BatchSpec:
    """A batch of the server's first ``images`` images, files through ``folder`` (shared: the
    token is there), journal ``k.journal`` there."""
    folder.mkdir(exist_ok=True)
    (folder / "token").touch()
    settings = FetchSettings(contact="x@example.org", budget=Budget(min_interval=interval),
                             allow_addresses=("127.0.0.1/32",))
    jobs = tuple((n, server.url(f"/img/{n}.png"), ()) for n in range(images))
    return BatchSpec(host_key(server.url()), jobs, settings, 1, None, None, str(folder),
                     "token", carry, journal="k.journal", clock=clock)


def _images(server: LoopbackServer, since: int) -> list[str]:
    return [h.path for h in server.hits[since:] if h.path.startswith("/img/")]


def test_a_rerun_takes_what_its_dead_attempt_journaled_and_waits_a_full_interval(
        tmp_path: Path) -> None:
    """The first attempt fetches all four images; its journal is cut back to the state of a
    worker killed while writing the third image's line. The rerun (on the coordinator's clock,
    so only the journal tells it is one) asks only for images 2 and 3, its first request a
    full interval (0.2 s, the recipe's min_interval) after its start,
    and returns all four, with the fetches rows of the journaled ones."""
    with _server() as server:
        spec = _spec(server, tmp_path, 0.2, clock=clock_id())  # exact, unless a rerun
        first = fetch_batch(spec)
        assert [r.kind for r in first.results] == ["file"] * IMAGES
        journal = tmp_path / "k.journal"
        lines = journal.read_bytes().split(b"\n")
        assert len(read_journal(journal)[1]) == IMAGES
        journal.write_bytes(b"\n".join(lines[:3]) + b"\n" + lines[3][:40])  # killed mid-line
        before = len(server.hits)
        began = time.monotonic()
        rerun = fetch_batch(spec)
        hits = server.hits[before:]
    assert _images(server, before) == ["/img/2.png", "/img/3.png"]
    assert hits[0].mono - began >= 0.98 * 0.2, hits[0].mono - began
    assert [r.kind for r in rerun.results] == ["file"] * IMAGES
    assert [r.path for r in rerun.results[:2]] == [r.path for r in first.results[:2]]
    assert {r.sha256 for r in rerun.results} == {r.sha256 for r in first.results}
    image_rows = [f for f in rerun.fetches if "/img/" in str(f.get("url"))]
    assert len(image_rows) == IMAGES, rerun.fetches


def test_an_attempt_after_the_batch_was_collected_asks_nothing(tmp_path: Path) -> None:
    """A journal holding two images and the coordinator's "collected" line: an attempt Dask
    runs anyway sends no request (the two others are skipped, left to the coordinator)."""
    with _server() as server:
        spec = _spec(server, tmp_path, 0.05)
        fetch_batch(spec)
        journal = tmp_path / "k.journal"
        journal.write_bytes(b"\n".join(journal.read_bytes().split(b"\n")[:3]) + b"\n")
        mark_collected(journal)
        before = len(server.hits)
        late = fetch_batch(spec)
        assert server.hits[before:] == []
    assert [r.kind for r in late.results] == ["file", "file", "skipped", "skipped"]


def test_a_follow_on_task_spaces_from_the_previous_end_not_its_own_start(
        tmp_path: Path) -> None:
    """On the coordinator's clock and not a rerun, a task whose host may be asked again in
    0.05 s (HostCarry.not_before, the previous task's end plus the interval) sends its first
    request then, not a full 0.5 s interval after its own start; the same task without the
    clock (another machine) waits the full interval."""
    with _server() as server:
        ahead = HostCarry(0, time.time() + 0.05, clock_id())
        began = time.monotonic()
        fetch_batch(_spec(server, tmp_path / "a", 0.5, clock=clock_id(), carry=ahead, images=1))
        exact = server.hits[0].mono - began
        before = len(server.hits)
        ahead = HostCarry(0, time.time() + 0.05, clock_id())
        began = time.monotonic()
        fetch_batch(_spec(server, tmp_path / "b", 0.5, carry=ahead, images=1))
        full = server.hits[before].mono - began
    assert clock_id(), "this Linux machine has a boot id"
    assert 0.04 <= exact < 0.4, exact
    assert full >= 0.98 * 0.5, full


def test_lines_that_are_not_our_json_records_are_passed_over(tmp_path) -> None:
    """A journal is data from a shared folder: a pickle, JSON of another shape or a record
    with a field too many is passed over like a line cut short, never run or taken."""
    import pickle

    journal = tmp_path / "k.journal"
    entry = {"entry": {"by": "w:1", "result": {"item_id": 7, "kind": "file"},
                       "fetches": [{"url": "u", "body": {"bytes": "eA=="}}],
                       "host_updates": [["h", {"n": 1}]]}}
    bad = [pickle.dumps({"attempt": "x"}), b"[1, 2]", b'{"entry": 5}',
           b'{"entry": {"by": "w", "result": {"item_id": 1, "kind": "file", "nope": 1},'
           b' "fetches": [], "host_updates": []}}', b'{"attempt": 3}']
    journal.write_bytes(b"\n".join([*bad, json.dumps(entry).encode()]) + b"\n")
    attempts, entries, collected = read_journal(journal)
    assert attempts == [] and not collected
    assert [(e.by, e.result.item_id, e.fetches, e.host_updates) for e in entries] == [
        ("w:1", 7, [{"url": "u", "body": b"x"}], [("h", {"n": 1})])]
    mark_collected(journal)
    assert read_journal(journal)[2]
