"""The overnight run against the demo archive: every item ends as the manifest says, and the
server's own request log shows the run was polite.

The manifest is written by the archive's generator from what it planted (duplicates, broken
files, licences, robots rules); politeness is judged from the server's log with server-side
timestamps, never from the client's own claims.
"""

from __future__ import annotations

import itertools
import json
import shutil
from collections import Counter
from pathlib import Path
from typing import Any

import pytest
from support.collections import Gathered

from collector import __version__
from collector.demo_site import DemoServer
from collector.exports.summary import format_summary, summarise
from collector.run.gather import gather
from collector.run.set_aside import apply_rules
from collector.storage import upkeep_queries
from collector.storage.collection import Collection, open_collection


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
def demo_run(demo_gathered: Gathered,
             tmp_path_factory: pytest.TempPathFactory) -> tuple[Collection, list, Any]:
    """The session's one gather of the demo recipe from an empty folder (``demo_gathered`` in
    conftest.py), in this module's own copy (its tests add a run, the trace index and a
    datasheet); returns the folder, the server log of that run, and the run result."""
    col = demo_gathered.copy_to(tmp_path_factory.mktemp("demo") / "c")
    return col, list(demo_gathered.log), demo_gathered.result


def test_every_manifest_item_ends_in_its_expected_state(demo_run, demo_server) -> None:
    """Accepted, skipped for licence, blocked by robots, duplicates, rejected: item by item."""
    col, _, result = demo_run
    assert result.outcome == "finished"
    with col.ledger(readonly=True) as ledger:
        notes = ledger.query("SELECT kind, url, message FROM notes")
    expected_notes = {"touching_items", "blank_scan",
                      *demo_server.manifest["oai"]["expected_notes"]}
    assert {n["kind"] for n in notes} == expected_notes, [n["message"] for n in notes]
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
        if item["state"] == "stored":  # a flat page is blank; nothing else is (issue 14)
            assert ("blank" in flags[item["sha256"]]) == ("blank" in item["flags"]), item["key"]


def test_new_pixel_formats_trace_right(demo_run, demo_server, demo_content,
                                       tmp_path: Path) -> None:
    """The 16-bit TIFF's 8-bit version (value / 257, Pillow handbook modes) traces as a near
    copy of it; the CMYK JPEG's and the animated GIF's RGB versions trace to them; another
    flat white page is no match (a blank page is never a copy of anything)."""
    import numpy as np
    from PIL import Image

    from collector.exports.trace import Tracer

    col, _, _ = demo_run
    by_key = {i["key"]: i for i in demo_server.manifest["items"]}

    def served(key: str) -> Path:
        item = by_key[key]
        return demo_content / "site" / str(item["image_host"]) / item["image_path"].lstrip("/")

    with Image.open(served("find-3021")) as im:
        eight = Image.fromarray((np.asarray(im) / 257).round().astype(np.uint8))
    eight.save(tmp_path / "tiff-as-8-bit.png")
    for key in ("FH-S-0009", "FH-S-0007"):  # the CMYK JPEG, the animated GIF
        with Image.open(served(key)) as im:
            im.convert("RGB").save(tmp_path / f"{key}.jpg", quality=85)
    Image.new("L", (320, 240), 255).save(tmp_path / "white.jpg")
    with Tracer.open(col.root) as tracer:
        for name, key in (("tiff-as-8-bit.png", "find-3021"), ("FH-S-0009.jpg", "FH-S-0009"),
                          ("FH-S-0007.jpg", "FH-S-0007")):
            result = tracer.trace_file(tmp_path / name)
            assert result.kind == "near", name
            assert result.near[0].file.sha256 == by_key[key]["sha256"], name
        assert tracer.trace_file(tmp_path / "white.jpg").kind == "none"


def test_the_oai_feed_is_harvested_through_its_misbehaviours(demo_run, demo_server) -> None:
    """The OAI-PMH feed: its 503 waited out, its expired token restarted the list, both sets
    and no item for the deleted record; the harvest's responseDate is kept for next time."""
    col, log, _ = demo_run
    feed = demo_server.manifest["oai"]
    oai = [r for r in log if r.host_index == 4 and r.path.startswith("/oai?")]
    busy = next(i for i, r in enumerate(oai) if r.status == 503)
    # OAI-PMH 2.0 §3.5.1 flow control: 503 with Retry-After (1 s here, RFC 9110 §10.2.3)
    assert oai[busy + 1].path == oai[busy].path and oai[busy + 1].t - oai[busy].t >= 1.0
    # §3.6 badResumptionToken: the list was asked for from its start a second time
    assert sum("metadataPrefix=oai_dc" in r.path for r in oai) == 2
    keyed = ledger_items(col)
    assert ("oai-records", feed["deleted"][0]) not in keyed
    sets = {s for (source, _), row in keyed.items() if source == "oai-records"
            for s in json.loads(row["metadata"])["oai"]["sets"]}
    assert sets == set(feed["sets"])
    with col.ledger(readonly=True) as ledger:
        kept = ledger.query("SELECT l.value FROM listing_states l JOIN sources s "
                            "ON s.id = l.source_id WHERE s.name = 'oai-records'")
    assert [r["value"] for r in kept] == [feed["response_date"]]


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
    """Per host, request arrivals are at least min_interval (0.1 s) apart, and on the API host
    at least its robots.txt Crawl-delay (0.2 s; common practice, no source) apart, judged by
    the server's monotonic clock, strictly: 0.98 x the interval (the client counts each interval
    from when the previous answer began to arrive, so a busy client cannot bunch arrivals)."""
    _, log, _ = demo_run
    starts: dict[int, list[float]] = {}
    for record in log:
        starts.setdefault(record.host_index, []).append(record.t)
    assert {1, 2, 4} <= set(starts)  # api, gallery and annex hosts were all visited
    for host, times in starts.items():
        times.sort()
        gaps = [b - a for a, b in itertools.pairwise(times)]
        floor = 0.2 if host == 1 else 0.1
        assert not gaps or min(gaps) >= 0.98 * floor, (host, min(gaps))
    assert Counter(r.status for r in log)[429] == 0


def test_no_image_was_requested_twice(demo_run) -> None:
    """Each image path was fetched at most once with a 200 (duplicates by URL are not
    refetched)."""
    _, log, _ = demo_run
    images = Counter(r.path for r in log if r.status == 200 and "/api/" not in r.path
                     and not r.path.startswith("/oai?")  # OAI-PMH listing requests
                     and not r.path.endswith(("/", ".html", "robots.txt")))
    assert [p for p, n in images.items() if n > 1] == []


def test_status_numbers_add_up_and_match_the_server_log(demo_run, demo_server) -> None:
    """`collector status` counts per host exactly the requests the server logged (the server's
    own record, not the client's); a host never shows more failures than requests; files add
    up to stored items plus near duplicates kept, and to downloaded plus read locally."""
    col, log, _ = demo_run
    with col.ledger(readonly=True) as ledger:
        s = summarise(ledger)
    served = Counter(f"127.0.0.{r.host_index}:{demo_server.port}" for r in log)
    assert {h.host: h.requests for h in s.hosts} == dict(served)
    assert s.requests == len(log)
    assert all(h.errors <= h.requests for h in s.hosts)
    mirror = next(h for h in s.hosts if h.host.startswith("127.0.0.3:"))
    assert (mirror.requests, mirror.errors) == (1, 1)  # its robots.txt, answered 503
    # every image robots.txt kept us from, and its tdmrep.json (asked through the same
    # polite fetcher, so held back by the same robots.txt)
    assert mirror.held_back == sum(1 for i in demo_server.manifest["items"]
                                   if i["reason"] == "robots_unreachable") + 1
    near = sum(o.files for o in s.origins if o.near_kept)
    assert s.files == s.states["stored"] + near == sum(o.files for o in s.origins)
    assert s.file_bytes == sum(o.bytes for o in s.origins)
    text = "\n".join(format_summary(s))
    assert f"{near} near duplicates kept" in text and "crops cut from scans" in text


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


def test_iiif_items_were_asked_at_the_negotiated_size_and_rights_statements_kept(
        demo_run, demo_server) -> None:
    """IIIF canvases: the image request is the manifest's expected size (IIIF Image API 3.0
    §4.2 / 2.1 §4.2), recorded with its reason; the NoC-US item is stored with its statement
    (RightsStatements.org id, not an SPDX id) and InC is skipped; trace and the datasheet show
    the statement with its link."""
    from collector.exports.datasheet import export_datasheet
    from collector.exports.trace import Tracer
    from collector.exports.trace_format import format_record

    col, log, _ = demo_run
    keyed = ledger_items(col)
    items = [i for i in demo_server.manifest["items"] if i["source"] == "iiif"]
    for item in items:
        row = keyed[("iiif", item["key"])]
        facts = json.loads(row["size_request"])
        assert facts["size"] == item["iiif_size"] and facts["why"], item["key"]
        assert row["rights_statement"] == item.get("rights_statement"), item["key"]
    noc = next(i for i in items if i.get("rights_statement") == "NoC-US")
    row = keyed[("iiif", noc["key"])]
    assert row["spdx_id"] is None and row["state"] == "stored"
    image_paths = {r.path for r in log if r.path.startswith("/iiif/img/")}
    assert not any("/full/max/" in p or "/full/full/" in p for p in image_paths)
    with Tracer.open(col.root) as tracer:
        text = "\n".join(format_record(tracer.trace_file(
            col.store.existing(row["file_sha256"], "jpg"))))
    assert "rights statement NoC-US" in text
    assert "http://rightsstatements.org/page/NoC-US/1.0/?language=en" in text
    assert "allowed:      yes" in text
    assert "image size:   asked !512,384 (512x384) of 800x600" in text
    result = export_datasheet(col.root, out=col.root.parent / "sheet")
    assert result.counts.by_licence.get("rs:NoC-US") == 1
    sheet = (result.out / "datasheet.md").read_text(encoding="utf-8")
    assert "rs:NoC-US" in sheet and "rightsstatements.org/page/NoC-US/1.0/" in sheet


def test_the_demo_condition_skips_old_finds_before_their_image_is_requested(
        demo_run, demo_server) -> None:
    """The demo recipe's keep_if on api-linked (finds from 1900 on, or undated) skips the two
    finds dated "c. 1850" and "1890s" (read as 1845-1855 and 1890-1899) with the condition in
    the detail, and the server's log has no request for their images."""
    from urllib.parse import urlsplit

    col, log, _ = demo_run
    requested = {(r.host, r.path) for r in log}
    old = [i for i in demo_server.manifest["items"] if i["reason"] == "condition_not_met"]
    assert sorted(i["date"] for i in old) == ["1890s", "c. 1850"]
    keyed = ledger_items(col)
    for item in old:
        row = find(keyed, demo_server, item["source"], item["key"], item.get("page_url"))
        assert "keep_if" in row["detail"] and "could not be read" not in row["detail"]
        parts = urlsplit(demo_server.fill(item["image_url"]))
        assert (parts.hostname, parts.path) not in requested, item["key"]


def test_items_skipped_for_a_reservation_caused_no_image_request(demo_run, demo_server) -> None:
    """The reading room's reserved items (a tdmrep.json rule, a listing page answering
    tdm-reservation: 1, a detail page's meta element; TDMRep §3.1-§3.3) were skipped before
    their image was requested: the server's own log has no request for it. Items reserved in
    the image answer or file were requested, then not kept."""
    from urllib.parse import urlsplit

    col, log, _ = demo_run
    requested = {(r.host, r.path) for r in log}
    room = [i for i in demo_server.manifest["items"] if i["source"] == "reading-room"]
    skipped = [i for i in room if i["state"] == "skipped"]
    assert {i["reason"] for i in skipped} == {"tdmrep_reserved"} and len(skipped) == 3
    for item in room:
        parts = urlsplit(demo_server.fill(item["image_url"]))
        assert ((parts.hostname, parts.path) in requested) == (item["state"] != "skipped"), item
    assert ("127.0.0.2", "/.well-known/tdmrep.json") in requested
    rejected = {i["sha256"] for i in room
                if i["state"] == "rejected"}
    assert rejected and not rejected & set(dict(col.store.iter_stored()))


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


def expected_set_aside(manifest: dict[str, Any]) -> dict[str, str]:
    """sha256 -> the pixel rule the manifest says sets the stored file aside (items and
    scanner beds)."""
    return {**{i["sha256"]: i["set_aside"] for i in manifest["items"] if i.get("set_aside")},
            **{s["sha256"]: s["set_aside"] for s in manifest["scans"] if s.get("set_aside")}}


def set_aside_now(col: Collection) -> dict[str, str]:
    with col.ledger(readonly=True) as ledger:
        return {f.sha256: f.set_aside for f in upkeep_queries.files_to_judge(ledger)
                if f.set_aside}


def test_the_demo_pixel_rule_sets_aside_exactly_the_greyscale_pictures(demo_run,
                                                                        demo_server) -> None:
    """The demo recipe's [[pixel_rules]] (greyscale = false) sets aside exactly the files the
    manifest marks (the 16-bit greyscale PNG and TIFF, a flat white page, the blank scanner
    bed: a grey picture has no chroma, CIE 15:2004), and they stay in the store."""
    col, _, _ = demo_run
    expected = expected_set_aside(demo_server.manifest)
    assert len(expected) == 4 and set(expected.values()) == {"no-greyscale"}
    assert set_aside_now(col) == expected
    assert all(col.store.find(sha) is not None for sha in expected)


def test_apply_rules_after_a_rule_change_moves_exactly_the_expected_items_offline(
        demo_run, demo_server, tmp_path: Path) -> None:
    """The rule narrowed to one source brings back exactly the manifest's set-aside files of
    the other sources; dropped, it brings back the rest; restored, it sets all aside again.
    Each change is a rule_changes row, and the server's log shows no request meanwhile."""
    col, _, _ = demo_run
    copy = open_collection(shutil.copytree(col.root, tmp_path / "copy", symlinks=True))
    expected = expected_set_aside(demo_server.manifest)
    by_source = {sha: src for sha, src in ledger_sources(copy).items() if sha in expected}
    original = copy.recipe_path.read_text()
    rule = '[[pixel_rules]]\nname = "no-greyscale"\ngreyscale = false\n'
    assert rule in original
    demo_server.reset()
    copy.recipe_path.write_text(original.replace(rule, rule + 'sources = ["api-linked"]\n'))
    narrowed = apply_rules(copy)
    assert {m.sha256 for m in narrowed.moves} == {
        sha for sha, src in by_source.items() if src != "api-linked"}
    assert {m.kind for m in narrowed.moves} == {"brought back"}
    copy.recipe_path.write_text(original.replace(rule, ""))
    dropped = apply_rules(copy)
    assert {m.sha256 for m in dropped.moves} == {
        sha for sha, src in by_source.items() if src == "api-linked"}
    assert set_aside_now(copy) == {}
    copy.recipe_path.write_text(original)
    restored = apply_rules(copy)
    assert {m.sha256: m.after for m in restored.moves} == expected
    with copy.ledger(readonly=True) as ledger:
        changes = upkeep_queries.rule_changes(ledger)
    assert sorted(c.sha256 for c in changes) == sorted([*expected, *expected])
    assert demo_server.log == []  # not a single request while the rules were applied


def ledger_sources(col: Collection) -> dict[str, str | None]:
    """sha256 -> the source of the item that first brought the file."""
    with col.ledger(readonly=True) as ledger:
        return {f.sha256: f.source for f in upkeep_queries.files_to_judge(ledger)}
