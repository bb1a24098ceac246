"""A real gather against a loopback archive that reserves text-and-data mining in every way
collector reads: the tdmrep.json rule, header fields and meta elements of listing and detail
pages, header fields of an image and IPTC Data Mining inside a file.

Sources: W3C TDM Reservation Protocol final report, May 2024 ("TDMRep") §3.1-§4; IPTC Photo
Metadata Standard 2023.1 "Data Mining"; noai/noimageai: common practice, no standard. That a
skipped item caused no image request is read from the server's own request log.
"""

from __future__ import annotations

import io
import json
import re
from collections.abc import Iterator
from pathlib import Path

import pytest
from PIL import Image
from support.server import LoopbackServer, html_answer, json_answer

from collector.demo_site.tdm import xmp_packet
from collector.run.gather import gather
from collector.storage.collection import Collection, init_collection

RESERVING = [  # TDMRep §3.1: the first matching rule decides
    {"location": "/img/reserved/", "tdm-reservation": 1,
     "tdm-policy": "https://fernhollow.example/tdm-policy.json"},
    {"location": "/api/lifted", "tdm-reservation": 1},
    {"location": "/img/", "tdm-reservation": 0},
]


def picture(seed: int, fmt: str = "PNG", **save: object) -> bytes:
    """A small structured picture that differs for every seed."""
    im = Image.effect_mandelbrot((96, 64), (-2 + seed * 0.3, -1, 1, 1), 40 + seed)
    buf = io.BytesIO()
    im.convert("RGB").save(buf, fmt, **save)
    return buf.getvalue()


def png(seed: int, **headers: str) -> tuple[int, bytes, dict[str, str]]:
    return 200, picture(seed), {"Content-Type": "image/png", **headers}


def items(*names: str) -> dict[str, list[dict[str, str]]]:
    return {"items": [{"id": n, "image": f"/img/{n}.png", "licence": "CC0-1.0"}
                      for n in names]}


def listing_html(rows: list[tuple[str, str]]) -> str:
    tiles = "".join(f'<li class="tile"><a class="rec" href="{href}">{key}</a>'
                    f'<span class="lic">CC0-1.0</span></li>' for key, href in rows)
    return f"<html><head><title>list</title></head><body><ul>{tiles}</ul></body></html>"


def detail_html(image: str, meta: str = "") -> str:
    return (f"<html><head>{meta}<title>d</title></head><body>"
            f'<img class="full" src="{image}"></body></html>')


@pytest.fixture
def archive() -> Iterator[LoopbackServer]:
    """One loopback host reserving in each way, next to plain items."""
    with LoopbackServer("127.0.0.1") as site:
        site.route("/robots.txt", (200, b"User-agent: *\nAllow: /\n", {}))
        site.route("/.well-known/tdmrep.json", json_answer(RESERVING))
        api = items("plain", "header-reserved", "noimageai", "xmp-prohibited")
        api["items"].append({"id": "file-reserved", "image": "/img/reserved/r.png",
                             "licence": "CC0-1.0"})
        api["items"][3]["image"] = "/img/xmp.jpg"
        site.route("/api/items", json_answer(api))
        site.route("/api/page-reserved", json_answer(items("under-reserved-page"),
                                                     headers={"tdm-reservation": "1"}))
        site.route("/api/lifted", json_answer(items("lifted"), headers={"tdm-reservation": "0"}))
        site.route("/img/plain.png", png(1))
        site.route("/img/header-reserved.png", png(2, **{"tdm-reservation": "1"}))
        site.route("/img/noimageai.png", png(3, **{"X-Robots-Tag": "noimageai"}))
        site.route("/img/xmp.jpg", (200, picture(4, "JPEG", xmp=xmp_packet(
            "DMI-PROHIBITED-GENAIMLTRAINING")),
            {"Content-Type": "image/jpeg"}))
        site.route("/img/reserved/r.png", png(5))
        site.route("/img/under-reserved-page.png", png(6))
        site.route("/img/lifted.png", png(7))
        site.route("/img/meta.png", png(8))
        site.route("/img/open.png", png(9))
        site.route("/gallery", html_answer(listing_html([("m", "/detail/meta"),
                                                         ("o", "/detail/open")])))
        site.route("/detail/meta", html_answer(detail_html(
            "/img/meta.png", '<meta name="tdm-reservation" content="1">')))
        site.route("/detail/open", html_answer(detail_html("/img/open.png")))
        yield site


def json_source(name: str, url: str) -> str:
    return (f'\n[[sources]]\nname = "{name}"\nkind = "json_api"\nurl = "{url}"\n'
            '[sources.fields]\nitems = "items"\nid = "id"\nimage_url = "image"\n'
            'licence = "licence"\n')


def recipe_for(site: LoopbackServer, extra: str = "") -> str:
    return (f'contact = "tests@example.org"\n{extra}\n[budgets]\nmin_interval = 0.0\n'
            "max_attempts = 2\nbackoff_base = 0.05\nbackoff_max = 0.1\n"
            '[network]\nallow_addresses = ["127.0.0.1"]\nread_timeout = 2.0\n'
            + json_source("api", site.url("/api/items"))
            + json_source("page-reserved", site.url("/api/page-reserved"))
            + json_source("lifted", site.url("/api/lifted"))
            + f'\n[[sources]]\nname = "gallery"\nkind = "html"\nlisting_pages = '
              f'["{site.url("/gallery")}"]\n[sources.select]\nitem = "li.tile"\nlink = "a.rec"\n'
              'licence = ".lic"\n[sources.detail]\nimage = "img.full"\n')


def outcomes(col: Collection) -> dict[str, tuple[str, str | None]]:
    with col.ledger(readonly=True) as ledger:
        return {re.sub(r"^http://[^/]+", "", r["source_key"]): (r["state"], r["reason"])
                for r in ledger.query("SELECT source_key, state, reason FROM items")}


@pytest.fixture
def gathered(archive: LoopbackServer, tmp_path: Path) -> Collection:
    col = init_collection(tmp_path / "c", contact="tests@example.org")
    col.recipe_path.write_text(recipe_for(archive))
    result = gather(col)
    assert result.outcome == "finished"
    return col


def test_each_reservation_ends_its_item_with_its_own_reason(gathered: Collection) -> None:
    """Reserved before the image request -> skipped; in the image's header or file ->
    rejected; a header of 0 over a reserving file rule lets the listing through (TDMRep §4)."""
    assert outcomes(gathered) == {
        "plain": ("stored", None),
        "file-reserved": ("skipped", "tdmrep_reserved"),
        "header-reserved": ("rejected", "tdmrep_reserved"),
        "noimageai": ("rejected", "noai_directive"),
        "xmp-prohibited": ("rejected", "xmp_data_mining"),
        "under-reserved-page": ("skipped", "tdmrep_reserved"),
        "lifted": ("stored", None),
        "/detail/meta": ("skipped", "tdmrep_reserved"),
        "/detail/open": ("stored", None),
    }


def test_skipped_items_caused_no_image_request(gathered: Collection,
                                               archive: LoopbackServer) -> None:
    """The server never saw a request for an image whose item was skipped."""
    paths = archive.paths()
    for skipped in ("/img/reserved/r.png", "/img/under-reserved-page.png", "/img/meta.png"):
        assert skipped not in paths
    assert paths.count("/.well-known/tdmrep.json") == 1  # once per origin (TDMRep §4)
    for fetched in ("/img/plain.png", "/img/header-reserved.png", "/img/xmp.jpg"):
        assert fetched in paths


def test_rejected_files_are_not_kept(gathered: Collection) -> None:
    """Files reserved by their header or XMP are neither stored nor left as temp files."""
    stored = dict(gathered.store.iter_stored())
    assert len(stored) == 3  # plain, lifted, /detail/open
    assert not any(gathered.store.incoming_dir.iterdir())


def gathered_base(col: Collection) -> str:
    """The archive's base URL, as the gallery's source keys start with it."""
    with col.ledger(readonly=True) as ledger:
        key = ledger.query("SELECT source_key FROM items WHERE source_key LIKE 'http%' "
                           "LIMIT 1")[0]["source_key"]
    return re.sub(r"^(http://[^/]+).*", r"\1", key)


def test_the_ledger_records_each_signal_seen(gathered: Collection) -> None:
    """Where, which field, the raw value, its meaning and our decision, for each signal."""
    with gathered.ledger(readonly=True) as ledger:
        rows = ledger.query("SELECT s.place, s.name, s.value, s.meaning, s.decision, "
                            "replace(i.source_key, ?, '') AS source_key FROM "
                            "reservation_signals s JOIN items i ON i.id = s.item_id",
                            (gathered_base(gathered),))
        checks = ledger.query("SELECT reservation_checks FROM items WHERE source_key = "
                              "'plain'")[0]["reservation_checks"]
        host = ledger.query("SELECT tdmrep_state, tdmrep_status FROM hosts")[0]
        read_at = ledger.query("SELECT h.tdmrep_fetched_at, r.started_at FROM hosts h, runs r"
                               )[0]
    seen = {(r["source_key"], r["place"], r["name"], r["meaning"]) for r in rows}
    assert ("header-reserved", "HTTP header", "tdm-reservation", "reserved") in seen
    assert ("noimageai", "HTTP header", "X-Robots-Tag", "reserved") in seen
    assert ("xmp-prohibited", "XMP", "plus:DataMining", "reserved") in seen
    assert ("/detail/meta", "HTML meta", "tdm-reservation", "reserved") in seen
    assert ("file-reserved", "tdmrep.json", "location", "reserved") in seen
    assert ("lifted", "HTTP header", "tdm-reservation", "not reserved") in seen
    decided = next(r for r in rows if r["source_key"] == "file-reserved")
    assert decided["decision"] == "item skipped (tdmrep_reserved)"
    assert "/img/reserved/ -> tdm-reservation 1" in decided["value"]
    assert "tdmrep.json" in checks and "C2PA content credentials not read" in checks
    assert host == {"tdmrep_state": "rules", "tdmrep_status": 200}
    # the ledger's one time format (ISO 8601 UTC, milliseconds, Z), as the run's own start
    assert re.fullmatch(r"\d{4}-\d\d-\d\dT\d\d:\d\d:\d\d\.\d{3}Z", read_at["tdmrep_fetched_at"])
    assert read_at["tdmrep_fetched_at"] >= read_at["started_at"]


def test_a_permission_gathers_the_source_and_says_so(archive: LoopbackServer,
                                                     tmp_path: Path) -> None:
    """A source with a recorded permission is gathered; its signals carry the reference."""
    col = init_collection(tmp_path / "c", contact="tests@example.org")
    col.recipe_path.write_text(recipe_for(archive, '[reservations.permission]\n'
                                          '"page-reserved" = "Agreement FFS-7 of 2 May 2026"\n'))
    gather(col)
    assert outcomes(col)["under-reserved-page"] == ("stored", None)
    with col.ledger(readonly=True) as ledger:
        decisions = {r["decision"] for r in ledger.query(
            "SELECT decision FROM reservation_signals s JOIN items i ON i.id = s.item_id "
            "WHERE i.source_key = 'under-reserved-page' AND s.meaning = 'reserved'")}
    assert decisions == {"gathered under permission: Agreement FFS-7 of 2 May 2026"}


@pytest.fixture
def unreachable() -> Iterator[LoopbackServer]:
    """A host whose tdmrep.json always answers 503."""
    with LoopbackServer("127.0.0.1") as site:
        site.route("/robots.txt", (200, b"User-agent: *\nAllow: /\n", {}))
        site.route("/.well-known/tdmrep.json", (503, b"down", {"Content-Type": "text/plain"}))
        site.route("/api/items", json_answer(items("a", "b")))
        site.route("/img/a.png", png(1))
        site.route("/img/b.png", png(2))
        yield site


def test_unreachable_tdmrep_defers_without_blocking(unreachable: LoopbackServer,
                                                    tmp_path: Path) -> None:
    """A 5xx tdmrep.json is "unknown": the run ends, the items are deferred (not gathered as
    if nothing were reserved), no image is requested, and the next run asks again."""
    col = init_collection(tmp_path / "c", contact="tests@example.org")
    col.recipe_path.write_text(recipe_for(unreachable).split("\n[[sources]]")[0]
                               + json_source("api", unreachable.url("/api/items")))
    assert gather(col).outcome == "finished"
    assert outcomes(col) == {"a": ("deferred", "tdmrep_unknown"),
                             "b": ("deferred", "tdmrep_unknown")}
    assert not [p for p in unreachable.paths() if p.startswith("/img/")]
    asked = unreachable.paths().count("/.well-known/tdmrep.json")
    unreachable.route("/.well-known/tdmrep.json", (404, b"", {}))
    gather(col)
    assert unreachable.paths().count("/.well-known/tdmrep.json") == asked + 1
    assert outcomes(col) == {"a": ("stored", None), "b": ("stored", None)}


def test_when_unknown_gather_records_the_unknown(unreachable: LoopbackServer,
                                                 tmp_path: Path) -> None:
    """With when_unknown = "gather" the items are gathered and the ledger says the file could
    not be read: never a silent "no reservation"."""
    col = init_collection(tmp_path / "c", contact="tests@example.org")
    col.recipe_path.write_text(
        recipe_for(unreachable, '[reservations]\nwhen_unknown = "gather"\n').split(
            "\n[[sources]]")[0] + json_source("api", unreachable.url("/api/items")))
    gather(col)
    assert outcomes(col) == {"a": ("stored", None), "b": ("stored", None)}
    with col.ledger(readonly=True) as ledger:
        rows = ledger.query("SELECT meaning, decision, value FROM reservation_signals")
    assert rows and all(r["meaning"] == "unknown" for r in rows)
    assert "http_503" in rows[0]["value"]


def test_extra_robots_tokens_bind_the_run(tmp_path: Path) -> None:
    """A path disallowed in the robots.txt group of a listed token is not fetched; a token
    without its own group does not fall back to "*" (RFC 9309 §2.2.1 group selection)."""
    robots = (b"User-agent: *\nDisallow: /\n\nUser-agent: collector\nAllow: /\n\n"
              b"User-agent: ExampleTrainer\nDisallow: /img/b\n")
    with LoopbackServer("127.0.0.1") as site:
        site.route("/robots.txt", (200, robots, {"Content-Type": "text/plain"}))
        site.route("/api/items", json_answer(items("a", "b")))
        site.route("/img/a.png", png(1))
        site.route("/img/b.png", png(2))
        col = init_collection(tmp_path / "c", contact="tests@example.org")
        col.recipe_path.write_text(
            recipe_for(site, '[reservations]\nrobots_tokens = ["ExampleTrainer", "OtherBot"]\n'
                       ).split("\n[[sources]]")[0] + json_source("api", site.url("/api/items")))
        gather(col)
        assert outcomes(col) == {"a": ("stored", None),
                                 "b": ("blocked", "robots_token_disallowed")}
        assert "/img/b.png" not in site.paths()
        assert json.dumps(outcomes(col))  # plain data


def test_status_and_trace_show_the_reservations(gathered: Collection) -> None:
    """status counts the signals and the items each mechanism excluded; trace of a stored
    file says nothing was reserved at fetch time and which signals were checked."""
    from collector.exports.summary import format_summary, summarise
    from collector.exports.trace import Tracer
    from collector.exports.trace_format import format_record

    with gathered.ledger(readonly=True) as ledger:
        text = "\n".join(format_summary(summarise(ledger)))
    assert "items excluded by reservations:" in text
    assert "tdmrep_reserved 3 skipped" in text and "xmp_data_mining 1 rejected" in text
    assert "tdmrep.json per host: rules 1" in text
    stored = next(iter(dict(gathered.store.iter_stored()).values()))
    with Tracer.open(gathered.root) as tracer:
        lines = "\n".join(format_record(tracer.trace_file(stored)))
    assert ("reservations: no reservation found at fetch time; signals checked: tdmrep.json; "
            "tdm-reservation header; tdm-reservation meta") in lines
    assert "C2PA content credentials not read" in lines


def test_the_datasheet_and_croissant_answer_from_the_ledger(archive: LoopbackServer,
                                                            tmp_path: Path) -> None:
    """The datasheet answers which mechanisms were checked and how many items each excluded,
    names the permission, and carries the caution; Croissant's RAI preprocessing says it."""
    from collector.exports.datasheet import export_datasheet

    col = init_collection(tmp_path / "c", contact="tests@example.org")
    col.recipe_path.write_text(recipe_for(archive, '[reservations.permission]\n'
                                          '"lifted" = "Agreement FFS-9"\n'))
    gather(col)
    export_datasheet(col.root)
    md = (col.root / "datasheet" / "datasheet.md").read_text()
    answer = md[md.index("Which machine-readable reservations"):]
    answer = answer[:answer.index("Anything else about how it was gathered")]
    assert "tdmrep.json; tdm-reservation header" in answer
    assert "skipped/tdmrep_reserved | 3" in answer and "rejected/noai_directive | 1" in answer
    assert "| HTML meta | tdm-reservation | reserved | 1 | 1 |" in answer  # what each excluded
    assert "| XMP | plus:DataMining | reserved | 1 | 1 |" in answer
    assert "Permission recorded for source lifted: Agreement FFS-9." in answer
    assert "not legal advice" in answer
    rai = json.loads((col.root / "datasheet" / "croissant.json").read_text())
    steps = " ".join(rai["rai:dataPreprocessingProtocol"])
    assert "reservations against text-and-data mining were honoured" in steps
    assert "rejected/xmp_data_mining 1" in steps


def test_local_files_are_checked_for_data_mining_and_permissions_apply(tmp_path: Path) -> None:
    """A scan whose XMP prohibits AI training (IPTC 2023.1 Data Mining) is rejected and not
    stored; with a permission recorded for its source it is stored, and trace's text and the
    ledger name the permission."""
    col = init_collection(tmp_path / "c", contact="tests@example.org")
    (col.root / "in").mkdir()
    (col.root / "in" / "kept.jpg").write_bytes(picture(2, "JPEG"))
    (col.root / "in" / "reserved.jpg").write_bytes(picture(3, "JPEG", xmp=xmp_packet(
        "DMI-PROHIBITED-GENAIMLTRAINING")))
    source = ('\n[[sources]]\nname = "desk"\nkind = "scans"\npath = "in"\n'
              'include = ["*.jpg"]\nlicence = "CC0-1.0"\n')
    col.recipe_path.write_text(col.recipe_path.read_text() + source)
    gather(col, fetcher_factory=lambda recipe, ledger: None)
    assert outcomes(col) == {"kept.jpg": ("stored", None),
                             "reserved.jpg": ("rejected", "xmp_data_mining")}
    assert len(dict(col.store.iter_stored())) == 1
    col.recipe_path.write_text(col.recipe_path.read_text()
                               + '[reservations.permission]\n"desk" = "Scanned by us, 2026"\n')
    with col.ledger() as ledger:  # rejected is final; ask again for this test's second half
        ledger.update_item(ledger.query("SELECT id FROM items WHERE source_key = "
                                        "'reserved.jpg'")[0]["id"], state="pending")
    gather(col, fetcher_factory=lambda recipe, ledger: None)
    assert outcomes(col)["reserved.jpg"] == ("stored", None)
    with col.ledger(readonly=True) as ledger:
        checks = ledger.query("SELECT reservation_checks FROM items WHERE source_key = "
                              "'reserved.jpg'")[0]["reservation_checks"]
        decisions = {r["decision"] for r in ledger.query(
            "SELECT decision FROM reservation_signals WHERE name = 'plus:DataMining'")}
    assert checks.startswith("reserved (plus:DataMining") and "gathered under permission: " \
        "Scanned by us, 2026; signals checked: XMP plus:DataMining" in checks
    assert "gathered under permission: Scanned by us, 2026" in decisions


def test_tdmrep_json_is_kept_for_a_day_across_runs(gathered: Collection,
                                                   archive: LoopbackServer) -> None:
    """A second run within 24 hours reads the origin's tdmrep.json from the ledger, like
    robots.txt (RFC 9309 §2.4's day, common practice for this file), and decides the same."""
    before = outcomes(gathered)
    gather(gathered)
    assert archive.paths().count("/.well-known/tdmrep.json") == 1
    assert outcomes(gathered) == before
