"""OAI-PMH 2.0 harvesting against the invented repository (demo_site.oai) on loopback: paging
by resumptionToken, sets, oai_dc mapping, error codes, deleted records, incremental harvests.

Check values come from OAI-PMH 2.0 (http://www.openarchives.org/OAI/openarchivesprotocol.html,
version 2.0 of 2002-06-14, updated 2015): section numbers are named beside each check.
"""

from __future__ import annotations

import io
from collections.abc import Iterator
from pathlib import Path
from urllib.parse import parse_qs, urlsplit

import numpy as np
import pytest
from PIL import Image
from support.fetcher import FakeFetcher, collect
from support.server import LoopbackServer, on_query

from collector import sources
from collector.demo_site.oai import Repository, fernhollow_records
from collector.fetching.fetcher import Fetcher, FetchSettings
from collector.run.gather import gather
from collector.sources.base import ListingState
from collector.sources.oai_xml import (
    ERROR_CODES,
    NotOai,
    compile_path,
    harvest_from,
    parse_answer,
    path_values,
)
from collector.storage.collection import init_collection


def png(seed: int) -> bytes:
    """A small PNG per record: random blocks, so no two are near duplicates."""
    blocks = np.random.default_rng(seed).integers(0, 256, (12, 16, 3), dtype=np.uint8)
    out = io.BytesIO()
    Image.fromarray(blocks).resize((160, 120), Image.Resampling.NEAREST).save(out, "PNG")
    return out.getvalue()


@pytest.fixture
def oai() -> Iterator[tuple[LoopbackServer, Repository]]:
    """The invented repository (10 records, 4 per page) and its images on one server."""
    with LoopbackServer() as srv:
        repo = Repository(srv.url("/oai"),
                          fernhollow_records(srv.url("/img"), "https://fernhollow.example.org"))
        srv.route("/oai", on_query(repo.respond))
        srv.prefixes["/img/"] = lambda h: (200, png(int(h.path[-7:-4])),
                                           {"Content-Type": "image/png"})
        yield srv, repo


def table(srv: LoopbackServer, **extra: object) -> dict[str, object]:
    """An oai_pmh source table for the loopback repository."""
    return {"name": "ffs-oai", "kind": "oai_pmh", "url": srv.url("/oai"), **extra}


def queries(srv: LoopbackServer) -> list[dict[str, list[str]]]:
    """The query of every request the repository saw, in order."""
    return [parse_qs(urlsplit(t).query) for t in srv.targets() if t.startswith("/oai")]


# --- reading answers ------------------------------------------------------------------------

LIST_RECORDS = b"""<?xml version="1.0" encoding="UTF-8"?>
<OAI-PMH xmlns="http://www.openarchives.org/OAI/2.0/">
 <responseDate>2002-06-01T19:20:30Z</responseDate>
 <request verb="ListRecords" from="1998-01-15" set="physics:hep"
          metadataPrefix="oai_rfc1807">http://an.oa.org/OAI-script</request>
 <ListRecords>
  <record><header><identifier>oai:arXiv.org:hep-th/9901001</identifier>
    <datestamp>1999-12-25</datestamp><setSpec>physics:hep</setSpec><setSpec>math</setSpec>
   </header>
   <metadata><oai_dc:dc xmlns:oai_dc="http://www.openarchives.org/OAI/2.0/oai_dc/"
        xmlns:dc="http://purl.org/dc/elements/1.1/">
     <dc:title>Investigations</dc:title><dc:identifier>x</dc:identifier></oai_dc:dc>
   </metadata></record>
  <record><header status="deleted"><identifier>oai:arXiv.org:hep-th/9901007</identifier>
    <datestamp>1999-12-21</datestamp></header></record>
  <resumptionToken expirationDate="2002-06-01T23:20:00Z" completeListSize="6"
      cursor="0">xxx45abttyz</resumptionToken>
 </ListRecords>
</OAI-PMH>"""


def test_a_list_records_answer_is_read_as_the_protocol_shapes_it() -> None:
    """Header, sets, deleted status and the token's attributes are read."""
    # OAI-PMH 2.0 §4.6 ListRecords example; §2.5 header status="deleted"; §3.5 the
    # resumptionToken attributes expirationDate, completeListSize and cursor
    answer = parse_answer(LIST_RECORDS)
    assert answer.response_date == "2002-06-01T19:20:30Z"
    first, gone = answer.records
    assert (first.identifier, first.datestamp, first.sets, first.deleted) == (
        "oai:arXiv.org:hep-th/9901001", "1999-12-25", ("physics:hep", "math"), False)
    assert first.metadata is not None and first.metadata.tag.endswith("}dc")
    assert gone.deleted and gone.metadata is None
    assert answer.token is not None
    assert (answer.token.value, answer.token.complete_list_size, answer.token.cursor,
            answer.token.expiration) == ("xxx45abttyz", 6, 0, "2002-06-01T23:20:00Z")


def test_the_error_codes_are_those_of_the_protocol() -> None:
    """The eight error codes, and an error answer read as such."""
    # OAI-PMH 2.0 §3.6 Error and Exception Conditions: the table of error codes
    assert {"badArgument", "badResumptionToken", "badVerb",
                           "cannotDisseminateFormat", "idDoesNotExist", "noRecordsMatch",
                           "noMetadataFormats", "noSetHierarchy"} == ERROR_CODES
    body = (b'<OAI-PMH xmlns="http://www.openarchives.org/OAI/2.0/"><responseDate>'
            b'2002-05-01T09:18:29Z</responseDate><request>http://x.org/oai</request>'
            b'<error code="badVerb">Illegal OAI verb</error></OAI-PMH>')
    assert [(e.code, e.message) for e in parse_answer(body).errors] == [
        ("badVerb", "Illegal OAI verb")]


@pytest.mark.parametrize("body, why", [
    (b"<OAI-PMH><responseDate>2002-05-01T09:18:29Z</responseDate></OAI-PMH>", "namespace"),
    (b'<?xml version="1.0"?><!DOCTYPE r [<!ENTITY a "aaaaaaaa">]><r>&a;</r>', "DTD"),
    (b"<OAI-PMH xmlns='http://www.openarchives.org/OAI/2.0/'><unclosed>", "well-formed"),
    (b"{\"json\": true}", "well-formed"),
])
def test_answers_that_are_not_oai_pmh_are_refused_with_the_reason(body: bytes, why: str) -> None:
    """No namespace, a DTD with entities, broken XML: each refused, saying why."""
    # OAI-PMH 2.0 §3.2: the response's root element is OAI-PMH in the namespace
    # http://www.openarchives.org/OAI/2.0/
    with pytest.raises(NotOai, match=why):
        parse_answer(body)


def test_from_is_cut_to_the_repository_granularity() -> None:
    """A responseDate (seconds, UTC) becomes a day when the repository only has days."""
    # OAI-PMH 2.0 §3.3.2: YYYY-MM-DD and YYYY-MM-DDThh:mm:ssZ
    assert harvest_from("2025-04-01T10:00:00Z", "YYYY-MM-DD") == "2025-04-01"
    assert harvest_from("2025-04-01T10:00:00Z", "YYYY-MM-DDThh:mm:ssZ") == "2025-04-01T10:00:00Z"


def test_namespaced_paths_reach_elements_and_attributes_of_any_format() -> None:
    """Prefixes declared by the recipe, a predicate, and a trailing /@attribute."""
    from xml.etree.ElementTree import fromstring  # our own literal, not an answer

    mods = ('<mods xmlns="http://www.loc.gov/mods/v3" xmlns:xlink="http://www.w3.org/1999/xlink">'
            '<titleInfo><title>Banded feather</title></titleInfo>'
            '<location><url usage="primary">https://x.org/p/1</url>'
            '<url access="raw object">https://x.org/f/1.jpg</url></location>'
            '<accessCondition xlink:href="https://creativecommons.org/licenses/by/4.0/"/></mods>')
    root = fromstring(mods)
    ns = {"mods": "http://www.loc.gov/mods/v3", "xlink": "http://www.w3.org/1999/xlink"}
    cases = {
        "mods:titleInfo/mods:title": ["Banded feather"],
        "mods:location/mods:url[@usage='primary']": ["https://x.org/p/1"],
        "mods:location/mods:url": ["https://x.org/p/1", "https://x.org/f/1.jpg"],
        "mods:location/mods:url/@access": ["raw object"],
        "mods:accessCondition/@xlink:href": ["https://creativecommons.org/licenses/by/4.0/"],
    }
    for text, expected in cases.items():
        assert path_values(root, compile_path(text, ns), ns) == expected, text
    for bad in ("nope:title", "/mods:title", "mods:url/@nope:x", "mods:url[@"):
        with pytest.raises(ValueError):
            compile_path(bad, ns)


def test_recipe_problems_name_their_keys() -> None:
    """Unknown field, undeclared prefix, bad pattern, another format without image_url."""
    problems = sources.validate_source({
        "name": "x", "kind": "oai_pmh", "url": "http://127.0.0.1:1/oai",
        "metadata_prefix": "mods", "image_pattern": "([", "max_pages": 0,
        "fields": {"titel": "dc:title", "title": "mods:title"}}, "sources[1]")
    keys = {p.key_path for p in problems}
    assert keys == {"sources[1].fields.titel", "sources[1].fields.title",
                    "sources[1].image_pattern", "sources[1].max_pages",
                    "sources[1].fields.image_url"}, problems
    assert sources.validate_source(
        {"name": "x", "kind": "oai_pmh", "url": "http://127.0.0.1:1/oai"}, "s") == []


# --- harvesting -----------------------------------------------------------------------------

def test_a_harvest_pages_through_every_record_with_exclusive_tokens(oai) -> None:
    """Identify first, then ListRecords; later pages send only verb and resumptionToken."""
    srv, _ = oai
    state = ListingState()
    notes: list = []
    cands = list(sources.iter_candidates(table(srv), FakeFetcher(), notes.append, Path("."),
                                         state))
    assert notes == []
    assert len(cands) == 10 and len({c.source_key for c in cands}) == 10
    sent = queries(srv)
    assert sent[0] == {"verb": ["Identify"]}
    assert sent[1] == {"verb": ["ListRecords"], "metadataPrefix": ["oai_dc"]}
    # §3.5: resumptionToken is an exclusive argument; 10 records, 4 per page: 3 pages
    assert [set(q) for q in sent[2:]] == [{"verb", "resumptionToken"}] * 2
    # §3.5: the harvest remembers the first responseDate for the next from
    assert state.reached == "2025-03-31T09:00:00Z"


def test_oai_dc_fields_map_to_the_item(oai) -> None:
    """dc:title, dc:creator, dc:date, dc:rights (text and URL), dc:identifier by pattern."""
    srv, _ = oai
    cands, _ = collect(table(srv), FakeFetcher())
    first = next(c for c in cands if c.source_key.endswith("rec-001"))
    # oai_dc schema (oai_dc.xsd): DCMES 1.1 elements, each repeatable
    assert first.title == "Banded wing feather no. 1"
    assert first.creator == "R. Quillfeather"
    assert first.date == "2025-02-14"
    assert first.licence_raw == "CC0 1.0 Universal"
    assert first.licence_url == "https://creativecommons.org/publicdomain/zero/1.0/"
    assert first.image_url == srv.url("/img/rec-001.png")
    assert first.page_url == "https://fernhollow.example.org/records/rec-001"
    assert first.metadata["oai"]["sets"] == ["herbarium"]


def test_a_set_harvests_only_its_records(oai) -> None:
    """set = "feathers" asks the repository for that set only."""
    srv, _ = oai
    cands, notes = collect(table(srv, set="feathers"), FakeFetcher())
    assert notes == [] and len(cands) == 5
    assert all(c.metadata["oai"]["sets"] == ["feathers"] for c in cands)
    assert queries(srv)[1]["set"] == ["feathers"]  # §4.6 ListRecords optional argument set


def test_an_expired_token_restarts_the_list_and_loses_nothing(oai) -> None:
    """badResumptionToken: the list starts again; every record comes exactly once."""
    srv, repo = oai
    repo.expire_token_once = True
    state = ListingState()
    notes: list = []
    cands = list(sources.iter_candidates(table(srv), FakeFetcher(), notes.append, Path("."),
                                         state))
    assert sorted(c.source_key for c in cands) == sorted(r.identifier for r in repo.records)
    assert [n.kind for n in notes] == ["token_expired"]
    # §3.6 badResumptionToken: "the value of the resumptionToken argument is invalid or
    # expired"; the harvest asked for the list from the start a second time
    assert sum("metadataPrefix" in q for q in queries(srv)) == 2
    assert state.reached is not None


def test_no_records_match_is_an_empty_harvest_not_a_failure(oai) -> None:
    """noRecordsMatch ends the list with nothing and no note; the harvest is complete."""
    srv, _ = oai
    state = ListingState()
    notes: list = []
    cands = list(sources.iter_candidates(table(srv, set="minerals"), FakeFetcher(),
                                         notes.append, Path("."), state))
    # §3.6: noRecordsMatch "the combination of the values of the from, until, set and
    # metadataPrefix arguments results in an empty list"
    assert cands == [] and notes == [] and state.reached is not None


def test_other_error_codes_become_a_clear_note(oai) -> None:
    """cannotDisseminateFormat stops the harvest with a note naming the code."""
    srv, _ = oai
    state = ListingState()
    notes: list = []
    src = table(srv, metadata_prefix="mods", fields={"image_url": "dc:identifier"})
    cands = list(sources.iter_candidates(src, FakeFetcher(), notes.append, Path("."), state))
    assert cands == [] and state.reached is None
    assert [n.kind for n in notes] == ["oai_error"]
    assert "cannotDisseminateFormat" in notes[0].message  # §3.6


def test_max_pages_bounds_the_harvest_and_says_where_it_stopped(oai) -> None:
    """Two pages of three: eight records, a note with cursor and completeListSize."""
    srv, _ = oai
    state = ListingState()
    notes: list = []
    cands = list(sources.iter_candidates(table(srv, max_pages=2), FakeFetcher(),
                                         notes.append, Path("."), state))
    assert len(cands) == 8 and state.reached is None
    assert [n.kind for n in notes] == ["max_pages"]
    assert "completeListSize 10" in notes[0].message  # §3.5 completeListSize attribute


def test_deleted_records_come_as_withdrawn_candidates(oai) -> None:
    """A record with status="deleted" is a candidate without image that says so."""
    srv, repo = oai
    repo.delete("oai:fernhollow.example.org:rec-004")
    cands, _ = collect(table(srv), FakeFetcher())
    gone = [c for c in cands if c.withdrawn]
    assert [c.source_key for c in gone] == ["oai:fernhollow.example.org:rec-004"]
    assert gone[0].image_url is None and "deleted" in gone[0].withdrawn


def test_a_later_harvest_asks_from_the_previous_response_date(oai) -> None:
    """A remembered responseDate is sent as from, at the repository's granularity."""
    srv, repo = oai
    repo.granularity = "YYYY-MM-DD"
    cands = list(sources.iter_candidates(table(srv), FakeFetcher(), lambda n: None, Path("."),
                                         ListingState("2025-03-08T10:00:00Z")))
    # §3.3.1 selective harvesting: from is inclusive; records stamped 03-08 .. 03-11 match
    assert queries(srv)[1]["from"] == ["2025-03-08"]
    assert [c.source_key[-3:] for c in cands] == ["007", "008", "009", "010"]


def test_a_503_with_retry_after_on_a_listing_page_is_waited_out(oai) -> None:
    """The real fetcher waits the Retry-After of a 503 and asks again (flow control)."""
    srv, repo = oai
    repo.unavailable_once = 1
    fetcher = Fetcher(FetchSettings.from_recipe({
        "contact": "tests@example.org", "budgets": {"min_interval": 0.0, "max_attempts": 3},
        "network": {"allow_addresses": ["127.0.0.1"]}}), None)
    try:
        cands, notes = collect(table(srv), fetcher)
    finally:
        fetcher.close()
    assert len(cands) == 10 and notes == []
    # §3.5.1 flow control: 503 with Retry-After (RFC 9110 §10.2.3); the retry came after it
    page2 = [h for h in srv.hits if "resumptionToken" in h.path][:2]
    assert len(page2) == 2 and page2[1].mono - page2[0].mono >= 0.9


# --- incremental gathering ------------------------------------------------------------------

RECIPE = """contact = "x@example.org"
[budgets]
min_interval = 0.0
[network]
allow_addresses = ["127.0.0.1"]
[licences]
allow = ["CC-BY-4.0", "CC0-1.0"]
[[sources]]
name = "ffs-oai"
kind = "oai_pmh"
url = "{url}"
"""


def test_a_second_run_harvests_only_the_changes(oai, tmp_path: Path) -> None:
    """First run: all 10. Then 3 added and 1 deleted: the second run sends from= and sees
    exactly those 4 records; the deleted one's item is withdrawn by the archive."""
    srv, repo = oai
    col = init_collection(tmp_path / "c", contact="x@example.org")
    col.recipe_path.write_text(RECIPE.format(url=srv.url("/oai")))
    first = gather(col)
    assert first.outcome == "finished" and first.counts["stored"] == 10, first.counts
    repo.tick(3600)
    for n in (11, 12, 13):
        repo.add(fernhollow_records(srv.url("/img"), "https://f.example.org", 13)[n - 1])
    repo.delete("oai:fernhollow.example.org:rec-002")
    repo.requests.clear()
    second = gather(col)
    assert second.outcome == "finished"
    listing = [q for q in repo.requests if q.get("verb") == "ListRecords"]
    assert [q.get("from") for q in listing] == ["2025-03-31T09:00:00Z"]  # §3.3.1 from
    assert second.counts["stored"] == 3 and second.counts["withdrawn_by_archive"] == 1
    assert second.counts["already_done"] == 0  # nothing old was listed again
    with col.ledger(readonly=True) as ledger:
        row = ledger.query("SELECT state, reason, file_sha256 FROM items "
                           "WHERE source_key LIKE '%rec-002'")[0]
        notes = ledger.query("SELECT kind FROM notes WHERE kind = 'withdrawn_by_archive'")
    assert (row["state"], row["reason"]) == ("withdrawn_by_archive", "deleted_in_archive")
    assert row["file_sha256"] and len(notes) == 1  # recorded, and the file kept


def test_an_unfinished_run_keeps_the_previous_harvest_point(oai, tmp_path: Path) -> None:
    """An image that failed keeps from= where it was, so the next run lists it again."""
    srv, repo = oai
    repo.records[0].identifiers = ("https://f.example.org/r", srv.url("/missing/x.png"))
    col = init_collection(tmp_path / "c", contact="x@example.org")
    col.recipe_path.write_text(RECIPE.format(url=srv.url("/oai")))
    assert gather(col).counts["failed"] == 1
    repo.requests.clear()
    gather(col)
    listing = [q for q in repo.requests if q.get("verb") == "ListRecords"]
    assert "from" not in listing[0]


MODS_PAGE = """<OAI-PMH xmlns="http://www.openarchives.org/OAI/2.0/">
<responseDate>2025-05-01T08:00:00Z</responseDate><request>{base}</request><ListRecords>
<record><header><identifier>oai:x:1</identifier><datestamp>2025-04-01</datestamp></header>
<metadata><mods xmlns="http://www.loc.gov/mods/v3" xmlns:xlink="http://www.w3.org/1999/xlink">
<titleInfo><title>Speckled stone</title></titleInfo>
<name><namePart>E. Thistledown</namePart></name>
<location><url usage="primary">https://x.example.org/p/1</url>
<url access="raw object">https://x.example.org/f/1.tif</url></location>
<accessCondition xlink:href="https://creativecommons.org/licenses/by/4.0/">CC BY 4.0
</accessCondition></mods></metadata></record>
<resumptionToken completeListSize="1" cursor="0"></resumptionToken>
</ListRecords></OAI-PMH>"""


def test_another_metadata_format_maps_through_declared_namespaces() -> None:
    """A MODS feed: the recipe declares prefixes and paths; the empty final token ends it."""
    base = "http://127.0.0.1:9/oai"
    identify = ('<OAI-PMH xmlns="http://www.openarchives.org/OAI/2.0/"><responseDate>'
                "2025-05-01T08:00:00Z</responseDate><request/><Identify><granularity>"
                "YYYY-MM-DD</granularity></Identify></OAI-PMH>")
    xml = {"Content-Type": "text/xml"}
    fetcher = FakeFetcher({
        f"{base}?verb=Identify": (200, identify.encode(), xml),
        f"{base}?verb=ListRecords&metadataPrefix=mods": (
            200, MODS_PAGE.format(base=base).encode(), xml)})
    src: dict[str, object] = {"name": "mods-feed", "kind": "oai_pmh", "url": base,
                              "metadata_prefix": "mods"}
    src["namespaces"] = {"mods": "http://www.loc.gov/mods/v3",
                         "xlink": "http://www.w3.org/1999/xlink"}
    src["fields"] = {"title": "mods:titleInfo/mods:title", "creator": "mods:name/mods:namePart",
                     "licence": "mods:accessCondition",
                     "licence_url": "mods:accessCondition/@xlink:href",
                     "image_url": "mods:location/mods:url[@access='raw object']",
                     "page_url": "mods:location/mods:url[@usage='primary']"}
    cands, notes = collect(src, fetcher)
    assert notes == []
    # §3.5: "the response containing the incomplete list that completes the list includes an
    # empty resumptionToken element": no further request
    assert [(c.title, c.creator, c.licence_raw, c.licence_url, c.image_url, c.page_url)
            for c in cands] == [("Speckled stone", "E. Thistledown", "CC BY 4.0",
                                 "https://creativecommons.org/licenses/by/4.0/",
                                 "https://x.example.org/f/1.tif", "https://x.example.org/p/1")]


def test_a_changed_source_table_harvests_everything_again(oai, tmp_path: Path) -> None:
    """A remembered responseDate belongs to the table it was harvested with: another set
    sends no from=, so none of that set's older records are missed."""
    srv, repo = oai
    col = init_collection(tmp_path / "c", contact="x@example.org")
    col.recipe_path.write_text(RECIPE.format(url=srv.url("/oai")) + 'set = "herbarium"\n')
    assert gather(col).counts["stored"] == 5
    col.recipe_path.write_text(RECIPE.format(url=srv.url("/oai")) + 'set = "feathers"\n')
    repo.requests.clear()
    assert gather(col).counts["stored"] == 5
    listing = [q for q in repo.requests if q.get("verb") == "ListRecords"]
    assert "from" not in listing[0] and listing[0]["set"] == "feathers"
