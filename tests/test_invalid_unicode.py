"""Text that is not valid Unicode never stops a source: a lone surrogate in a listing.

JSON's ``"\\ud800"`` escape is valid JSON syntax whose string holds a lone surrogate (RFC 8259
§8.2: "the behavior of software that receives JSON texts containing such values is
unpredictable"). A surrogate code point is no Unicode scalar value, so UTF-8 cannot encode it
(Unicode 15.0 §3.9 D76 and D92; RFC 3629 §3: from memory). collector replaces each with
U+FFFD REPLACEMENT CHARACTER where candidates leave their source kind, names the fields in the
item's metadata (``invalid_unicode``), leaves one note per source and run, and never requests
an image URL that held one (``unsafe_url``). The ledger, the exports and ``trace`` never meet
one afterwards.
"""

from __future__ import annotations

import json
import re
from collections import Counter
from collections.abc import Iterator
from pathlib import Path

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from support.collections import gather_listing, one_listing_recipe, serve_leaves
from support.server import LoopbackServer
from typer.testing import CliRunner

from collector.cli import app
from collector.exports.datasheet import export_datasheet
from collector.run.gather import gather
from collector.safe_text import valid_unicode
from collector.sources.base import Candidate, capped_json, valid_candidate
from collector.storage.collection import Collection, init_collection

SURROGATE = re.compile("[\ud800-\udfff]")
LEAF_2 = "leaf-\\udbff"  # an id's surrogate is kept as its escape: ids stay distinct
FFFD = "\ufffd"  # U+FFFD REPLACEMENT CHARACTER (Unicode 15.0 §3.9, U+FFFD substitution)


def _listing(server: LoopbackServer) -> list[dict[str, object]]:
    """Five leaves; the middle ones hold lone surrogates in one field each (JSON escapes on
    the wire: json.dumps writes "\\ud800" for them, as a hostile server would)."""
    items: list[dict[str, object]] = list(serve_leaves(server, 5))
    items[1]["title"] = "Leaf \ud800 one"
    items[1]["creator"] = "Ann \udfff Example"
    items[2]["id"] = "leaf-\udbff"
    items[2]["licence"] = "CC0-1.0 \ud83d"
    items[3]["note \udc00"] = ["deep", {"x": "\ud800\ud800"}]
    items[4]["image"] = server.url("/img/4\udc00.png")
    return items


@pytest.fixture(scope="module")
def gathered(tmp_path_factory: pytest.TempPathFactory) -> Iterator[tuple[Collection, list]]:
    """One gather over the listing (twice: a rerun must finish too), the server's hits."""
    root = tmp_path_factory.mktemp("unicode") / "col"
    with LoopbackServer("127.0.0.1") as server:
        body = json.dumps({"results": _listing(server)}).encode()
        assert b"\\ud800" in body  # the lone surrogate travels as a JSON escape
        server.route("/api", (200, body, {"Content-Type": "application/json"}))
        col = init_collection(root, contact="x@example.org")
        recipe = one_listing_recipe(server.url("/api"), min_interval=0.0)
        col.recipe_path.write_text(recipe + 'creator = "creator"\n')
        first = gather(col)
        second = gather(col)
        yield col, [first, second, list(server.hits)]


def test_a_listing_with_lone_surrogates_finishes_and_admits_every_item(gathered) -> None:
    """The run (and every rerun) finishes; the items are stored as usual, with U+FFFD where
    the surrogates were and the fields named in their metadata."""
    col, (first, second, _hits) = gathered
    assert first.outcome == "finished" and second.outcome == "finished"
    with col.ledger(readonly=True) as ledger:
        rows = {r["source_key"]: r for r in ledger.query("SELECT * FROM items")}
    assert set(rows) == {"0", "1", LEAF_2, "3", "4"}
    assert rows["1"]["title"] == f"Leaf {FFFD} one"
    assert rows["1"]["creator"] == f"Ann {FFFD} Example"
    assert rows[LEAF_2]["licence_raw"] == f"CC0-1.0 {FFFD}"
    for key in ("0", "1", LEAF_2, "3"):
        assert rows[key]["state"] == "stored", rows[key]
    notes = {key: json.loads(rows[key]["metadata"]).get("invalid_unicode") for key in rows}
    assert notes["0"] is None
    assert set(notes["1"]) >= {"title", "creator"}
    assert set(notes[LEAF_2]) >= {"source_key", "licence_raw"}
    assert notes["3"] == ["metadata"]
    assert json.loads(rows["3"]["metadata"])["item"][f"note {FFFD}"] == [
        "deep", {"x": FFFD * 2}]


def test_an_image_url_holding_a_lone_surrogate_fails_as_unsafe_url_unrequested(
        gathered) -> None:
    """Item 4's image URL cannot be sent (RFC 3986 §2.5 percent-encodes UTF-8 octets, and a
    surrogate has none): failed / unsafe_url with a clear detail; no request for it or for the
    U+FFFD spelling reached the server."""
    col, (_first, _second, hits) = gathered
    with col.ledger(readonly=True) as ledger:
        row = ledger.query("SELECT * FROM items WHERE source_key = '4'")[0]
        notes = ledger.query("SELECT kind, message FROM notes WHERE kind = 'invalid_unicode'")
    assert (row["state"], row["reason"]) == ("failed", "unsafe_url")
    assert "not valid Unicode" in row["detail"] and "not requested" in row["detail"]
    assert row["image_url"].endswith(f"/img/4{FFFD}.png")
    assert not [h for h in hits if h.path.startswith("/img/4")]
    assert len(notes) == 2  # one per source and run (two runs)
    assert "U+FFFD" in notes[0]["message"]


def test_no_lone_surrogate_reaches_the_ledger_or_the_exports(gathered, tmp_path: Path) -> None:
    """Every text column of the ledger is valid UTF-8 (SQLite hands it back), and the datasheet
    (HTML, Markdown), Croissant JSON-LD, the attribution list and ``trace --json`` of a stored
    file are written and read back as strict UTF-8 without a surrogate."""
    col, _ = gathered
    with col.ledger(readonly=True) as ledger:
        for table in ("items", "notes", "fetches"):
            for row in ledger.query(f"SELECT * FROM {table}"):
                for value in row.values():
                    assert not (isinstance(value, str) and SURROGATE.search(value)), value
        sha = ledger.query("SELECT file_sha256 FROM items WHERE source_key = '1'")[0][
            "file_sha256"]
    out = tmp_path / "sheet"
    export_datasheet(col.root, out=out)
    written = [p for p in out.rglob("*") if p.suffix in (".html", ".md", ".json", ".csv")]
    assert {"datasheet.html", "datasheet.md", "croissant.json"} <= {p.name for p in written}
    assert any("attribution" in p.name for p in written)
    for path in written:
        text = path.read_bytes().decode("utf-8")  # strict: raises on an encoded surrogate
        assert not SURROGATE.search(text)
    assert any(f"Leaf {FFFD} one" in p.read_text("utf-8") for p in written
               if "attribution" in p.name)
    stored = col.store.find(sha)
    assert stored is not None
    for shown in ("--json", "--csv", None):
        args = ["trace", str(stored), "--in", str(col.root), *([shown] if shown else [])]
        result = CliRunner().invoke(app, args)
        assert result.exit_code == 0, result.output
        assert not SURROGATE.search(result.output)
        if shown == "--json":
            origin = json.loads(result.output)["results"][0]["file"]["origin"]
            assert origin["title"] == f"Leaf {FFFD} one"
        else:
            assert f"Leaf {FFFD} one" in result.output


def test_trace_says_which_listed_fields_held_text_that_is_not_unicode(gathered) -> None:
    """``trace`` of a file whose item had surrogates in its title and creator names those
    fields (its record is otherwise as usual); a clean item's record says nothing of it."""
    col, _ = gathered
    with col.ledger(readonly=True) as ledger:
        sha = {r["source_key"]: r["file_sha256"] for r in ledger.query(
            "SELECT source_key, file_sha256 FROM items WHERE state = 'stored'")}
    outputs = {}
    for key in ("0", "1"):
        stored = col.store.find(sha[key])
        assert stored is not None
        result = CliRunner().invoke(app, ["trace", str(stored), "--in", str(col.root)])
        assert result.exit_code == 0, result.output
        outputs[key] = result.output
    line = next(ln for ln in outputs["1"].splitlines() if "listed text:" in ln)
    assert "title" in line and "creator" in line and "not valid Unicode" in line
    assert "listed text:" not in outputs["0"]
    shown = CliRunner().invoke(app, ["trace", str(col.store.find(sha["1"])), "--in",
                                     str(col.root), "--json"])
    origin = json.loads(shown.output)["results"][0]["file"]["origin"]
    assert set(origin["not_unicode"]) >= {"title", "creator"}


def _section(text: str, start: str, end: str) -> str:
    """The part of a page from ``start`` up to the next ``end`` after it."""
    head = text.index(start)
    return text[head:text.index(end, head + len(start))]


def test_the_datasheet_counts_items_whose_listing_was_not_unicode_by_field(
        gathered, tmp_path: Path) -> None:
    """Where the datasheet discusses errors and noise (``composition.errors``), Markdown and
    HTML say how many items held text that is not valid Unicode and in which fields: the
    counts are ours, read from each item's metadata with Python's json, and the fixture's
    listing says what they must be (items 1, leaf-\\udbff, 3 and 4 held one; title and
    creator only in item 1; ``metadata``, which keeps the listed item as it came, in all
    four)."""
    col, _ = gathered
    with col.ledger(readonly=True) as ledger:
        named = [json.loads(r["metadata"]).get("invalid_unicode") or []
                 for r in ledger.query("SELECT metadata FROM items")]
    fields = Counter(field for names in named for field in names)
    items = sum(1 for names in named if names)
    assert items == 4 and (fields["title"], fields["creator"], fields["metadata"]) == (1, 1, 4)
    out = tmp_path / "sheet"
    result = export_datasheet(col.root, out=out)
    assert result.facts["not_unicode"]["items"] == items
    assert result.facts["not_unicode"]["fields"] == dict(fields)
    md = _section((out / "datasheet.md").read_text("utf-8"),
                  "### What is known about errors, noise and repeats", "\n### ")
    html = _section((out / "datasheet.html").read_text("utf-8"),
                    'id="composition.errors"', "<h3 ")
    for page in (md, html):
        assert f"{items} of the 5 items" in page and "not valid Unicode" in page
    for field, n in fields.items():
        assert f"| {field} | {n} |" in md
        assert re.search(rf"<td>{re.escape(field)}</td>\s*<td[^>]*>{n}</td>", html), field


def test_ids_differing_only_in_their_surrogates_stay_two_items() -> None:
    """A key keeps each surrogate as its escape (``\\ud800``), not U+FFFD: "a\ud800" and
    "a\udc00" would otherwise both be "a\ufffd", one item whose row the second overwrites."""
    first = valid_candidate(Candidate(source_key="a\ud800", parent_key="p\udfff"))
    second = valid_candidate(Candidate(source_key="a\udc00"))
    assert (first.source_key, second.source_key) == ("a\\ud800", "a\\udc00")
    assert first.parent_key == "p\\udfff"
    assert first.not_unicode == ("source_key", "parent_key")
    assert first.metadata == {"invalid_unicode": ["source_key", "parent_key"]}


def test_capped_json_measures_a_lone_surrogate_instead_of_raising() -> None:
    """The listing's raw item is capped by its UTF-8 size; a lone surrogate counts as the
    three bytes "surrogatepass" gives it (the defect: UnicodeEncodeError out of the listing)."""
    assert capped_json({"t": "\ud800"}) == {"t": "\ud800"}
    capped = capped_json({"t": "\ud800" * 10_000}, limit=100)
    assert capped["truncated"] is True and len(capped["json_prefix"].encode()) <= 100


text_with_surrogates = st.text(alphabet=st.characters(min_codepoint=0, max_codepoint=0xFFFF),
                               max_size=40)
json_values = st.recursive(
    st.none() | st.booleans() | st.integers() | text_with_surrogates,
    lambda inner: st.lists(inner, max_size=4)
    | st.dictionaries(text_with_surrogates, inner, max_size=4),
    max_leaves=12)


def _leaves(value: object) -> list:
    """Every value inside nested lists and dicts (dict keys left out), as comparable text."""
    if isinstance(value, dict):
        return [leaf for v in value.values() for leaf in _leaves(v)]
    if isinstance(value, list):
        return [leaf for v in value for leaf in _leaves(v)]
    return [value if isinstance(value, str) else repr(value)]


@settings(max_examples=200, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(title=text_with_surrogates, metadata=st.dictionaries(text_with_surrogates, json_values,
                                                            max_size=3))
def test_a_cleaned_candidate_always_encodes_as_utf8(title: str, metadata: dict) -> None:
    """Whatever text a source hands over, the candidate that leaves it encodes as strict UTF-8
    (text and JSON), changes nothing but surrogates (each one U+FFFD) and names exactly the
    fields that held one."""
    c = valid_candidate(Candidate(source_key="k", title=title, metadata=metadata,
                                  image_url="http://127.0.0.1/a.png"))
    c.title.encode("utf-8")  # strict: raises UnicodeEncodeError on a surrogate
    json.dumps(c.metadata, ensure_ascii=False).encode("utf-8")
    assert c.title == SURROGATE.sub(FFFD, title)
    kept = {k: v for k, v in c.metadata.items() if k != "invalid_unicode" or not c.not_unicode}
    if "invalid_unicode" in metadata and c.not_unicode:  # the source's own field, kept aside
        kept["invalid_unicode"] = kept.pop("invalid_unicode (as listed)")
    assert len(kept) == len(metadata)  # keys made alike by the replacement are all kept
    assert sorted(_leaves(kept)) == sorted(
        SURROGATE.sub(FFFD, leaf) if isinstance(leaf, str) else leaf
        for leaf in _leaves(metadata))
    had = bool(SURROGATE.search(title))
    assert ("title" in c.not_unicode) == had
    assert ("metadata" in c.not_unicode) == bool(
        SURROGATE.search(json.dumps(metadata, ensure_ascii=False)))
    assert "image_url" not in c.not_unicode
    assert valid_unicode(c.title) == (c.title, False)  # cleaning twice changes nothing


def test_a_cursor_or_detail_url_holding_a_lone_surrogate_is_refused_by_name(
        tmp_path: Path) -> None:
    """A json_api source whose detail URL would carry an id with a lone surrogate, and whose
    next cursor holds one: both requests are refused as unsafe_url before anything is sent
    (recorded in ``fetches`` with U+FFFD in the URL), the item keeps its listing values, the
    listing stops with its reason, and the run finishes."""
    with LoopbackServer("127.0.0.1") as server:
        leaves = serve_leaves(server, 2)
        leaves[1]["id"] = "leaf-\ud800"
        page = {"results": leaves, "next": "c\udc00"}
        server.route("/api", (200, json.dumps(page).encode(),
                              {"Content-Type": "application/json"}))
        server.prefixes["/detail/"] = (200, b'{"title": "From detail"}',
                                       {"Content-Type": "application/json"})
        col = init_collection(tmp_path / "col", contact="x@example.org")
        cursor = 'style = "cursor"\nnext_cursor = "next"\nsend_cursor_as = "after"'
        col.recipe_path.write_text(
            one_listing_recipe(server.url("/api"), min_interval=0.0, pagination=cursor)
            + f'[sources.detail]\nurl = "{server.url("/detail/")}{{id}}"\nwhen = "always"\n'
            '[sources.detail.fields]\ntitle = "title"\n')
        result = gather(col)
        hits = [h.path for h in server.hits]
    assert result.outcome == "finished"
    assert "/detail/0" in hits and not [p for p in hits if p.startswith("/detail/leaf")]
    assert not [p for p in hits if "after=" in p]
    with col.ledger(readonly=True) as ledger:
        items = {r["source_key"]: r for r in ledger.query("SELECT * FROM items")}
        refused = ledger.query("SELECT purpose, url, error FROM fetches WHERE attempt = 0")
        notes = ledger.query("SELECT kind, message FROM notes")
    assert items["0"]["title"] == "From detail" and items["0"]["state"] == "stored"
    assert items["leaf-\\ud800"]["title"] == "Leaf 1"  # the listing's value, detail refused
    assert items["leaf-\\ud800"]["state"] == "stored"
    assert {r["purpose"] for r in refused} == {"detail", "listing"}
    for row in refused:
        assert "not valid Unicode" in row["error"] and FFFD in row["url"]
    assert any("unsafe_url" in n["message"] for n in notes)


def test_the_guard_refuses_a_url_holding_a_lone_surrogate_and_names_it_validly() -> None:
    """transport_target refuses such a URL as unsafe_url (urllib3 would otherwise send the
    surrogate as the ill-formed UTF-8 bytes %ED%A0%80), and its message is valid Unicode; the
    query helpers hand the URL on instead of raising."""
    from collector.errors import UnsafeURL
    from collector.fetching.http_target import transport_target
    from collector.sources.base import merge_query
    from collector.urls import add_params

    for url in ("http://127.0.0.1/a\ud800.png", "http://127.0.0.1/?q=\udfff",
                add_params("http://127.0.0.1/", {"after": "c\udc00"}),
                merge_query("http://127.0.0.1/?after=c\udc00", {"key": "k"})):
        with pytest.raises(UnsafeURL) as refused:
            transport_target(url)
        assert refused.value.reason == "unsafe_url"
        str(refused.value).encode("utf-8")  # strict: no surrogate in the message
        assert "not valid Unicode" in str(refused.value)


ALLOW_LOOPBACK = ('contact = "x@example.org"\n[budgets]\nmin_interval = 0.0\n'
                  '[network]\nallow_addresses = ["127.0.0.1/32"]\n')


def test_a_tdmrep_json_policy_holding_a_lone_surrogate_is_recorded_with_fffd(
        tmp_path: Path) -> None:
    """tdmrep.json is JSON too (W3C TDMRep §3.1): a rule reserving the images whose
    tdm-policy holds a lone surrogate skips them (tdmrep_reserved) with U+FFFD in the policy,
    where the worker used to fail the run with UnicodeEncodeError on every rerun."""
    from collector.checks.reservations import parse_tdmrep

    rules = [{"location": "/img/*", "tdm-reservation": 1, "tdm-policy": "https://p/\udc00"},
             {"location": "/\ud800*", "tdm-reservation": 1}]
    body = json.dumps(rules).encode()
    parsed = parse_tdmrep(body).rules
    assert [r.policy for r in parsed] == [f"https://p/{FFFD}", None]
    assert parsed[1].location == f"/{FFFD}*"
    with LoopbackServer("127.0.0.1") as server:
        leaves = serve_leaves(server, 2)
        server.route("/.well-known/tdmrep.json", (200, body,
                                                  {"Content-Type": "application/json"}))
        col, result = gather_listing(server, leaves, tmp_path / "col")
    assert result.outcome == "finished"
    with col.ledger(readonly=True) as ledger:
        rows = ledger.query("SELECT state, reason, detail FROM items")
    assert [(r["state"], r["reason"]) for r in rows] == [("skipped", "tdmrep_reserved")] * 2
    assert all(f"policy https://p/{FFFD}" in r["detail"] for r in rows)


def test_a_page_whose_charset_decodes_to_lone_surrogates_reads_them_as_fffd(
        tmp_path: Path) -> None:
    """UTF-7 (RFC 2152) encodes UTF-16 code units, so "+2AA-" decodes to U+D800 alone:
    Page.text gives U+FFFD in its place, as for any bad bytes. An HTML listing in UTF-7 whose
    tdm-reservation meta holds one is gathered and the signal recorded with U+FFFD (the
    reservation signal's ledger row used to fail the run)."""
    from requests.structures import CaseInsensitiveDict

    from collector.fetching.answers import Page

    page = Page("http://127.0.0.1/", 200, CaseInsensitiveDict(), b"a +2AA- b", "utf-7")
    assert page.text == f"a {FFFD} b"
    with LoopbackServer("127.0.0.1") as server:
        serve_leaves(server, 1)
        html = (b'<html><head><meta name="tdm-reservation" content="+2AA-"></head><body>'
                b'<ul><li class="tile"><img src="/img/0.png"><span class="licence">CC0-1.0'
                b"</span></li></ul></body></html>")
        server.route("/list", (200, html, {"Content-Type": "text/html; charset=utf-7"}))
        col = init_collection(tmp_path / "col", contact="x@example.org")
        col.recipe_path.write_text(
            ALLOW_LOOPBACK + f'[[sources]]\nname = "h"\nkind = "html"\nlisting_pages = '
            f'["{server.url("/list")}"]\n[sources.select]\nitem = "li.tile"\nimage = "img"\n'
            'licence = ".licence"\n')
        result = gather(col)
    assert result.outcome == "finished"
    with col.ledger(readonly=True) as ledger:
        states = [r["state"] for r in ledger.query("SELECT state FROM items")]
        signals = ledger.query("SELECT place, name, value FROM reservation_signals")
    assert states == ["stored"]
    assert [(s["place"], s["name"], s["value"]) for s in signals] == [
        ("HTML meta", "tdm-reservation", FFFD)]


def _strings(value: object) -> Iterator[str]:
    """Every string in a JSON value, keys included."""
    if isinstance(value, str):
        yield value
    elif isinstance(value, dict):
        for k, v in value.items():
            yield k
            yield from _strings(v)
    elif isinstance(value, list):
        for v in value:
            yield from _strings(v)


def test_a_scan_file_name_that_is_not_utf8_is_shown_escaped_everywhere(
        tmp_path: Path) -> None:
    """A scans folder holding ``bad\\xff.png`` (a Linux name that is not UTF-8, kept by Python
    as the surrogate escape U+DCFF, PEP 383): gathered, and ``trace --json`` of the folder
    names it ``bad\\xff.png`` like the table and CSV do, with no lone surrogate in the JSON
    (it used to write the escape "\\udcff", RFC 8259 §8.2)."""
    import os

    from support.collections import SCANS_SOURCE, scan_image

    col = init_collection(tmp_path / "col", contact="x@example.org")
    scans = col.root / "in"
    scans.mkdir()
    with open(os.fsencode(scans) + b"/bad\xff.png", "wb") as fh:
        scan_image(1).save(fh, "PNG")
    col.recipe_path.write_text(col.recipe_path.read_text() + SCANS_SOURCE)
    assert gather(col, fetcher_factory=lambda recipe, ledger: None).outcome == "finished"
    with col.ledger(readonly=True) as ledger:
        keys = [r["source_key"] for r in ledger.query("SELECT source_key FROM items")]
    assert keys == ["bad\\xff.png"]
    result = CliRunner().invoke(app, ["trace", str(scans), "--in", str(col.root), "--json"])
    assert result.exit_code == 0, result.output
    data = json.loads(result.output)
    assert all(not SURROGATE.search(s) for s in _strings(data))
    assert data["results"][0]["path"].endswith("/bad\\xff.png")
    assert data["results"][0]["kind"] == "exact"


@settings(max_examples=25, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(artist=st.binary(max_size=24), rights=text_with_surrogates)
def test_embedded_exif_and_xmp_text_is_always_valid_unicode(
        tmp_path_factory: pytest.TempPathFactory, artist: bytes, rights: str) -> None:
    """Whatever bytes an EXIF Artist holds (UTF-8 ill-formed ones included: \\xed\\xa0\\x80 is
    a surrogate in CESU-8, refused by UTF-8, Unicode 15.0 §3.9 D92), and whatever text an XMP
    dc:rights holds (lone surrogates as XML character references, which XML 1.0 §2.2 Char
    excludes), the facts read from a real JPEG are valid Unicode: EXIF bytes fall back to
    Latin-1, an XMP packet the parser refuses is flagged xmp_unreadable."""
    from html import escape

    from PIL import Image

    from collector.checks.images import inspect_image

    exif = Image.Exif()
    exif[0x013B] = artist + b"\xed\xa0\x80"  # Artist (Exif 2.32 §4.6.5)
    refs = "".join(f"&#x{ord(ch):x};" if SURROGATE.match(ch) else escape(ch) for ch in rights)
    packet = ("<x:xmpmeta xmlns:x='adobe:ns:meta/'><rdf:RDF xmlns:rdf='http://www.w3.org/1999/"
              "02/22-rdf-syntax-ns#'><rdf:Description xmlns:dc='http://purl.org/dc/elements/"
              f"1.1/'><dc:rights>{refs}</dc:rights></rdf:Description></rdf:RDF></x:xmpmeta>")
    path = tmp_path_factory.mktemp("exif") / "x.jpg"
    Image.new("RGB", (32, 32), "white").save(path, "JPEG", exif=exif.tobytes(),
                                             xmp=packet.encode("utf-8", "surrogatepass"))
    facts = inspect_image(path)
    json.dumps([facts.exif, facts.rights, facts.flags], ensure_ascii=False).encode("utf-8")
    assert "exif_artist" in facts.rights
    if SURROGATE.search(rights):
        assert "xmp_unreadable" in facts.flags


@pytest.mark.parametrize("encoding", ["UTF-7", "UTF-32", "Shift_JIS", "x-no-such", "zlib"])
def test_an_oai_answer_in_an_encoding_the_parser_cannot_read_is_not_oai(encoding: str) -> None:
    """An OAI-PMH answer declaring UTF-7 (whose "+2AA-" is a lone surrogate), another encoding
    expat refuses ("multi-byte encodings are not supported") or an unknown name is NotOai,
    which the source turns into a not_oai_pmh note, instead of a ValueError or LookupError
    out of the listing (OAI-PMH 2.0 §3.1.2.1: answers are UTF-8, from memory)."""
    from collector.sources.oai_xml import NotOai, parse_answer

    body = (f'<?xml version="1.0" encoding="{encoding}"?><OAI-PMH xmlns="http://www.'
            'openarchives.org/OAI/2.0/"><responseDate>2025-03-01T09:00:00Z</responseDate>'
            "</OAI-PMH>").encode("ascii")
    with pytest.raises(NotOai, match="encoding the XML parser cannot read"):
        parse_answer(body)
