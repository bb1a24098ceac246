"""HTML listing adapter: CSS selectors over listing pages, optional detail pages, srcset picking,
<base href> resolution and automatic rel="license" detection.

Parsing uses BeautifulSoup with Python's built-in "html.parser", which tolerates broken markup.
"""

from __future__ import annotations

import re
from collections.abc import Iterator, Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import soupsieve
from bs4 import BeautifulSoup, Tag

from collector.schema import (
    Key,
    Problems,
    at_least,
    check_str_list,
    check_table,
    check_value,
    http_url,
)
from collector.sources.base import (
    Candidate,
    FetchError,
    NoteSink,
    OnceNotes,
    PageFetcher,
    SourceError,
    SourceKind,
    resolve_url,
    strip_fragment,
)

DEFAULT_MAX_PAGES = 100

KEYS: dict[str, Key] = {
    "listing_pages": Key("list", required=True, formerly="start_urls",
                         hint='listing pages to start from, e.g. ["https://example.org/gallery/"]'),
    "max_pages": Key("int", check=at_least(1)),
    "select": Key("table", required=True,
                  hint='CSS selectors; at least item = "..." (one block per image)'),
    "detail": Key("table"),
}
SELECT_KEYS: dict[str, Key] = {
    "item": Key("str", required=True, hint='the CSS selector of one item block, e.g. "li.tile"'),
    "link": Key("str"),
    "image": Key("str"),
    "title": Key("str"),
    "creator": Key("str"),
    "licence": Key("str"),
    "date": Key("str"),
    "next": Key("str"),
}
DETAIL_KEYS: dict[str, Key] = {
    "image": Key("str"),
    "title": Key("str"),
    "creator": Key("str"),
    "licence": Key("str"),
    "date": Key("str"),
}
TEXT_FIELDS = ("title", "creator", "licence", "date")


def _check_selector(value: Any, path: str, problems: Problems) -> None:
    if not isinstance(value, str):
        return
    if not value.strip():
        problems.add(path, "must not be empty")
        return
    try:
        soupsieve.compile(value)
    except (soupsieve.SelectorSyntaxError, ValueError, TypeError) as exc:
        first = str(exc).strip().splitlines()[0]
        problems.add(path, f'is not a valid CSS selector ("{value}"): {first}')


def check(table: Mapping[str, Any], prefix: str, problems: Problems) -> None:
    """The checks inside one html source table (KEYS are checked first)."""
    urls = table.get("listing_pages")
    if isinstance(urls, str):
        problems.add(f"{prefix}.listing_pages", f'must be a list of URLs, e.g. ["{urls}"]')
    elif check_str_list(urls, f"{prefix}.listing_pages", problems):
        for i, url in enumerate(urls):
            check_value(url, http_url, f"{prefix}.listing_pages[{i}]", problems)
    for section, schema in (("select", SELECT_KEYS), ("detail", DETAIL_KEYS)):
        sub = table.get(section)
        if isinstance(sub, dict):
            check_table(sub, schema, f"{prefix}.{section}", problems)
            for key, value in sub.items():
                if key in schema:
                    _check_selector(value, f"{prefix}.{section}.{key}", problems)


# ---------------------------------------------------------------------------------------------
# Pure helpers: srcset, image choice, rel tokens, text


@dataclass(frozen=True)
class SrcCandidate:
    """One image candidate from src/srcset: URL plus width (w) or density (x) descriptor."""

    url: str
    width: int | None = None
    density: float | None = None


_DESCRIPTOR = re.compile(r"^(?:(\d+)w|(\d+(?:\.\d+)?|\.\d+)x)$", re.IGNORECASE)


def parse_srcset(value: str) -> list[SrcCandidate]:
    """Image candidates of a srcset attribute.

    Follows the shape of the HTML Living Standard's "parse a srcset attribute" algorithm
    (§4.8.4.3.10): URLs are split on whitespace, a URL ending in commas has no descriptors,
    descriptors run to the next comma outside parentheses; candidates with descriptors we do not
    understand (h, or several) are dropped, as the standard drops erroneous candidates.
    """
    out: list[SrcCandidate] = []
    pos, n = 0, len(value)
    while True:
        while pos < n and (value[pos].isspace() or value[pos] == ","):
            pos += 1
        if pos >= n:
            return out
        start = pos
        while pos < n and not value[pos].isspace():
            pos += 1
        url = value[start:pos]
        descriptors: list[str] = []
        if url.endswith(","):
            url = url.rstrip(",")
        else:
            depth, start = 0, pos
            while pos < n and (depth > 0 or value[pos] != ","):
                depth += {"(": 1, ")": -1}.get(value[pos], 0)
                pos += 1
            descriptors = value[start:pos].split()
        if not url:
            continue
        if not descriptors:
            out.append(SrcCandidate(url))
            continue
        match = _DESCRIPTOR.match(descriptors[0]) if len(descriptors) == 1 else None
        if match is None:
            continue
        if match.group(1):
            out.append(SrcCandidate(url, width=int(match.group(1))))
        else:
            out.append(SrcCandidate(url, density=float(match.group(2))))


def largest(cands: list[SrcCandidate]) -> SrcCandidate | None:
    """The biggest candidate: highest w if any has w, else highest density (no descriptor = 1x)."""
    if not cands:
        return None
    widths = [c for c in cands if c.width is not None]
    if widths:
        return max(widths, key=lambda c: c.width or 0)
    return max(cands, key=lambda c: c.density if c.density is not None else 1.0)


_LAZY_SRC = ("data-src", "data-original", "data-lazy-src")


def _img_candidates(tag: Tag) -> list[SrcCandidate]:
    """Candidates of one img/source tag: srcset (or data-srcset), else lazy src, else src."""
    for attr in ("srcset", "data-srcset"):
        value = tag.get(attr)
        if isinstance(value, str) and value.strip():
            cands = parse_srcset(value)
            if cands:
                src = _first_attr(tag, (*_LAZY_SRC, "src"))
                if src and all(c.url != src for c in cands):
                    cands.append(SrcCandidate(src))  # src counts as the 1x candidate
                return cands
    src = _first_attr(tag, (*_LAZY_SRC, "src"))
    return [SrcCandidate(src)] if src else []


def _first_attr(tag: Tag, names: tuple[str, ...]) -> str | None:
    for name in names:
        value = tag.get(name)
        if isinstance(value, str) and value.strip() and not value.strip().startswith("data:"):
            return value.strip()
    return None


def image_of(tag: Tag | None, base: str) -> tuple[str | None, dict[str, Any]]:
    """The best image URL a matched element points to, resolved, plus how it was chosen."""
    if tag is None:
        return None, {}
    cands: list[SrcCandidate] = []
    if tag.name == "picture":
        for child in tag.find_all(["source", "img"]):
            cands += _img_candidates(child)
    elif tag.name in ("img", "source"):
        cands = _img_candidates(tag)
    elif tag.name in ("a", "link") and _first_attr(tag, ("href",)):
        cands = [SrcCandidate(_first_attr(tag, ("href",)) or "")]
    elif tag.name == "meta" and _first_attr(tag, ("content",)):
        cands = [SrcCandidate(_first_attr(tag, ("content",)) or "")]
    else:
        inner = tag.find(["picture", "img"])
        return image_of(inner, base) if isinstance(inner, Tag) else (None, {})
    best = largest(cands)
    if best is None:
        return None, {}
    info: dict[str, Any] = {}
    if best.width is not None:
        info["srcset_w"] = best.width
    if best.density is not None:
        info["srcset_x"] = best.density
    return resolve_url(base, best.url), info


def rel_tokens(tag: Tag) -> set[str]:
    """The rel attribute as a set of lower-case tokens (rel is a token list, HTML §4.6.7)."""
    rel = tag.get("rel")
    if rel is None:
        return set()
    parts = rel if isinstance(rel, list) else str(rel).split()
    return {p.lower() for p in parts}


def find_rel(scope: Tag, token: str, *, outside: list[Tag] | None = None) -> Tag | None:
    """First a/link/area with href whose rel contains token; optionally not inside given tags."""
    blocked = {id(t) for t in outside or []}
    for tag in scope.find_all(["a", "link", "area"], href=True):
        if token not in rel_tokens(tag):
            continue
        if blocked and any(id(p) in blocked for p in tag.parents):
            continue
        return tag
    return None


def text_of(tag: Tag | None) -> str | None:
    """Visible text of an element with whitespace collapsed."""
    if tag is None:
        return None
    text = " ".join(tag.get_text(" ", strip=True).split())
    return text or None


def page_base(soup: BeautifulSoup, page_url: str) -> str:
    """The document base URL: the first <base href>, resolved against the page URL (HTML §4.2.3)."""
    base = soup.find("base", href=True)
    if isinstance(base, Tag):
        href = base.get("href")
        if isinstance(href, str) and href.strip():
            return resolve_url(page_url, href) or page_url
    return page_url


def licence_from(scope: Tag, selector: str | None, base: str, *,
                 outside: list[Tag] | None = None) -> tuple[str | None, str | None, bool]:
    """(licence_raw, licence_url, selector_matched) from a selector and rel="license" links."""
    raw = url = None
    matched = False
    if selector:
        tag = scope.select_one(selector)
        if tag is not None:
            matched = True
            raw = text_of(tag)
            link = tag if tag.name == "a" else tag.find("a", href=True)
            if isinstance(link, Tag) and isinstance(link.get("href"), str):
                url = resolve_url(base, str(link.get("href")))
    rel = find_rel(scope, "license", outside=outside)
    if rel is not None:
        url = resolve_url(base, str(rel.get("href"))) or url
        raw = raw or text_of(rel)
    return raw, url, matched


# ---------------------------------------------------------------------------------------------
# Walking the pages


class _Walker:
    """State of one run over one html source."""

    def __init__(self, source: Mapping[str, Any], fetcher: PageFetcher, notes: OnceNotes) -> None:
        self.fetcher, self.notes = fetcher, notes
        self.select: dict[str, str] = dict(source["select"])
        self.detail: dict[str, str] | None = (
            dict(source["detail"]) if isinstance(source.get("detail"), Mapping) else None)
        self.listing_pages: list[str] = list(source["listing_pages"])
        self.max_pages = int(source.get("max_pages", DEFAULT_MAX_PAGES))
        self.seen_keys: set[str] = set()

    def _get(self, url: str, purpose: str) -> tuple[str, BeautifulSoup] | None:
        try:
            page = self.fetcher.get_page(url, purpose=purpose)
        except FetchError as exc:
            if purpose == "listing":
                raise  # the source cannot go on; the orchestrator records exc.reason
            self.notes.add("fetch_failed", exc.url, f"detail page request failed: {exc}; "
                           "such items keep their listing values (reported once per reason)",
                           once_key=exc.reason)
            return None
        return page.url, BeautifulSoup(page.text or "", "html.parser")

    def _selector_empty(self, section: str, key: str, url: str) -> None:
        sel = (self.select if section == "select" else self.detail or {})[key]
        self.notes.add("selector_empty", url,
                       f'{section}.{key} = "{sel}" matched nothing on this page; check the '
                       "selector against the page source (reported once per run)",
                       once_key=f"{section}.{key}")

    def run(self) -> Iterator[Candidate]:
        """Follow each start URL's next-page chain, yielding candidates."""
        seen_pages: set[str] = set()
        pages = 0
        for start in self.listing_pages:
            url: str | None = strip_fragment(start)
            if url in seen_pages:
                continue  # reached already from an earlier start URL
            while url is not None:
                if url in seen_pages:
                    self.notes.add("loop", url, "the next-page link leads back to a page "
                                   "already read; stopped following it")
                    break
                if pages >= self.max_pages:
                    self.notes.add("max_pages", url, f"stopped after max_pages = "
                                   f"{self.max_pages} pages; there may be more")
                    return
                seen_pages.add(url)
                pages += 1
                got = self._get(url, "listing")
                if got is None:
                    break
                final_url, soup = got
                seen_pages.add(strip_fragment(final_url))
                base = page_base(soup, final_url)
                yield from self._listing(soup, base, final_url)
                url = self._next(soup, base)

    def _next(self, soup: BeautifulSoup, base: str) -> str | None:
        sel = self.select.get("next")
        tag = soup.select_one(sel) if sel else find_rel(soup, "next")
        if tag is None:
            return None
        if tag.name not in ("a", "link", "area"):
            inner = tag.find("a", href=True)
            tag = inner if isinstance(inner, Tag) else tag
        href = tag.get("href")
        url = resolve_url(base, href) if isinstance(href, str) else None
        return strip_fragment(url) if url else None

    def _listing(self, soup: BeautifulSoup, base: str, url: str) -> Iterator[Candidate]:
        items = soup.select(self.select["item"])
        if not items:
            self._selector_empty("select", "item", url)
            return
        page_raw, page_lic, _ = licence_from(soup, None, base, outside=items)
        matched = dict.fromkeys(k for k in ("link", "image", *TEXT_FIELDS) if k in self.select)
        for item in items:
            values: dict[str, Any] = {}
            link = resolve_url(base, self._link(item, matched))
            values["page_url"] = strip_fragment(link) if link else None
            img_tag = self._one(item, "image", matched)
            if "image" not in self.select:
                img_tag = item.find(["picture", "img"])
            values["image_url"], values["image_choice"] = image_of(img_tag, base)
            for key in ("title", "creator", "date"):
                values[key] = text_of(self._one(item, key, matched))
            raw, lic_url, hit = licence_from(item, self.select.get("licence"), base)
            if hit:
                matched["licence"] = True
            values["licence"], values["licence_url"] = raw or page_raw, lic_url or page_lic
            cand = self._finish(values, url)
            if cand is not None:
                yield cand
        for key, found in matched.items():
            if not found:
                self._selector_empty("select", key, url)

    def _one(self, item: Tag, key: str, matched: dict[str, Any]) -> Tag | None:
        sel = self.select.get(key)
        if not sel:
            return None
        tag = item.select_one(sel)
        if tag is not None:
            matched[key] = True
        return tag

    def _link(self, item: Tag, matched: dict[str, Any]) -> str | None:
        if "link" in self.select:
            tag = self._one(item, "link", matched)
        elif item.name == "a":
            tag = item
        else:  # the first ordinary link; a rel="license" link points at the licence, not the item
            tag = next((a for a in item.find_all("a", href=True)
                        if "license" not in rel_tokens(a)), None)
        if not isinstance(tag, Tag):
            return None
        href = tag.get("href")
        return href if isinstance(href, str) and href.strip() else None

    def _finish(self, values: dict[str, Any], listing_url: str) -> Candidate | None:
        page_url = values["page_url"]
        metadata: dict[str, Any] = {"listing_url": listing_url}
        if self.detail is not None and page_url:
            self._apply_detail(page_url, values, metadata)
        if values.get("image_choice"):
            metadata["image_choice"] = values["image_choice"]
        image_url = values.get("image_url")
        if not image_url:
            self.notes.add("missing_image", listing_url,
                           "an item has no image (check select.image / detail.image); such items "
                           "are skipped (reported once per run)", once_key="image")
            return None
        key = page_url or image_url
        if key in self.seen_keys:
            return None
        self.seen_keys.add(key)
        return Candidate(
            source_key=key, image_url=image_url, page_url=page_url, title=values.get("title"),
            creator=values.get("creator"), licence_raw=values.get("licence"),
            licence_url=values.get("licence_url"), date=values.get("date"), metadata=metadata)

    def _apply_detail(self, page_url: str, values: dict[str, Any],
                      metadata: dict[str, Any]) -> None:
        assert self.detail is not None
        if page_url in self.seen_keys:
            return  # already yielded; don't fetch its detail page again
        got = self._get(page_url, "detail")
        if got is None:
            return
        final_url, soup = got
        base = page_base(soup, final_url)
        metadata["detail_url"] = final_url
        if "image" in self.detail:
            tag = soup.select_one(self.detail["image"])
            if tag is None:
                self._selector_empty("detail", "image", final_url)
            else:
                url, info = image_of(tag, base)
                if url:
                    values["image_url"], values["image_choice"] = url, info
        for key in ("title", "creator", "date"):
            if key in self.detail:
                tag = soup.select_one(self.detail[key])
                if tag is None:
                    self._selector_empty("detail", key, final_url)
                elif text_of(tag):
                    values[key] = text_of(tag)
        raw, url, hit = licence_from(soup, self.detail.get("licence"), base)
        if "licence" in self.detail and not hit:
            self._selector_empty("detail", "licence", final_url)
        if raw:
            values["licence"] = raw
        if url:
            values["licence_url"] = url


def iter_candidates(source: Mapping[str, Any], fetcher: PageFetcher | None, notes: NoteSink,
                    base_dir: Path) -> Iterator[Candidate]:
    """Yield the Candidates of one validated html source table."""
    del base_dir  # not used by this kind
    if fetcher is None:
        raise SourceError(str(source.get("name", "")), None, "an html source needs a fetcher")
    yield from _Walker(source, fetcher, OnceNotes(notes, str(source.get("name", "")))).run()


KIND = SourceKind(
    name="html",
    keys=KEYS,
    check=check,
    list_candidates=iter_candidates,
    uses_network=True,
    mechanism="HTML listing pages (and item pages), read with CSS selectors",
    # croissant-rai-spec.md, dataCollectionType recommended terms
    collection_type="Web Scraping",
)
