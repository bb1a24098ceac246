"""Hostile answers at the fetcher's edge: values a server controls never raise past it."""

from __future__ import annotations

import pytest
from requests.structures import CaseInsensitiveDict

from collector.fetching.answers import MAX_RETRY_DELAY, Page, parse_retry_after


def test_a_retry_after_of_hundreds_of_digits_is_a_long_finite_delay_not_a_crash() -> None:
    """Retry-After with 400 or 5000 digits parses to a finite capped delay (RFC 9110 §10.2.3:
    delay-seconds = 1*DIGIT, no upper bound, so the client must bound it itself)."""
    for digits in (400, 5000):
        wait, note = parse_retry_after("9" * digits, now=0.0)
        assert wait == MAX_RETRY_DELAY and note is None
    assert parse_retry_after("315360000", now=0.0) == (315360000.0, None)  # 10 years, as is


def test_a_page_with_an_unknown_charset_label_decodes_as_utf8() -> None:
    """Content-Type "charset=x-no-such-charset" (or a non-text codec such as zlib) falls back
    to UTF-8 instead of raising LookupError out of the source's thread."""
    for label in ("x-no-such-charset", "zlib", "hex"):
        page = Page("http://127.0.0.1/", 200, CaseInsensitiveDict(),
                    '{"a": "café"}'.encode(), label)
        assert page.text == '{"a": "café"}'
        assert page.json() == {"a": "café"}


def test_json_nested_100000_deep_is_a_value_error_not_a_recursion_error() -> None:
    """Page.json keeps its contract (ValueError on bad JSON) for 100,000 nested arrays, so the
    json_api adapter turns it into a bad_json note."""
    page = Page("http://127.0.0.1/", 200, CaseInsensitiveDict(),
                b"[" * 100_000 + b"]" * 100_000, None)
    with pytest.raises(ValueError, match="nested too deeply"):
        page.json()
