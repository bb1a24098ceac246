"""Conditions on an item's fields (collector.checks.conditions), JMESPath semantics checked
against the JMESPath specification (https://jmespath.org/specification.html): "Truthy and
falsy" (false, null, "", [], {} are false; 0 is true) and comparison operators (ordering only
between numbers; any other ordering is null, so false)."""

from __future__ import annotations

from typing import Any

import pytest

from collector.checks.conditions import compile_condition, condition_problem, item_view


def view(**fields: Any) -> dict[str, Any]:
    base: dict[str, Any] = {"source": "plates", "title": None, "creator": None, "date": None,
                            "licence": None, "licence_text": None, "licence_url": None,
                            "page_url": None, "image_url": None, "metadata": {}}
    return item_view(**{**base, **fields})


def holds(text: str, **fields: Any) -> bool:
    return compile_condition(text).holds(view(**fields))


def test_dates_compare_as_years() -> None:
    assert holds("year_to < `1900`", date="c. 1850")
    assert holds("year_to < `1900`", date="1890s")  # 1899 < 1900: kept
    assert not holds("year_to < `1890`", date="1890s")
    assert holds("year_from >= `1800` && year_to <= `1899`", date="1800s")


def test_an_unread_date_does_not_pass_a_date_condition() -> None:
    """null < 1900 is null (specification, comparison operators): the item is not kept."""
    assert not holds("year_to < `1900`", date="n.d.")
    assert not holds("year_to < `1900`", date=None)
    assert holds("year_to == null", date="n.d.")


def test_truthiness_follows_the_specification() -> None:
    assert not holds("metadata.missing")  # null
    assert not holds("title", title="")  # empty string
    assert not holds("metadata.list", metadata={"list": []})
    assert not holds("metadata.obj", metadata={"obj": {}})
    assert holds("metadata.n", metadata={"n": 0})  # 0 is true in JMESPath, unlike Python


def test_text_fields_licence_and_metadata() -> None:
    assert holds("contains(lower(title), 'fern')", title="Fern Plate XII")
    assert not holds("contains(lower(title), 'fern')", title=None)
    assert holds("licence == 'CC0-1.0'", licence="CC0-1.0")
    assert holds("metadata.habitat == 'shaded bank'", metadata={"habitat": "shaded bank"})
    assert holds("source == 'plates'")


@pytest.mark.parametrize("text", ["year_to <", "title ==", "", "   ", 3])
def test_a_broken_condition_is_explained(text: Any) -> None:
    problem = condition_problem(text)
    assert problem is not None
    assert "JMESPath expression" in problem
