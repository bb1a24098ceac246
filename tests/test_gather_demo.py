"""The overnight run against the demo archive: every item ends as the manifest says, and the
server's own request log shows the run was polite.

The manifest is written by the archive's generator from what it planted (duplicates, broken
files, licences, robots rules); politeness is judged from the server's log with server-side
timestamps, never from the client's own claims.
"""

from __future__ import annotations

import itertools
from collections import Counter
from pathlib import Path
from typing import Any

import pytest

from collector import __version__
from collector.demo_site import DemoServer
from collector.demo_site.recipes import render
from collector.run.gather import gather
from collector.storage.collection import Collection, init_collection


def ledger_items(col: Collection) -> dict[tuple[str, str], dict[str, Any]]:
    """Ledger items keyed by (source name, source key) and (source name, 'page:' + page URL)."""
    with col.ledger(readonly=True) as ledger:
        rows = ledger.query("SELECT s.name AS source, i.* FROM items i "
                            "JOIN sources s ON s.id = i.source_id")
    keyed: dict[tuple[str, str], dict[str, Any]] = {}
    for row in rows:
        keyed[(row["source"], row["source_key"])] = row
        if row["page_url"]:
            keyed[(row["source"], "page:" + row["page_url"])] = row
    return keyed


def find(keyed: dict, server: DemoServer, source: str, key: str, page_url: str | None) -> dict:
    """The ledger row of a manifest item (HTML items are keyed by their detail page URL)."""
    row = keyed.get((source, key))
    if row is None and page_url:
        row = keyed.get((source, "page:" + server.fill(page_url)))
    assert row is not None, f"{source}/{key} is not in the ledger"
    return row


@pytest.fixture(scope="module")
def demo_run(demo_server: DemoServer, demo_content: Path,
             tmp_path_factory: pytest.TempPathFactory) -> tuple[Collection, list, Any]:
    """One gather of the demo recipe from an empty folder; returns the folder, the server log
    of that run, and the run result."""
    demo_server.reset()
    col = init_collection(tmp_path_factory.mktemp("demo") / "c", contact="x@example.org")
    col.recipe_path.write_text(render("demo", demo_server.port, demo_content / "scans"))
    result = gather(col)
    return col, list(demo_server.log), result


def test_every_manifest_item_ends_in_its_expected_state(demo_run, demo_server) -> None:
    """Accepted, skipped for licence, blocked by robots, duplicates, rejected: item by item."""
    col, _, result = demo_run
    assert result.outcome == "finished"
    with col.ledger(readonly=True) as ledger:
        notes = ledger.query("SELECT kind, url, message FROM notes")
    assert {n["kind"] for n in notes} == {"touching_items", "blank_scan"}, [
        n["message"] for n in notes]
    keyed = ledger_items(col)
    wrong = []
    for item in demo_server.manifest["items"]:
        row = find(keyed, demo_server, item["source"], item["key"], item.get("page_url"))
        if (row["state"], row["reason"]) != (item["state"], item["reason"]):
            wrong.append((item["source"], item["key"], item["state"], item["reason"],
                          row["state"], row["reason"], row["detail"]))
    assert wrong == []


def test_duplicates_point_at_the_right_original(demo_run, demo_server) -> None:
    """Exact and near duplicates name the item the manifest planted them from; mirrored
    copies are marked as such."""
    col, _, _ = demo_run
    keyed = ledger_items(col)
    by_id = {row["id"]: row for row in keyed.values()}
    checked = 0
    for item in demo_server.manifest["items"]:
        if not item["duplicate_of"]:
            continue
        row = find(keyed, demo_server, item["source"], item["key"], item.get("page_url"))
        original = by_id[row["duplicate_of"]]
        assert (original["source"], original["source_key"]) == (
            item["duplicate_of"]["source"], item["duplicate_of"]["key"]), item["key"]
        if item["mirrored"] is not None:
            assert bool(row["near_mirrored"]) == item["mirrored"], item["key"]
        checked += 1
    assert checked >= 5


def test_licences_normalise_to_the_expected_spdx_ids(demo_run, demo_server) -> None:
    """Every declared licence spelling maps to the SPDX id the manifest expects (SPDX License
    List ids; CC URL forms per the SPDX crossRefs)."""
    col, _, _ = demo_run
    keyed = ledger_items(col)
    for item in demo_server.manifest["items"]:
        row = find(keyed, demo_server, item["source"], item["key"], item.get("page_url"))
        assert row["spdx_id"] == item["expected_spdx"], (item["key"], item["licence_text"])


def test_stored_files_match_the_bytes_the_archive_served(demo_run, demo_server) -> None:
    """A stored item's sha256 equals the sha256 of the file the manifest says was served."""
    col, _, _ = demo_run
    keyed = ledger_items(col)
    for item in demo_server.manifest["items"]:
        if item["state"] != "stored":
            continue
        row = find(keyed, demo_server, item["source"], item["key"], item.get("page_url"))
        assert row["file_sha256"] == item["sha256"], item["key"]
        assert col.store.find(item["sha256"]) is not None


def test_conflicting_embedded_licence_and_gps_are_flagged(demo_run, demo_server) -> None:
    """The item whose embedded rights contradict its declared licence, and the photo with a
    GPS position, carry flags on their stored files."""
    col, _, _ = demo_run
    with col.ledger(readonly=True) as ledger:
        flags = {row["sha256"]: row["flags"] for row in ledger.query(
            "SELECT sha256, flags FROM files")}
    for item in demo_server.manifest["items"]:
        if item["conflict"]:
            assert "licence_conflict" in flags[item["sha256"]], item["key"]
        if "gps" in item["flags"]:
            assert "gps" in flags[item["sha256"]], item["key"]


def test_mirror_host_with_robots_503_got_only_its_robots_request(demo_run) -> None:
    """RFC 9309 section 2.3.1.4: robots.txt 5xx means complete disallow."""
    _, log, _ = demo_run
    mirror = [r.path for r in log if r.host_index == 3]
    assert mirror == ["/robots.txt"]


def test_every_request_says_who_is_asking(demo_run) -> None:
    """Each request carries 'collector/<version> (+<contact>)' (recipe contact)."""
    _, log, _ = demo_run
    assert {r.user_agent for r in log} == {
        f"collector/{__version__} (+curator@fernhollow.example.org)"}


def test_no_request_exceeded_the_budget_or_crawl_delay(demo_run) -> None:
    """Per host, request starts are at least min_interval (0.1 s) apart, and on the API host
    at least its robots.txt Crawl-delay (0.2 s; common practice, no source) apart, judged by
    the server's monotonic clock with 20 ms tolerance for loopback scheduling."""
    _, log, _ = demo_run
    starts: dict[int, list[float]] = {}
    for record in log:
        starts.setdefault(record.host_index, []).append(record.t)
    assert {1, 2, 4} <= set(starts)  # api, gallery and annex hosts were all visited
    for host, times in starts.items():
        times.sort()
        gaps = [b - a for a, b in itertools.pairwise(times)]
        floor = 0.2 if host == 1 else 0.1
        assert not gaps or min(gaps) >= floor - 0.02, (host, min(gaps))
    assert Counter(r.status for r in log)[429] == 0


def test_no_image_was_requested_twice(demo_run) -> None:
    """Each image path was fetched at most once with a 200 (duplicates by URL are not
    refetched)."""
    _, log, _ = demo_run
    images = Counter(r.path for r in log if r.status == 200 and "/api/" not in r.path
                     and not r.path.endswith(("/", ".html", "robots.txt")))
    assert [p for p, n in images.items() if n > 1] == []


def test_rerun_requests_no_image_again(demo_run, demo_server) -> None:
    """A second run over a finished collection re-reads listings but fetches no image except
    the ones that failed (retried by policy), and no robots.txt (cached in the ledger for 24
    hours, RFC 9309 section 2.4)."""
    col, _, _ = demo_run
    failed = {demo_server.fill(i["image_url"]).split("/", 3)[3]
              for i in demo_server.manifest["items"] if i["state"] == "failed"}
    demo_server.reset()
    result = gather(col)
    assert result.outcome == "finished"
    paths = [r.path for r in demo_server.log]
    assert "/robots.txt" not in paths
    assert {p.lstrip("/") for p in paths if p.startswith("/media/")} == failed


def test_planted_variants_trace_to_their_original(demo_run, demo_server, demo_content,
                                                  tmp_path: Path) -> None:
    """The archive's resized, re-encoded and mirrored variants, re-encoded once more so that
    no byte matches, trace as near matches that include the right original, mirroring named
    (pHash distances within 8 bits, libraries.md section 2)."""
    from PIL import Image

    from collector.exports.trace import Tracer

    col, _, _ = demo_run
    by_key = {(i["source"], i["key"]): i for i in demo_server.manifest["items"]}
    variants = [i for i in demo_server.manifest["items"] if i["state"] == "near_duplicate"]
    assert len(variants) == 3
    with Tracer.open(col.root) as tracer:
        for item in variants:
            served = demo_content / "site" / str(item["image_host"]) / item["image_path"].lstrip(
                "/")
            copy = tmp_path / f"{item['key']}.jpg"
            with Image.open(served) as im:
                im.convert("RGB").save(copy, "JPEG", quality=85)
            result = tracer.trace_file(copy)
            assert result.kind == "near", item["key"]
            original = by_key[(item["duplicate_of"]["source"], item["duplicate_of"]["key"])]
            hits = {c.file.sha256: c for c in result.near}
            assert original["sha256"] in hits, item["key"]
            assert hits[original["sha256"]].mirrored == bool(item["mirrored"]), item["key"]
        unrelated = tmp_path / "unrelated.png"
        Image.effect_mandelbrot((256, 256), (-2.0, -1.5, 1.0, 1.5), 60).save(unrelated)
        assert tracer.trace_file(unrelated).kind == "none"


def test_every_stored_file_traces_exactly_to_its_item(demo_run) -> None:
    """Each file in the store, traced by content, names the item that first brought it and
    every other item with the same bytes."""
    from collector.exports.trace import Tracer

    col, _, _ = demo_run
    with col.ledger(readonly=True) as ledger:
        first = {r["sha256"]: r["first_item_id"] for r in ledger.query(
            "SELECT sha256, first_item_id FROM files")}
        brought = {}
        for r in ledger.query("SELECT id, file_sha256 FROM items WHERE file_sha256 IS NOT NULL"):
            brought.setdefault(r["file_sha256"], set()).add(r["id"])
    stored = dict(col.store.iter_stored())
    assert set(stored) == set(first) and stored
    with Tracer.open(col.root) as tracer:
        for sha, path in stored.items():
            result = tracer.trace_file(path)
            assert result.kind == "exact" and result.file is not None
            assert result.file.origin.item_id == first[sha]
            ids = {result.file.origin.item_id} | {o.item_id for o in result.file.others}
            assert ids == brought[sha]


def test_the_store_holds_only_files_named_by_their_sha256(demo_run) -> None:
    """After a demo run and a trace (which builds the near-duplicate index), every file below
    files/ is files/ab/cd/<sha256>.<ext> of its own bytes (FIPS 180-4 SHA-256); the index
    and its lock live in the cache folder. Only the empty temp folder .incoming is there too."""
    import hashlib
    import re

    from collector.exports.trace import Tracer

    col, _, _ = demo_run
    with Tracer.open(col.root):
        pass
    assert col.hash_index_path.is_file()
    named = re.compile(r"^([0-9a-f]{2})/([0-9a-f]{2})/(\1\2[0-9a-f]{60})\.[a-z0-9]{1,5}$")
    files = [p for p in col.store.root.rglob("*") if not p.is_dir()]
    assert len(files) >= 50
    for path in files:
        match = named.match(path.relative_to(col.store.root).as_posix())
        assert match, path
        assert hashlib.sha256(path.read_bytes()).hexdigest() == match[3]
    assert [p.name for p in col.store.root.iterdir() if p.name.startswith(".")] == [".incoming"]


def test_transparent_and_enlarged_images_carry_exactly_their_flags(demo_run, demo_server) -> None:
    """The demo recipe flags transparent and enlarged images: the items the manifest marks
    (palette PNG with a transparent entry, RGBA cut-outs, a 6x enlargement) carry the flag on
    their stored file and no other stored file does (transparency as Pillow reads it, Pillow
    docs "Image file formats > PNG"; enlargement: common practice, no source)."""
    col, _, _ = demo_run
    keyed = ledger_items(col)
    with col.ledger(readonly=True) as ledger:
        flags = {row["sha256"]: row["flags"] for row in ledger.query(
            "SELECT sha256, flags FROM files")}
    marked = 0
    for item in demo_server.manifest["items"]:
        if item["state"] != "stored":
            continue
        row = find(keyed, demo_server, item["source"], item["key"], item.get("page_url"))
        for flag in ("transparent", "enlarged"):
            assert (flag in flags[row["file_sha256"]]) == (flag in item["flags"]), (
                item["key"], flag)
            marked += flag in item["flags"]
    assert marked >= 4
