"""JSON API adapter: differently shaped APIs handled by recipe alone, against a loopback server;
robustness against malformed answers and pagination loops."""

from __future__ import annotations

from collections.abc import Iterator
from typing import Any

import pytest
from support.fetcher import FakeFetcher, collect
from support.server import Answer, LoopbackServer, html_answer, json_answer, on_query

from collector.errors import FetchError, RobotsDenied
from collector.fetching.fetcher import Fetcher, FetchSettings
from collector.sources.json_fields import FieldMap, link_target, map_fields, pick_candidate


@pytest.fixture
def srv() -> Iterator[LoopbackServer]:
    """A loopback HTTP server for one test."""
    with LoopbackServer() as server:
        yield server


# --- API A: nested items, cursor pagination, candidate list, API key ------------------------

A_RECORDS = [
    {
        "uid": f"FFS-{n:03d}",
        "caption": {"en": f"Fern frond {n}"},
        "people": [{"name": "Ada Quillfeather"}, {"name": "Bram Mossley"}] if n == 1 else
                  [{"name": "Ada Quillfeather"}],
        "rights": {"licence": "CC-BY-4.0", "url": "https://creativecommons.org/licenses/by/4.0/"},
        "media": [
            {"href": f"/files/{n}-s.jpg", "width": 320, "kind": "small"},
            {"href": f"/files/{n}-l.jpg", "width": 2048, "kind": "large"},
            {"href": f"/files/{n}-m.jpg", "width": 1024, "kind": "medium"},
        ],
        "extra": {"habitat": "shaded bank"},
    }
    for n in range(1, 8)
]


def api_a(query: dict[str, str]) -> Answer:
    """Cursor API: 3 records per page, cursor is the index of the next record."""
    if query.get("key") != "s3cret":
        return json_answer({"error": "missing key"}, status=403)
    start = int(query.get("after", "0"))
    chunk = A_RECORDS[start:start + 3]
    nxt = str(start + 3) if start + 3 < len(A_RECORDS) else None
    return json_answer({"data": {"records": chunk}, "meta": {"next_cursor": nxt}})


def recipe_a(base: str) -> dict[str, Any]:
    """Recipe for API A."""
    return {
        "name": "api-a", "kind": "json_api", "url": f"{base}/api/a/records",
        "params": {"key": "${FERN_TEST_KEY}"}, "secret_params": ["key"],
        "pagination": {"style": "cursor", "next_cursor": "meta.next_cursor",
                       "send_cursor_as": "after"},
        "fields": {"items": "data.records", "id": "uid", "title": "caption.en",
                   "creator": "people[].name", "licence": "rights.licence",
                   "licence_url": "rights.url", "image_candidates": "media",
                   "candidate_url": "href", "candidate_width": "width", "pick": "largest"},
    }


def test_nested_items_with_cursor_pagination_are_all_found(
        srv: LoopbackServer, monkeypatch: pytest.MonkeyPatch) -> None:
    """A cursor API with nested items yields every record once, with mapped fields."""
    monkeypatch.setenv("FERN_TEST_KEY", "s3cret")
    srv.route("/api/a/records", on_query(api_a))
    fetcher = FakeFetcher()
    cands, notes = collect(recipe_a(srv.base), fetcher)
    assert notes == []
    assert [c.source_key for c in cands] == [r["uid"] for r in A_RECORDS]
    first = cands[0]
    assert first.title == "Fern frond 1"
    assert first.creator == "Ada Quillfeather; Bram Mossley"
    assert first.licence_raw == "CC-BY-4.0"
    # Relative URLs are resolved against the page URL (RFC 3986 §5.2).
    assert first.image_url == f"{srv.base}/files/1-l.jpg"
    assert first.metadata["item"]["extra"] == {"habitat": "shaded bank"}
    assert len(srv.targets()) == 3  # pages of 3, 3, 1
    assert all("after=" in p for p in srv.targets()[1:])
    assert all(c.secret_params == ("key",) for c in fetcher.calls)


# --- API B: page numbers with a total, relative image URLs, detail requests ------------------

B_ITEMS = [{"id": n, "name": f"Moss {n}", "img": f"../img/b{n}.jpg",
            **({"lic": "CC0-1.0"} if n % 2 else {})} for n in range(1, 11)]


def api_b(query: dict[str, str]) -> Answer:
    """Page-number API with a total; pages past the end repeat the last page (a trap)."""
    per = int(query.get("per_page", "4"))
    page = min(int(query.get("page", "1")), 3)
    return json_answer({"total": len(B_ITEMS), "page": page,
                        "results": B_ITEMS[(page - 1) * per: page * per]})


def api_b_detail(query: dict[str, str], n: int) -> Answer:
    """Detail answer with the licence the listing lacks."""
    return json_answer({"licence": {"name": "CC-BY-SA-4.0"}, "files": {"original": f"/o/b{n}.tif"}})


def test_page_numbers_stop_on_total_and_fetch_details_only_when_missing(
        srv: LoopbackServer) -> None:
    """Page-number pagination stops at total; details are requested only for items lacking them."""
    srv.route("/api/b/list/items", on_query(api_b))
    for n in range(1, 11):
        srv.route(f"/api/b/item/{n}", on_query(lambda q, n=n: api_b_detail(q, n)))
    recipe = {
        "name": "api-b", "kind": "json_api", "url": f"{srv.base}/api/b/list/items",
        "params": {"per_page": "4"},
        "pagination": {"style": "page", "param": "page", "start": 1, "total_count": "total"},
        "fields": {"items": "results", "id": "id", "title": "name", "licence": "lic",
                   "image_url": "img"},
        "detail": {"url": f"{srv.base}/api/b/item/{{id}}",
                   "fields": {"licence": "licence.name"}},
    }
    cands, notes = collect(recipe, FakeFetcher())
    assert notes == []
    assert [c.source_key for c in cands] == [str(n) for n in range(1, 11)]
    assert cands[0].image_url == f"{srv.base}/api/b/img/b1.jpg"
    assert cands[0].licence_raw == "CC0-1.0"  # odd ids: from the listing
    assert cands[1].licence_raw == "CC-BY-SA-4.0"  # even ids: merged from the detail answer
    assert cands[1].image_url == f"{srv.base}/api/b/img/b2.jpg"  # not mapped in detail.fields
    listing = [p for p in srv.targets() if p.startswith("/api/b/list")]
    assert len(listing) == 3  # 4 + 4 + 2 = total 10, no fourth page
    details = sorted(p for p in srv.paths() if p.startswith("/api/b/item/"))
    assert details == sorted(f"/api/b/item/{n}" for n in range(2, 11, 2))


# --- API C: top-level list, RFC 8288 Link header, pick by label ---------------------------

C_PAGES = {
    "1": [{"key": "c1", "sizes": [{"label": "thumb", "src": "t/c1.jpg", "w": 100, "h": 80},
                                  {"label": "original", "src": "o/c1.jpg", "w": 900, "h": 700}]},
          {"key": "c2", "sizes": [{"label": "thumb", "src": "t/c2.jpg", "w": 100, "h": 80},
                                  {"label": "wide", "src": "w/c2.jpg", "w": 1200, "h": 300},
                                  {"label": "tall", "src": "h/c2.jpg", "w": 800, "h": 1000}]}],
    "2": [{"key": "c3", "sizes": [{"label": "original", "src": "/abs/c3.png", "w": 50, "h": 50},
                                  {"label": "big", "src": "b/c3.png", "w": 3000, "h": 3000}]}],
}


def api_c(query: dict[str, str], base: str) -> Answer:
    """A list body; the next page is only in the Link header (RFC 8288)."""
    page = query.get("p", "1")
    # A relative target, resolved against the request URL (RFC 8288 §3.1).
    headers = {"Link": f'<?p=2>; rel="next", <{base}/api/c>; rel="up"'}
    return json_answer(C_PAGES[page], headers=headers if page == "1" else {})


def test_link_header_pagination_and_label_pick_with_largest_fallback(
        srv: LoopbackServer) -> None:
    """rel="next" in a Link header is followed; pick label:original falls back to largest area."""
    srv.route("/api/c/photos", on_query(lambda q: api_c(q, srv.base)))
    recipe = {
        "name": "api-c", "kind": "json_api", "url": f"{srv.base}/api/c/photos",
        "pagination": {"style": "link_header"},
        "fields": {"items": "@", "id": "key", "image_candidates": "sizes",
                   "candidate_url": "src", "candidate_width": "w", "candidate_height": "h",
                   "candidate_label": "label", "pick": "label:original"},
    }
    cands, notes = collect(recipe, FakeFetcher())
    assert notes == []
    assert [c.image_url for c in cands] == [
        f"{srv.base}/api/c/o/c1.jpg",
        f"{srv.base}/api/c/h/c2.jpg",  # no "original": largest by width*height (800000 > 360000)
        f"{srv.base}/abs/c3.png",  # the label wins even though "big" is larger
    ]
    assert srv.targets() == ["/api/c/photos", "/api/c/photos?p=2"]


# --- Robustness --------------------------------------------------------------------------


def simple_recipe(url: str, **pagination: Any) -> dict[str, Any]:
    """A minimal recipe with the given pagination."""
    recipe: dict[str, Any] = {"name": "s", "kind": "json_api", "url": url,
                              "fields": {"items": "items", "id": "id", "image_url": "u"}}
    if pagination:
        recipe["pagination"] = pagination
    return recipe


def test_malformed_json_gives_bad_json_note_and_stops(srv: LoopbackServer) -> None:
    """A truncated JSON body is reported as bad_json and the source stops."""
    srv.route("/bad", (200, b'{"items": [{"id": 1', {"Content-Type": "application/json"}))
    cands, notes = collect(simple_recipe(f"{srv.base}/bad", style="page"), FakeFetcher())
    assert cands == []
    assert [n.kind for n in notes] == ["bad_json"]
    assert "malformed JSON" in notes[0].message
    assert len(srv.targets()) == 1


def test_html_error_page_instead_of_json_gives_bad_json_note(srv: LoopbackServer) -> None:
    """An HTML page where JSON was expected is reported as not JSON, naming the content type."""
    srv.route("/html", html_answer("<!DOCTYPE html><h1>Maintenance</h1>"))
    cands, notes = collect(simple_recipe(f"{srv.base}/html"), FakeFetcher())
    assert cands == []
    assert notes[0].kind == "bad_json"
    assert "looks like HTML" in notes[0].message and "text/html" in notes[0].message


def test_items_path_giving_an_object_is_reported_as_wrong_shape(srv: LoopbackServer) -> None:
    """fields.items pointing at an object instead of a list gives a wrong_shape note."""
    srv.route("/obj", json_answer({"items": {"id": 1, "u": "/a.jpg"}}))
    cands, notes = collect(simple_recipe(f"{srv.base}/obj"), FakeFetcher())
    assert cands == []
    assert [n.kind for n in notes] == ["wrong_shape"]
    assert '"items"' in notes[0].message and "an object" in notes[0].message


def test_repeating_cursor_is_a_loop_and_stops(srv: LoopbackServer) -> None:
    """A cursor that comes back again stops the source with a loop note."""
    def api(q: dict[str, str]) -> Answer:
        n, nxt = {"": (0, "a"), "a": (1, "b"), "b": (2, "a")}[q.get("c", "")]
        return json_answer({"items": [{"id": n, "u": f"/{n}.jpg"}], "next": nxt})
    srv.route("/cur", on_query(api))
    cands, notes = collect(simple_recipe(f"{srv.base}/cur", style="cursor", next_cursor="next",
                                         send_cursor_as="c"), FakeFetcher())
    assert [c.source_key for c in cands] == ["0", "1", "2"]
    assert [n.kind for n in notes] == ["loop"]
    assert '"a"' in notes[0].message
    assert len(srv.targets()) == 3


def test_next_url_pointing_back_is_a_loop_and_stops(srv: LoopbackServer) -> None:
    """A next URL already visited stops the source with a loop note."""
    srv.route("/n1", json_answer({"items": [{"id": 1, "u": "a"}], "next": "/n2"}))
    srv.route("/n2", json_answer({"items": [{"id": 2, "u": "b"}], "next": "n1"}))
    cands, notes = collect(simple_recipe(f"{srv.base}/n1", style="next_url", next_path="next"),
                           FakeFetcher())
    assert [c.source_key for c in cands] == ["1", "2"]
    assert [n.kind for n in notes] == ["loop"]
    assert srv.targets() == ["/n1", "/n2"]


def test_api_ignoring_the_page_parameter_is_detected_as_a_loop(srv: LoopbackServer) -> None:
    """A page-number API that returns the same items for every page stops after one repeat."""
    srv.route("/same", json_answer({"items": [{"id": 1, "u": "a"}, {"id": 2, "u": "b"}]}))
    cands, notes = collect(simple_recipe(f"{srv.base}/same", style="page"), FakeFetcher())
    assert len(cands) == 2
    assert [n.kind for n in notes] == ["loop"]
    assert len(srv.targets()) == 2


def test_max_pages_is_enforced_on_endless_pagination(srv: LoopbackServer) -> None:
    """An API that always has a new cursor is read for max_pages pages only, with a note."""
    srv.route("/endless", on_query(lambda q: json_answer(
        {"items": [{"id": q.get("c", "0"), "u": "x"}], "next": str(int(q.get("c", "0")) + 1)})))
    recipe = simple_recipe(f"{srv.base}/endless", style="cursor", next_cursor="next",
                           send_cursor_as="c", max_pages=5)
    cands, notes = collect(recipe, FakeFetcher())
    assert len(cands) == 5 and len(srv.targets()) == 5
    assert [n.kind for n in notes] == ["max_pages"]


def test_http_error_on_listing_raises_for_the_orchestrator(srv: LoopbackServer) -> None:
    """A 404 listing answer reaches the adapter as FetchError http_404 (the fetcher raises on
    non-2xx) and is raised on for the orchestrator to record; the source stops."""
    with pytest.raises(FetchError) as err:
        collect(simple_recipe(f"{srv.base}/nowhere"), FakeFetcher())
    assert err.value.reason == "http_404" and err.value.status == 404
    assert "404" in str(err.value)
    assert srv.targets() == ["/nowhere"]


def test_http_error_on_detail_through_the_real_fetcher_gives_one_note(
        srv: LoopbackServer) -> None:
    """Through collector.fetching.fetcher, detail answers of 404 give one fetch_failed note naming
    http_404 and the items keep their listing values."""
    srv.route("/robots.txt", (200, b"User-agent: *\nAllow: /\n", {"Content-Type": "text/plain"}))
    srv.route("/list", json_answer({"items": [{"id": n, "u": f"/{n}.jpg"} for n in (1, 2)]}))
    recipe = simple_recipe(f"{srv.base}/list")
    recipe["detail"] = {"url": f"{srv.base}/item/{{id}}", "fields": {"licence": "lic"}}
    fetcher = Fetcher(FetchSettings.from_recipe({
        "contact": "tests@example.org", "budgets": {"min_interval": 0.0, "max_attempts": 1},
        "network": {"allow_addresses": ["127.0.0.1"]}}), None)
    try:
        cands, notes = collect(recipe, fetcher)
    finally:
        fetcher.close()
    assert [c.image_url for c in cands] == [f"{srv.base}/{n}.jpg" for n in (1, 2)]
    assert [n.kind for n in notes] == ["fetch_failed"]
    assert "http_404" in notes[0].message
    assert srv.paths() == ["/robots.txt", "/list", "/item/1", "/item/2"]


# --- Pure logic with the in-memory fetcher --------------------------------------------------


def test_offset_pagination_advances_by_items_received() -> None:
    """Offset pagination sends offset/limit and stops on an empty page."""
    base = "http://127.0.0.1:9/api"
    pages = {
        f"{base}?offset=0&limit=2": json_answer({"items": [{"id": 1, "u": "a"},
                                                           {"id": 2, "u": "b"}]}),
        f"{base}?offset=2&limit=2": json_answer({"items": [{"id": 3, "u": "c"}]}),
        f"{base}?offset=3&limit=2": json_answer({"items": []}),
    }
    fetcher = FakeFetcher(pages)
    recipe = simple_recipe(base, style="offset", send_offset_as="offset", send_limit_as="limit",
                           limit=2)
    cands, notes = collect(recipe, fetcher)
    assert [c.source_key for c in cands] == ["1", "2", "3"] and notes == []
    assert len(fetcher.calls) == 3


def test_next_url_keeps_recipe_params_the_link_lacks() -> None:
    """A next URL from the body gets the recipe's params (e.g. an API key) it does not carry."""
    base = "http://127.0.0.1:9/api"
    pages = {
        f"{base}?key=k": json_answer({"items": [{"id": 1, "u": "a"}], "next": f"{base}?p=2"}),
        f"{base}?p=2&key=k": json_answer({"items": [{"id": 2, "u": "b"}], "next": None}),
    }
    fetcher = FakeFetcher(pages)
    recipe = simple_recipe(base, style="next_url", next_path="next")
    recipe["params"], recipe["secret_params"] = {"key": "k"}, ["key"]
    cands, notes = collect(recipe, fetcher)
    assert [c.source_key for c in cands] == ["1", "2"] and notes == []


def test_items_without_id_are_skipped_with_one_note() -> None:
    """Items lacking the id field are skipped and reported once, not once per item."""
    base = "http://127.0.0.1:9/api"
    items = [{"u": "a"}, {"u": "b"}, {"id": 3, "u": "c"}]
    fetcher = FakeFetcher({base: json_answer({"items": items})})
    cands, notes = collect(simple_recipe(base), fetcher)
    assert [c.source_key for c in cands] == ["3"]
    assert [n.kind for n in notes] == ["missing_id"]


def test_pick_largest_prefers_sized_candidates_and_first_on_ties() -> None:
    """Largest ignores unsized candidates when sized ones exist and keeps the first of equals."""
    cands = [{"url": "a", "width": None, "height": None, "label": None},
             {"url": "b", "width": 500.0, "height": None, "label": None},
             {"url": "c", "width": 500.0, "height": None, "label": None}]
    assert pick_candidate(cands, "largest")["url"] == "b"
    assert pick_candidate(cands, "label:none")["url"] == "b"


def test_large_raw_item_is_capped_in_metadata() -> None:
    """A huge raw item is stored truncated in metadata rather than whole."""
    base = "http://127.0.0.1:9/api"
    big = {"id": 1, "u": "a", "blob": "x" * 50_000}
    cands, _ = collect(simple_recipe(base), FakeFetcher({base: json_answer({"items": [big]})}))
    assert cands[0].metadata["item"]["truncated"] is True
    assert len(cands[0].metadata["item"]["json_prefix"]) <= 16_384


def test_candidate_urls_resolve_against_the_answer_url() -> None:
    """map_fields resolves relative candidate URLs against the page URL (RFC 3986 §5.2)."""
    fm = FieldMap.from_table({"image_candidates": "m", "candidate_url": "h"})
    out = map_fields({"m": [{"h": "../x.png"}]}, fm, "http://127.0.0.1:9/a/b/c")
    assert out["image_url"] == "http://127.0.0.1:9/a/x.png"


class FailingDetails(FakeFetcher):
    """A fake fetcher whose detail requests are refused by robots.txt."""

    def get_page(self, url: str, **kw: Any) -> Any:
        """Raise RobotsDenied for detail requests; answer listings from memory."""
        if kw.get("purpose") == "detail":
            raise RobotsDenied(url, "Disallow: /item/")
        return super().get_page(url, **kw)


def test_failed_detail_requests_keep_listing_values_with_one_note() -> None:
    """Refused detail requests give one note per reason; items keep their listing values."""
    base = "http://127.0.0.1:9/api"
    items = [{"id": n, "u": f"/{n}.jpg"} for n in (1, 2, 3)]
    recipe = simple_recipe(base)
    recipe["detail"] = {"url": "http://127.0.0.1:9/item/{id}", "fields": {"licence": "lic"}}
    cands, notes = collect(recipe, FailingDetails({base: json_answer({"items": items})}))
    assert [c.image_url for c in cands] == [f"http://127.0.0.1:9/{n}.jpg" for n in (1, 2, 3)]
    assert [n.kind for n in notes] == ["fetch_failed"]
    assert "robots_disallowed" in notes[0].message


def test_refused_listing_request_propagates_to_the_caller() -> None:
    """A FetchError on the listing itself is raised for the orchestrator to record."""
    class Refusing(FakeFetcher):
        def get_page(self, url: str, **kw: Any) -> Any:
            raise RobotsDenied(url, "Disallow: /")

    with pytest.raises(RobotsDenied):
        collect(simple_recipe("http://127.0.0.1:9/api"), Refusing({}))


def test_link_target_accepts_both_link_map_shapes() -> None:
    """page.links may map rel to a URL or to {"url": ...} (requests/collector.fetching.fetcher
    style)."""
    assert link_target({"next": "/p2"}, "next") == "/p2"
    assert link_target({"next": {"url": "/p2", "rel": "next"}}, "next") == "/p2"
    assert link_target({"prev": "/p0"}, "next") is None and link_target(None, "next") is None
