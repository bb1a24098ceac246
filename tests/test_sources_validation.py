"""Source table validation: broken [[sources]] tables give precise, actionable problems."""

from __future__ import annotations

import datetime
from typing import Any

import pytest

from collector import sources
from collector.errors import SourceError


def json_source(**over: Any) -> dict[str, Any]:
    """A valid json_api table, with overrides."""
    table: dict[str, Any] = {
        "name": "api", "kind": "json_api", "url": "https://archive.example.org/api/items",
        "params": {"per_page": "20", "key": "${FERN_KEY}"}, "secret_params": ["key"],
        "pagination": {"style": "page", "param": "page", "start": 1, "total_count": "meta.total"},
        "fields": {"items": "results", "id": "id", "image_url": "image.full"},
    }
    table.update(over)
    return table


def html_source(**over: Any) -> dict[str, Any]:
    """A valid html table, with overrides."""
    table: dict[str, Any] = {
        "name": "gallery", "kind": "html", "listing_pages": ["https://archive.example.org/g/"],
        "select": {"item": "li.tile", "image": "img", "next": "a[rel=next]"},
    }
    table.update(over)
    return table


def scans_source(**over: Any) -> dict[str, Any]:
    """A valid scans table, with overrides."""
    table: dict[str, Any] = {"name": "scanner", "kind": "scans", "path": "scans",
                             "date": datetime.date(2026, 3, 1), "split": {"min_area": 2000}}
    table.update(over)
    return table


def oai_source(**over: Any) -> dict[str, Any]:
    """A valid oai_pmh table, with overrides."""
    table: dict[str, Any] = {"name": "feed", "kind": "oai_pmh",
                             "url": "https://archive.example.org/oai", "set": "herbarium",
                             "namespaces": {"mods": "http://www.loc.gov/mods/v3"},
                             "fields": {"title": "mods:titleInfo/mods:title"}}
    table.update(over)
    return table


def problems(table: dict[str, Any], prefix: str = "sources[1]") -> dict[str, str]:
    """key_path -> message for every problem found."""
    return {p.key_path: p.message for p in sources.validate_source(table, prefix)}


def test_valid_tables_of_every_kind_have_no_problems() -> None:
    """Well-formed tables of the three kinds validate cleanly (TOML dates accepted)."""
    assert sources.builtin_kind_names() == ["html", "iiif", "json_api", "oai_pmh", "scans"]
    for table in (json_source(), html_source(), scans_source(), oai_source(), iiif_source()):
        assert problems(table) == {}


def test_unknown_key_suggests_the_close_one() -> None:
    """A misspelt key is rejected with a "did you mean" suggestion."""
    got = problems(json_source(paginaton={"style": "none"}))
    assert "did you mean 'pagination'" in got["sources[1].paginaton"]


def test_cursor_style_needs_next_cursor_and_param() -> None:
    """style = "cursor" without next_cursor/send_cursor_as names both missing keys."""
    got = problems(json_source(pagination={"style": "cursor"}))
    assert set(got) == {"sources[1].pagination.next_cursor",
                        "sources[1].pagination.send_cursor_as"}
    assert 'style = "cursor"' in got["sources[1].pagination.next_cursor"]


# Keys renamed to names of our own: an old name is an error naming the new one, never an alias.
RENAMED = [
    (html_source, "listing_pages", "start_urls", None, ["https://archive.example.org/g/"]),
    (json_source, "next_cursor", "cursor_path", "cursor", "paging.next"),
    (json_source, "send_cursor_as", "cursor_param", "cursor", "cursor"),
    (json_source, "send_offset_as", "offset_param", "offset", "offset"),
    (json_source, "send_limit_as", "limit_param", "offset", "limit"),
    (json_source, "total_count", "total_path", "page", "meta.total"),
]


@pytest.mark.parametrize(("make", "new", "old", "style", "value"), RENAMED)
def test_old_key_names_are_refused_with_the_new_name(make: Any, new: str, old: str,
                                                     style: str | None, value: Any) -> None:
    """A recipe still using an old key gets exactly one problem there, naming the new key."""
    if style is None:  # a top-level key of the source table
        table = make()
        table[old] = table.pop(new)
        where = f"sources[1].{old}"
    else:
        pagination = {"style": style, "next_cursor": "n", "send_cursor_as": "c"} \
            if style == "cursor" else {"style": style}
        pagination.pop(new, None)
        pagination[old] = value
        table = make(pagination=pagination)
        where = f"sources[1].pagination.{old}"
    got = problems(table)
    assert list(got) == [where]  # no "required key is missing" for the new name as well
    assert got[where] == f"is the old name of {new}: rename the key to {new} " \
        "(the value stays the same)"


def test_unknown_pagination_style_is_rejected_with_suggestion() -> None:
    """An unknown pagination style lists the known ones and suggests the closest."""
    got = problems(json_source(pagination={"style": "cursors"}))
    assert "did you mean 'cursor'" in got["sources[1].pagination.style"]


def test_bad_jmespath_is_reported_at_validation() -> None:
    """A field expression that JMESPath cannot compile is named with its key path."""
    got = problems(json_source(fields={"items": "results[", "id": "id", "image_url": "u"}))
    assert "not a valid JMESPath" in got["sources[1].fields.items"]


def test_missing_required_fields_are_named() -> None:
    """fields without id and without any image mapping give two problems."""
    got = problems(json_source(fields={"items": "results"}))
    assert "sources[1].fields.id" in got
    assert "image_candidates" in got["sources[1].fields.image_url"]


def test_non_http_url_is_rejected() -> None:
    """Only http and https endpoint URLs are accepted."""
    got = problems(json_source(url="ftp://archive.example.org/items"))
    assert "http://" in got["sources[1].url"]


def test_wrong_types_are_reported() -> None:
    """A number where a table is expected, and a string for max_pages, are type errors."""
    got = problems(json_source(params=5, pagination={"style": "page", "max_pages": "ten"}))
    assert got["sources[1].params"].startswith("must be a table")
    assert got["sources[1].pagination.max_pages"].startswith("must be a whole number")


def test_key_of_another_style_is_flagged() -> None:
    """send_cursor_as under style = "page" is pointed out as unused."""
    got = problems(json_source(pagination={"style": "page", "send_cursor_as": "c"}))
    assert "only with cursor" in got["sources[1].pagination.send_cursor_as"]


def test_bad_pick_and_detail_template_placeholder() -> None:
    """pick must be largest or label:<name>; detail.url placeholders must be fields."""
    table = json_source(
        fields={"items": "r", "id": "id", "image_candidates": "m", "candidate_url": "h",
                "pick": "biggest"},
        detail={"url": "https://archive.example.org/api/items/{uid}", "fields": {}})
    got = problems(table)
    assert "label:<name>" in got["sources[1].fields.pick"]
    assert "{uid}" in got["sources[1].detail.url"]


def test_secret_param_must_name_a_param() -> None:
    """secret_params entries must be names of params."""
    got = problems(json_source(secret_params=["token"]))
    assert '"token"' in got["sources[1].secret_params[0]"]


def test_html_requires_item_selector_and_valid_css() -> None:
    """html needs select.item; a selector soupsieve cannot parse is named."""
    got = problems(html_source(select={"image": "img[", "title": "h2"}))
    assert "sources[1].select.item" in got
    assert "not a valid CSS selector" in got["sources[1].select.image"]


def test_html_listing_pages_must_be_a_list_of_http_urls() -> None:
    """A bare string for listing_pages and a non-http entry are both reported."""
    assert "must be a list" in problems(html_source(listing_pages="https://x.example/"))[
        "sources[1].listing_pages"]
    got = problems(html_source(listing_pages=["file:///etc/passwd"]))
    assert "http" in got["sources[1].listing_pages[0]"]


def test_scans_split_keys_and_values_are_checked() -> None:
    """Unknown split keys, negative padding and a bad date are all reported."""
    got = problems(scans_source(date="March 2026",
                                split={"padding": -2, "deskw": True, "min_solidity": 2.0}))
    assert "did you mean 'deskew'" in got["sources[1].split.deskw"]
    assert "must be 0 or more" in got["sources[1].split.padding"]
    assert "between 0 and 1" in got["sources[1].split.min_solidity"]
    assert "ISO 8601" in got["sources[1].date"]


def test_scans_requires_path() -> None:
    """scans without path names the missing key."""
    table = scans_source()
    del table["path"]
    assert "sources[1].path" in problems(table)


def test_unknown_kind_is_reported_with_suggestion() -> None:
    """An unknown kind lists the known kinds."""
    got = problems({"name": "x", "kind": "jsonapi"}, "sources[0]")
    assert "did you mean 'json_api'" in got["sources[0].kind"]


def test_iter_candidates_refuses_an_invalid_table() -> None:
    """Running an invalid table raises SourceError listing its problems."""
    with pytest.raises(SourceError, match=r"fields\.id"):
        list(sources.iter_candidates(json_source(fields={"items": "r", "image_url": "u"}),
                                     None, print, "."))  # type: ignore[arg-type]


def test_oai_pmh_keys_and_paths_are_checked() -> None:
    """A non-http url, an undeclared prefix, a bad pattern and a misspelt key, each named."""
    got = problems(oai_source(url="ftp://x.org/oai", image_pattern="(",
                              fields={"title": "marc:datafield"}, incremantal=True))
    assert "http" in got["sources[1].url"]
    assert "marc" in got["sources[1].fields.title"]
    assert "regular expression" in got["sources[1].image_pattern"]
    assert "did you mean 'incremental'" in got["sources[1].incremantal"]


def iiif_source(**over: Any) -> dict[str, Any]:
    """A valid iiif table, with overrides."""
    table: dict[str, Any] = {"name": "museum", "kind": "iiif",
                             "url": "https://archive.example.org/iiif/collection.json",
                             "target_size": 1024, "max_depth": 2, "language": "de"}
    table.update(over)
    return table


def test_iiif_table_is_valid_and_each_check_names_its_key() -> None:
    """A good iiif table has no problems; bad values name their own key."""
    assert problems(iiif_source()) == {}
    assert problems({"name": "m", "kind": "iiif", "url": "https://a.example.org/m.json"}) == {}
    got = problems(iiif_source(url="ftp://archive.example.org/m.json", target_size=-1,
                               max_manifests=0, first_canvas_only="yes", max_depth=-2,
                               level0_sizes="nearest"))
    assert set(got) == {"sources[1].url", "sources[1].target_size", "sources[1].max_manifests",
                        "sources[1].first_canvas_only", "sources[1].max_depth",
                        "sources[1].level0_sizes"}
    assert "did you mean 'target_size'" in problems(iiif_source(target_sise=5))[
        "sources[1].target_sise"]
    assert "target_size above 0" in problems(iiif_source(target_size=0, upscale=True))[
        "sources[1].upscale"]
    assert "sources[1].url" in problems({"name": "m", "kind": "iiif"})
