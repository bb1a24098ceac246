"""Overlapping sources never make the archive send the same image twice.

Two JSON API sources list the same image URLs (an API and its own gallery, two collections
sharing objects: common practice, no source). Within a collection an image URL that is
stored, queued or in flight is requested once: the later item waits for the first outcome and
takes it (a kept file -> a duplicate by URL; a failed request -> the same failure, retried by
the next run with one request again). Judged from the server's request log."""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time
from collections import Counter
from collections.abc import Iterator
from pathlib import Path

import pytest
from support.collections import grid_picture
from support.server import Answer, LoopbackServer, json_answer

from collector.demo_site.recipes import listing_source
from collector.run.gather import gather
from collector.storage.collection import Collection, init_collection
from collector.storage.ledger import Ledger

COUNT = 12
MISSING = "/img/missing.jpg"


def picture(seed: int) -> bytes:
    return grid_picture(seed, "JPEG")


PICTURES = {f"/img/{n}.jpg": picture(n) for n in range(COUNT)}


def slow_image(delay: float):  # type: ignore[no-untyped-def]
    def answer(h: object) -> Answer:
        time.sleep(delay)  # keeps each request in flight while the other source lists
        path = getattr(h, "path", "")
        if path in PICTURES:
            return 200, PICTURES[path], {"Content-Type": "image/jpeg"}
        return 404, b"gone", {"Content-Type": "text/plain"}
    return answer


def listing(paths: list[str]) -> Answer:
    return json_answer({"results": [
        {"id": p.rsplit("/", 1)[1], "title": p, "licence": "CC0-1.0", "image": p}
        for p in paths]})


@pytest.fixture
def archive() -> Iterator[LoopbackServer]:
    with LoopbackServer() as srv:
        paths = [*PICTURES, MISSING]
        srv.route("/robots.txt", (404, b""))
        srv.route("/api/one", listing(paths))
        srv.route("/api/two", listing(list(reversed(paths))))
        srv.prefixes["/img/"] = slow_image(0.05)
        yield srv


def recipe(srv: LoopbackServer) -> str:
    sources = "".join(listing_source(name, srv.url(f"/api/{name}")) for name in ("one", "two"))
    return f'''contact = "curator@example.org"
[budgets]
min_interval = 0.01
max_connections = 2
max_attempts = 1
[network]
allow_addresses = ["127.0.0.1"]
[images]
min_side = 64
{sources}'''


def image_requests(srv: LoopbackServer) -> Counter[str]:
    return Counter(t for t in srv.targets() if t.startswith("/img/"))


def items(col: Collection) -> dict[tuple[str, str], dict]:
    with Ledger.open(col.ledger_path, readonly=True) as ledger:
        rows = ledger.query("SELECT s.name AS source, i.source_key, i.state, i.reason, "
                            "i.detail, i.duplicate_of, i.file_sha256 FROM items i "
                            "JOIN sources s ON s.id = i.source_id")
    return {(r["source"], r["source_key"]): r for r in rows}


def test_each_image_url_is_requested_once_across_two_sources(
        archive: LoopbackServer, tmp_path: Path) -> None:
    col = init_collection(tmp_path / "col", contact="curator@example.org")
    col.recipe_path.write_text(recipe(archive))
    gather(col)
    assert image_requests(archive) == {p: 1 for p in [*PICTURES, MISSING]}
    rows = items(col)
    for n in range(COUNT):
        first, second = rows[("one", f"{n}.jpg")], rows[("two", f"{n}.jpg")]
        # listing order decides the original: source "one" comes first in the recipe
        assert first["state"] == "stored"
        assert second["state"] == "duplicate"
        assert second["reason"] == "exact_duplicate"
        assert second["file_sha256"] == first["file_sha256"]
    gone_one, gone_two = rows[("one", "missing.jpg")], rows[("two", "missing.jpg")]
    assert gone_one["state"] == gone_two["state"] == "failed"
    assert gone_one["reason"] == gone_two["reason"] == "http_404"
    followed = gone_two if "same image URL" in (gone_two["detail"] or "") else gone_one
    assert "not requested again" in followed["detail"]

    archive.clear()
    gather(col)  # a second run: stored URLs are never asked again, the 404 once more
    assert image_requests(archive) == {MISSING: 1}


def test_a_killed_run_resumes_without_asking_twice(archive: LoopbackServer,
                                                   tmp_path: Path) -> None:
    """Killed (SIGKILL) mid-run: in the next run, no URL whose file was stored is requested
    again, and every other URL at most once more (only a request in flight at the kill
    can be repeated)."""
    col = init_collection(tmp_path / "col", contact="curator@example.org")
    col.recipe_path.write_text(recipe(archive))
    archive.prefixes["/img/"] = slow_image(0.3)
    child = subprocess.Popen([sys.executable, "-m", "collector", "gather", str(col.root),
                              "--quiet"], stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL,
                             env={**os.environ})
    try:
        deadline = time.monotonic() + 60
        while time.monotonic() < deadline and sum(image_requests(archive).values()) < 4:
            time.sleep(0.02)
    finally:
        os.kill(child.pid, signal.SIGKILL)
        child.wait()
    first_run = image_requests(archive)
    assert 4 <= sum(first_run.values()) < COUNT + 1, "the kill came too late to mean anything"
    stored_before = {("/img/" + key) for (source, key), r in items(col).items()
                     if r["state"] == "stored"}
    archive.clear()
    archive.prefixes["/img/"] = slow_image(0.0)
    gather(col)
    second_run = image_requests(archive)
    assert not stored_before & set(second_run)
    assert all(n == 1 for n in second_run.values())
    assert first_run + second_run >= Counter({p: 1 for p in [*PICTURES, MISSING]})
    final = items(col)
    assert all(r["state"] == "stored" for (source, key), r in final.items()
               if source == "one" and key != "missing.jpg")
    assert all(r["state"] == "duplicate" for (source, key), r in final.items()
               if source == "two" and key != "missing.jpg")
