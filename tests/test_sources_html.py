"""HTML listing adapter: selectors, detail pages, srcset picking, <base href>, rel="license",
selector-matched-nothing notes and next-page loops; against a loopback server."""

from __future__ import annotations

from collections.abc import Iterator

import pytest
from bs4 import BeautifulSoup
from support.fetcher import FakeFetcher, collect
from support.server import LoopbackServer, html_answer, on_query

from collector.errors import FetchError
from collector.sources.html_pages import SrcCandidate, image_of, largest, page_base, parse_srcset

CC_BY = "https://creativecommons.org/licenses/by/4.0/"
CC0 = "https://creativecommons.org/publicdomain/zero/1.0/"

# Deliberately sloppy markup (unclosed li/p, unquoted attributes): html.parser must cope.
PAGE_1 = """<!doctype html><html><head><title>Fernhollow gallery</title>
<body><ul class=grid>
<li class="tile"><a href="item/1.html"><img src="thumbs/1.jpg"
   srcset="thumbs/1.jpg 200w, large/1.jpg 1600w, mid/1.jpg 800w" alt="leaf"></a>
   <p class=caption>Hart's-tongue fern <span class="by">Ada Quillfeather</span>
   <a rel="license" href="https://creativecommons.org/licenses/by/4.0/">CC BY 4.0</a>
<li class="tile"><a href="item/2.html"><img src="thumbs/2.jpg"
   srcset="mid/2.jpg 1.5x, big/2.jpg 3x"></a>
   <p class=caption>Lady fern <span class="by">Bram Mossley</span>
   <a rel="nofollow LICENSE" href="https://creativecommons.org/licenses/by/4.0/">CC BY 4.0</a>
<li class="tile"><a href="item/3.html#top"><img src="full/3.png"></a><p class=caption>Royal fern
</ul>
<a class=more rel=next href="?page=2">more</a>
"""

PAGE_2 = """<html><head><base href="/archive/">
<link rel="License Stylesheet" href="https://creativecommons.org/publicdomain/zero/1.0/">
</head><body><ul>
<li class="tile"><a href="item/4.html"><img src="data:image/gif;base64,R0lGOD"
  data-src="p/4.jpg"></a>
  <p class=caption>Hard fern</p>
<li class="tile"><a href="item/5.html"><img data-srcset="p/5-a.jpg 300w, p/5-b.jpg 900w"></a>
  <p class=caption>Bracken</p>
</ul><a rel="next" href="/gallery/">back to start</a>
"""


@pytest.fixture
def gallery() -> Iterator[LoopbackServer]:
    """A two-page gallery whose second page links back to the first."""
    with LoopbackServer() as srv:
        srv.route("/gallery/", on_query(
            lambda q: html_answer(PAGE_2 if q.get("page") == "2" else PAGE_1)))
        yield srv


def recipe(base: str, **extra: object) -> dict[str, object]:
    """The gallery recipe."""
    table: dict[str, object] = {
        "name": "gallery", "kind": "html", "listing_pages": [f"{base}/gallery/"],
        "select": {"item": "li.tile", "link": "a", "image": "img", "title": ".caption",
                   "creator": ".by", "next": "a[rel=next]"},
    }
    table.update(extra)
    return table


def test_listing_pages_yield_items_with_resolved_urls_and_licences(
        gallery: LoopbackServer) -> None:
    """Both pages are read; links/images resolve against page or base; rel=license is found."""
    cands, notes = collect(recipe(gallery.base), FakeFetcher())
    b = gallery.base
    assert [c.source_key for c in cands] == [
        f"{b}/gallery/item/1.html", f"{b}/gallery/item/2.html", f"{b}/gallery/item/3.html",
        f"{b}/archive/item/4.html", f"{b}/archive/item/5.html"]
    assert [c.image_url for c in cands] == [
        f"{b}/gallery/large/1.jpg",  # largest w descriptor
        f"{b}/gallery/big/2.jpg",  # largest x descriptor
        f"{b}/gallery/full/3.png",  # plain src
        f"{b}/archive/p/4.jpg",  # data-src over a data: placeholder, resolved against <base>
        f"{b}/archive/p/5-b.jpg",  # data-srcset
    ]
    assert cands[0].creator == "Ada Quillfeather"
    assert cands[0].licence_url == CC_BY and cands[0].licence_raw == "CC BY 4.0"
    assert cands[1].licence_url == CC_BY  # rel token list, case-insensitive
    assert cands[2].licence_url is None
    assert cands[3].licence_url == CC0 and cands[4].licence_url == CC0  # page-level <link>
    # Page 2 links back to page 1: one loop note, and page 1 is not fetched twice. Page 2 has
    # no ".by" at all, which is reported too.
    assert sorted(n.kind for n in notes) == ["loop", "selector_empty"]
    assert next(n for n in notes if n.kind == "loop").url == f"{b}/gallery/"
    assert gallery.targets() == ["/gallery/", "/gallery/?page=2"]


def test_selector_matching_nothing_is_reported_once_per_run(gallery: LoopbackServer) -> None:
    """A wrong selector gives one selector_empty note naming it and the page, not one per page."""
    cands, notes = collect(recipe(gallery.base, select={
        "item": "li.tile", "image": "img", "creator": ".author"}), FakeFetcher())
    assert len(cands) == 5
    empty = [n for n in notes if n.kind == "selector_empty"]
    assert len(empty) == 1
    assert '".author"' in empty[0].message and "select.creator" in empty[0].message
    assert empty[0].url == f"{gallery.base}/gallery/"


def test_page_without_expected_items_gives_note_and_stops() -> None:
    """An HTML page without any item blocks yields nothing and a selector_empty note."""
    fetcher = FakeFetcher({"http://127.0.0.1:9/g": html_answer("<html><body><p>Closed")})
    cands, notes = collect({"name": "g", "kind": "html", "listing_pages": ["http://127.0.0.1:9/g"],
                            "select": {"item": "div.card"}}, fetcher)
    assert cands == []
    assert [n.kind for n in notes] == ["selector_empty"]
    assert "div.card" in notes[0].message
    assert len(fetcher.calls) == 1


DETAIL = """<html><body><h1>Lady fern, frond</h1><figure>
<img class="full" srcset="/f/{n}-1200.jpg 1200w, /f/{n}-4000.jpg 4000w" src="/f/{n}-1200.jpg">
</figure><p class="creator">Bram Mossley</p>
<p>Licence: <a rel="license" href="https://creativecommons.org/publicdomain/zero/1.0/">CC0</a>
"""


def test_detail_pages_override_listing_values(gallery: LoopbackServer) -> None:
    """Detail pages are fetched with purpose "detail" and their image/licence/title win."""
    for n in (1, 2, 3):
        gallery.route(f"/gallery/item/{n}.html",
                      html_answer(DETAIL.replace("{n}", str(n))))
    fetcher = FakeFetcher()
    table = recipe(gallery.base, detail={"image": "figure img.full", "title": "h1"},
                   listing_pages=[f"{gallery.base}/gallery/"], max_pages=1)
    cands, notes = collect(table, fetcher)
    assert [c.image_url for c in cands] == [f"{gallery.base}/f/{n}-4000.jpg" for n in (1, 2, 3)]
    assert cands[0].title == "Lady fern, frond"
    assert cands[0].licence_url == CC0  # the detail page's rel=license replaces the listing's
    assert [c.purpose for c in fetcher.calls] == ["listing", "detail", "detail", "detail"]
    assert [n.kind for n in notes] == ["max_pages"]


def test_missing_detail_pages_give_one_fetch_failed_note(gallery: LoopbackServer) -> None:
    """Detail pages answering 404 reach the adapter as FetchError http_404 (as from
    collector.fetching.fetcher): one fetch_failed note, and the items keep their listing values."""
    table = recipe(gallery.base, detail={"image": "figure img.full"}, max_pages=1)
    cands, notes = collect(table, FakeFetcher())
    assert [c.image_url for c in cands] == [
        f"{gallery.base}/gallery/large/1.jpg", f"{gallery.base}/gallery/big/2.jpg",
        f"{gallery.base}/gallery/full/3.png"]
    assert sorted(n.kind for n in notes) == ["fetch_failed", "max_pages"]
    assert "http_404" in next(n for n in notes if n.kind == "fetch_failed").message


def test_missing_listing_page_raises_for_the_orchestrator(gallery: LoopbackServer) -> None:
    """A 404 start page is raised on as FetchError http_404 for the orchestrator to record."""
    with pytest.raises(FetchError) as err:
        collect(recipe(gallery.base, listing_pages=[f"{gallery.base}/gone/"]), FakeFetcher())
    assert err.value.reason == "http_404" and err.value.status == 404


def test_srcset_parsing_follows_the_html_candidate_rules() -> None:
    """srcset splits on whitespace/commas per HTML §4.8.4.3.10; bad descriptors are dropped."""
    got = parse_srcset(" a,1.jpg 100w,b.jpg 300w , c.jpg, d.jpg 2x, e.jpg 10h, f.jpg 5q")
    assert got == [SrcCandidate("a,1.jpg", width=100), SrcCandidate("b.jpg", width=300),
                   SrcCandidate("c.jpg"), SrcCandidate("d.jpg", density=2.0)]
    assert largest(got) == SrcCandidate("b.jpg", width=300)  # w descriptors win
    assert largest([SrcCandidate("x"), SrcCandidate("y", density=0.5)]) == SrcCandidate("x")


def test_base_href_is_resolved_against_the_page_url() -> None:
    """A relative <base href> is itself resolved against the page URL (HTML §4.2.3.1)."""
    soup = BeautifulSoup('<base href="../static/"><img src="a.png">', "html.parser")
    base = page_base(soup, "http://127.0.0.1:9/site/pages/list.html")
    assert base == "http://127.0.0.1:9/site/static/"
    assert image_of(soup.img, base)[0] == "http://127.0.0.1:9/site/static/a.png"
    plain = BeautifulSoup("<p>no base</p>", "html.parser")
    assert page_base(plain, "http://127.0.0.1:9/x/y") == "http://127.0.0.1:9/x/y"


def test_picture_element_picks_the_largest_source() -> None:
    """A <picture> element's sources and img all compete; the widest wins."""
    soup = BeautifulSoup('<picture><source srcset="s.webp 640w, l.webp 1920w">'
                         '<img src="fallback.jpg"></picture>', "html.parser")
    url, info = image_of(soup.picture, "http://127.0.0.1:9/")
    assert url == "http://127.0.0.1:9/l.webp" and info == {"srcset_w": 1920}


def test_licence_selector_text_wins_over_rel_license_text(gallery: LoopbackServer) -> None:
    """With a licence selector, its text is licence_raw and rel=license still gives the URL."""
    gallery.route("/lic", html_answer(
        '<div class=t><img src=a.jpg><span class=lic>Attribution 4.0</span>'
        f'<a rel=license href="{CC_BY}">see licence</a></div>'))
    table = {"name": "l", "kind": "html", "listing_pages": [f"{gallery.base}/lic"],
             "select": {"item": "div.t", "licence": ".lic"}}
    cands, notes = collect(table, FakeFetcher())
    assert notes == []
    assert cands[0].licence_raw == "Attribution 4.0" and cands[0].licence_url == CC_BY
    assert cands[0].source_key == f"{gallery.base}/a.jpg"  # no link: the image URL is the key
