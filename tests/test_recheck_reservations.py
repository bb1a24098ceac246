"""A re-check honours reservations against text-and-data mining as a gather does (TDMRep,
W3C Community Group final report, May 2024: §3.1 tdmrep.json, §3.2 the tdm-reservation
header): an image a tdmrep.json rule now reserves is reported "reserved" and not requested
(server log); one whose answer now carries tdm-reservation: 1 is reported "reserved" and its
new bytes are not kept."""

from __future__ import annotations

import json
import sqlite3
from collections.abc import Iterator
from pathlib import Path

import pytest
from support.collections import grid_picture
from support.server import LoopbackServer, json_answer

from collector.run.gather import gather
from collector.run.recheck import recheck
from collector.storage.collection import init_collection


def picture(seed: int) -> bytes:
    return grid_picture(seed, "PNG")


@pytest.fixture
def archive() -> Iterator[LoopbackServer]:
    with LoopbackServer() as srv:
        srv.route("/robots.txt", (404, b""))
        srv.route("/.well-known/tdmrep.json", (404, b""))
        srv.route("/api", json_answer({"results": [
            {"id": key, "licence": "CC0-1.0", "image": f"/img/{key}.png"} for key in "ab"]}))
        for n, key in enumerate("ab"):
            srv.route(f"/img/{key}.png", (200, picture(n), {"Content-Type": "image/png"}))
        yield srv


def test_a_recheck_reports_new_reservations_and_does_not_ask_a_reserved_image(
        archive: LoopbackServer, tmp_path: Path) -> None:
    col = init_collection(tmp_path / "c", contact="me@example.org")
    col.recipe_path.write_text(col.recipe_path.read_text().replace(
        "allow_addresses = []", 'allow_addresses = ["127.0.0.1"]').replace(
        "min_interval = 3.0", "min_interval = 0.01") + f'''
[[sources]]
name = "plates"
kind = "json_api"
url = "{archive.url('/api')}"
[sources.pagination]
style = "none"
[sources.fields]
items = "results"
id = "id"
licence = "licence"
image_url = "image"
''')
    assert gather(col).outcome == "finished"
    stored = {p.name for _, p in col.store.iter_stored()}
    # Months later the archive reserves a.png in its tdmrep.json and answers b.png with the
    # tdm-reservation header (and new bytes).
    archive.route("/.well-known/tdmrep.json", json_answer([
        {"location": "/img/a.png", "tdm-reservation": 1}]))
    archive.route("/img/b.png", (200, picture(7), {"Content-Type": "image/png",
                                                   "tdm-reservation": "1"}))
    with sqlite3.connect(col.ledger_path) as db:  # months later: the 24-hour cache is stale
        db.execute("UPDATE hosts SET tdmrep_fetched_at = '2026-01-01T00:00:00.000Z', "
                   "robots_fetched_at = '2026-01-01T00:00:00.000Z'")
    archive.clear()
    result = recheck(col)
    found = {f.source_key: f for f in result.findings}
    assert found["a"].finding == found["b"].finding == "reserved"
    assert "/img/a.png" not in archive.targets()  # never asked for
    assert "/img/b.png" in archive.targets()
    assert {p.name for _, p in col.store.iter_stored()} == stored  # no new bytes kept
    assert json.loads(json.dumps([f.detail for f in result.findings]))  # details say why
