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
        "pagination": {"style": "page", "param": "page", "start": 1, "total_path": "meta.total"},
        "fields": {"items": "results", "id": "id", "image_url": "image.full"},
    }
    table.update(over)
    return table


def html_source(**over: Any) -> dict[str, Any]:
    """A valid html table, with overrides."""
    table: dict[str, Any] = {
        "name": "gallery", "kind": "html", "start_urls": ["https://archive.example.org/g/"],
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


def problems(table: dict[str, Any], prefix: str = "sources[1]") -> dict[str, str]:
    """key_path -> message for every problem found."""
    return {p.key_path: p.message for p in sources.validate_source(table, prefix)}


def test_valid_tables_of_every_kind_have_no_problems() -> None:
    """Well-formed tables of the three kinds validate cleanly (TOML dates accepted)."""
    assert {"html", "json_api", "scans"} <= set(sources.builtin_kind_names())
    for table in (json_source(), html_source(), scans_source()):
        assert problems(table) == {}


def test_unknown_key_suggests_the_close_one() -> None:
    """A misspelt key is rejected with a "did you mean" suggestion."""
    got = problems(json_source(paginaton={"style": "none"}))
    assert "did you mean 'pagination'" in got["sources[1].paginaton"]


def test_cursor_style_needs_cursor_path_and_param() -> None:
    """style = "cursor" without cursor_path/cursor_param names both missing keys."""
    got = problems(json_source(pagination={"style": "cursor"}))
    assert set(got) == {"sources[1].pagination.cursor_path", "sources[1].pagination.cursor_param"}
    assert 'style = "cursor"' in got["sources[1].pagination.cursor_path"]


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
    """cursor_param under style = "page" is pointed out as unused."""
    got = problems(json_source(pagination={"style": "page", "cursor_param": "c"}))
    assert "only with cursor" in got["sources[1].pagination.cursor_param"]


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


def test_html_start_urls_must_be_a_list_of_http_urls() -> None:
    """A bare string for start_urls and a non-http entry are both reported."""
    assert "must be a list" in problems(html_source(start_urls="https://x.example/"))[
        "sources[1].start_urls"]
    got = problems(html_source(start_urls=["file:///etc/passwd"]))
    assert "http" in got["sources[1].start_urls[0]"]


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
