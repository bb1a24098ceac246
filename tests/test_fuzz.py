"""Bad input from the user or a server, fuzzed with hypothesis: recipe loading raises only
RecipeError, URL helpers only CollectorError subclasses, Retry-After parsing never raises, and
the source adapters turn any JSON or HTML answer into candidates or notes, never an uncaught
exception. Derandomized so CI sees the same examples every time."""

from __future__ import annotations

import contextlib
import json
import tomllib
from collections.abc import Iterable, Mapping
from pathlib import Path
from typing import Any

from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from requests.structures import CaseInsensitiveDict

from collector import sources
from collector.config.recipe import parse_recipe
from collector.errors import CollectorError, RecipeError
from collector.fetching.answers import Page, parse_retry_after
from collector.urls import host_key, redact, split_checked

FUZZ = settings(max_examples=150, deadline=None, derandomize=True,
                suppress_health_check=[HealthCheck.too_slow])

# TOML values (TOML 1.0: strings, integers, floats, booleans, dates, arrays, tables).
scalars = st.one_of(st.text(max_size=30), st.integers(-10**20, 10**20),
                    st.floats(allow_nan=True), st.booleans(), st.dates(), st.datetimes())
values = st.recursive(scalars, lambda inner: st.one_of(
    st.lists(inner, max_size=4), st.dictionaries(st.text(max_size=10), inner, max_size=4)),
    max_leaves=10)

KNOWN = {
    "contact": None, "product_token": None, "collection": ["name", "description"],
    "budgets": ["min_interval", "max_connections", "max_attempts", "max_retry_after", "hosts"],
    "network": ["read_timeout", "max_image_bytes", "allow_addresses", "secret_params",
                "headers"],
    "licences": ["allow", "allow_unknown"], "images": ["min_side", "max_pixels",
                                                         "near_duplicates"],
    "stop": ["until", "duration", "max_items"],
}
SOURCE_KEYS = ["name", "kind", "url", "params", "secret_params", "pagination", "fields",
               "listing_pages", "select", "detail", "path", "include", "split", "max_pages"]


def toml_dump(doc: Mapping[str, Any]) -> str:
    """A TOML document for a dict (tables as inline tables; enough for fuzzing)."""
    def value(v: Any) -> str:
        if isinstance(v, bool):
            return "true" if v else "false"
        if isinstance(v, str):
            return json.dumps(v)
        if isinstance(v, float):
            return "nan" if v != v else ("inf" if v > 0 else "-inf") if abs(v) == float(
                "inf") else repr(v)
        if isinstance(v, list):
            return "[" + ", ".join(value(x) for x in v) + "]"
        if isinstance(v, dict):
            return "{" + ", ".join(f"{json.dumps(k)} = {value(x)}" for k, x in v.items()) + "}"
        return v.isoformat() if hasattr(v, "isoformat") else str(v)
    return "\n".join(f"{json.dumps(k)} = {value(v)}" for k, v in doc.items())


@st.composite
def recipes(draw: st.DrawFn) -> dict[str, Any]:
    """Mostly-plausible recipe documents with random values at known keys."""
    doc: dict[str, Any] = {"contact": draw(st.one_of(st.just("me@example.org"), values))}
    for section, keys in KNOWN.items():
        if keys and draw(st.booleans()):
            doc[section] = {k: draw(values) for k in draw(st.lists(st.sampled_from(keys),
                                                                   max_size=3, unique=True))}
    if draw(st.booleans()):
        doc["sources"] = [
            {"name": draw(st.text(max_size=8)),
             "kind": draw(st.sampled_from(["json_api", "html", "scans", "x"])),
             **{k: draw(values) for k in draw(st.lists(st.sampled_from(SOURCE_KEYS),
                                                       max_size=4, unique=True))}}
            for _ in range(draw(st.integers(1, 2)))]
    return doc


@FUZZ
@given(st.text(max_size=300))
def test_random_text_as_a_recipe_raises_only_recipe_error(text: str) -> None:
    """Arbitrary text is a valid recipe or a RecipeError, nothing else."""
    with contextlib.suppress(RecipeError):
        parse_recipe(text, Path("recipe.toml"))


@FUZZ
@given(recipes())
def test_random_values_at_known_recipe_keys_raise_only_recipe_error(doc: dict) -> None:
    """Any value at any known key (sources included) is accepted or reported as a
    RecipeError with at least one problem."""
    text = toml_dump(doc)
    try:
        tomllib.loads(text)
    except tomllib.TOMLDecodeError:
        return  # our tiny dumper cannot write every document; not the code under test
    try:
        parse_recipe(text, Path("recipe.toml"))
    except RecipeError as exc:
        assert exc.problems


@FUZZ
@given(st.one_of(st.text(max_size=80), st.builds(
    lambda s, h, p, q: f"{s}://{h}{p}{q}", st.sampled_from(["http", "https", "ftp", "file",
                                                            "javascript", "HTTP", ""]),
    st.text(max_size=20), st.text(max_size=20), st.text(max_size=20))))
def test_url_helpers_raise_only_collector_errors(url: str) -> None:
    """split_checked/host_key accept an http(s) URL or raise a CollectorError; redact never
    raises."""
    try:
        scheme, host, port = split_checked(url)
        assert scheme in ("http", "https") and host and 0 <= port <= 65535
        assert host_key(url).endswith(f":{port}")
    except CollectorError:
        pass
    shown = redact(url + "&key=s3cr3tvalue", ["key"])
    assert isinstance(shown, str)


@FUZZ
@given(st.one_of(st.none(), st.text(max_size=60), st.from_regex(r"-?[0-9]{1,500}",
                                                                  fullmatch=True)),
       st.floats(0, 4e9))
def test_retry_after_parsing_never_raises_and_never_gives_a_negative_wait(
        value: str | None, now: float) -> None:
    """parse_retry_after returns None or a finite delay >= 0 for anything a server sends
    (RFC 9110 §10.2.3)."""
    wait, note = parse_retry_after(value, now)
    assert wait is None or 0 <= wait < float("inf")
    assert note is None or isinstance(note, str)


class OnePage:
    """A fetcher that answers every request with the same body."""

    def __init__(self, body: bytes, ctype: str) -> None:
        self.body, self.ctype, self.calls = body, ctype, 0

    def get_page(self, url: str, *, purpose: str = "listing", item_id: int | None = None,
                 params: Mapping[str, str] | None = None,
                 headers: Mapping[str, str] | None = None,
                 secret_params: Iterable[str] = (), keep_for: float = 0.0) -> Page:
        self.calls += 1
        return Page(url + f"?n={self.calls}", 200,
                    CaseInsensitiveDict({"Content-Type": self.ctype}), self.body, None)


json_docs = st.recursive(
    st.one_of(st.none(), st.booleans(), st.integers(), st.floats(allow_nan=False),
              st.text(max_size=20)),
    lambda inner: st.one_of(st.lists(inner, max_size=4),
                            st.dictionaries(st.sampled_from(
                                ["items", "id", "image", "title", "next", "media", "href",
                                 "width", "licence", "x"]), inner, max_size=5)),
    max_leaves=25)

JSON_SOURCE = {
    "name": "fuzz", "kind": "json_api", "url": "http://127.0.0.1:9/api",
    "pagination": {"style": "next_url", "next_path": "next", "max_pages": 3},
    "fields": {"items": "items", "id": "id", "title": "title", "licence": "licence",
               "image_candidates": "media", "candidate_url": "href",
               "candidate_width": "width"},
    "detail": {"url": "http://127.0.0.1:9/api/{id}", "fields": {"image_url": "image"}},
}
HTML_SOURCE = {
    "name": "fuzz", "kind": "html", "listing_pages": ["http://127.0.0.1:9/list"], "max_pages": 3,
    "select": {"item": "li, div.tile", "image": "img", "title": ".t", "licence": ".l",
               "next": "a[rel=next]"},
    "detail": {"image": "img.full", "title": "h1"},
}


def drain(source: dict, body: bytes, ctype: str) -> tuple[list, list]:
    """Run an adapter over one answer; return (candidates, notes)."""
    notes: list = []
    cands = list(sources.iter_candidates(source, OnePage(body, ctype), notes.append,
                                         Path(".")))
    return cands, notes


@FUZZ
@given(st.one_of(json_docs.map(lambda d: json.dumps(d).encode()),
                 st.dictionaries(st.just("items"), st.lists(json_docs, max_size=5))
                 .map(lambda d: json.dumps(d).encode()), st.binary(max_size=200)))
def test_json_api_mapping_over_random_answers_gives_candidates_or_notes(body: bytes) -> None:
    """Random JSON (or bytes) as listing and detail answers never raises out of the adapter;
    every candidate has a key and an image URL."""
    cands, notes = drain(JSON_SOURCE, body, "application/json")
    assert all(c.source_key and c.image_url for c in cands)
    assert all(n.kind for n in notes)


tags = st.sampled_from(["li", "div class=tile", "img src=/a.png", "a rel=next href=/n",
                        "img class=full srcset='/b.png 10w, /c.png 2x'", "span class=t",
                        "span class=l", "base href=//x", "picture", "h1", "ul"])
html_docs = st.lists(st.one_of(tags.map(lambda t: f"<{t}>"), tags.map(
    lambda t: f"</{t.split()[0]}>"), st.text(max_size=15)), max_size=40).map("".join)


@FUZZ
@given(st.one_of(html_docs.map(str.encode), st.binary(max_size=300)))
def test_html_parsing_of_random_pages_gives_candidates_or_notes(body: bytes) -> None:
    """Random tag soup (or bytes) as listing and detail pages never raises out of the
    adapter; every candidate has a key and an image URL."""
    cands, notes = drain(HTML_SOURCE, body, "text/html")
    assert all(c.source_key and c.image_url for c in cands)
    assert all(n.kind for n in notes)
