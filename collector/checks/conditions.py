"""Conditions on an item's fields, decided before any image byte is requested.

A condition is a JMESPath expression (https://jmespath.org/specification.html; the library is
already how JSON sources map their fields) evaluated over one item's view (:func:`item_view`):

=================  =====================================================================
``title``          the item's title, or null
``creator``        the creator, or null
``date``           the date as the source wrote it, or null
``year_from``      the first year the date covers (:mod:`collector.checks.dates`), or null
``year_to``        the last year it covers, or null
``licence``        the SPDX id the licence was read as, or null
``licence_text``   the licence as the source wrote it, or null
``licence_url``    the licence URL, or null
``source``         the source's name in the recipe
``page_url``       the item's page
``image_url``      the image's URL
``metadata``       every other field the source mapped (an object)
=================  =====================================================================

The item is kept when the result is true in JMESPath's sense (specification, "Truthy and
falsy": false, null, an empty string, list or object are false; so is a failed comparison with
null). Ordering comparisons (``<``, ``>=``) work on numbers only (same section), which is why
dates come as years: ``year_to < `1900``` keeps items made before 1900; an item whose date is
missing or not understood has null years and does not match such a condition. One function is
added to the standard ones: ``lower(s)`` (a string in lower case; null stays null), for
``contains(lower(title), 'fern')``.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import jmespath
from jmespath import functions
from jmespath.exceptions import (
    ArityError,
    JMESPathError,
    JMESPathTypeError,
    UnknownFunctionError,
    VariadictArityError,
)
from jmespath.parser import ParsedResult

from collector.checks.dates import year_range
from collector.schema import item_condition

__all__ = ["Condition", "compile_condition", "condition_problem", "item_view"]


class _Functions(functions.Functions):
    @functions.signature({"types": ["string", "null"]})
    def _func_lower(self, value: str | None) -> str | None:
        return None if value is None else value.lower()


_OPTIONS = jmespath.Options(custom_functions=_Functions())


@dataclass(frozen=True)
class Condition:
    """A compiled condition and the text it came from (for messages)."""

    text: str
    parsed: ParsedResult

    def holds(self, view: dict[str, Any]) -> bool:
        """Whether the item with this view is kept (JMESPath truthiness). A function given a
        value of the wrong type for this item (``lower(title)`` with no title) does not hold:
        the item lacks what the condition asks about."""
        try:
            return _truthy(self.parsed.search(view, options=_OPTIONS))
        except JMESPathTypeError:
            return False


_SAMPLE = {"source": "s", "title": "t", "creator": "c", "date": "1850", "year_from": 1850,
           "year_to": 1850, "licence": "CC0-1.0", "licence_text": "CC0", "licence_url": "u",
           "page_url": "p", "image_url": "i", "metadata": {}}


def condition_problem(text: Any) -> str | None:
    """Why ``text`` is not a usable condition, or None (the recipe's check of keep_if): not a
    string, not JMESPath, or naming a function that does not exist or with the wrong number
    of arguments (found by trying it on a sample item)."""
    if not isinstance(text, str) or not text.strip():
        return "must be a JMESPath expression in a string, e.g. \"year_to < `1900`\""
    problem = item_condition(text)
    if problem:
        return problem
    try:
        jmespath.compile(text).search(_SAMPLE, options=_OPTIONS)
    except (UnknownFunctionError, ArityError, VariadictArityError) as exc:
        return f"cannot be evaluated: {exc}"
    except JMESPathError:
        pass  # a type error on the sample item only: real items decide
    return None


def compile_condition(text: str) -> Condition:
    """Compile a condition checked by :func:`condition_problem` (raises ValueError otherwise)."""
    problem = condition_problem(text)
    if problem:
        raise ValueError(f"{text!r} {problem}")
    return Condition(text, jmespath.compile(text))


def _truthy(value: Any) -> bool:
    """JMESPath's truthiness (specification, "Truthy and falsy"): 0 is true, unlike Python."""
    if value is None or value is False:
        return False
    if isinstance(value, (str, list, dict)):
        return len(value) > 0
    return True


def item_view(*, source: str, title: str | None, creator: str | None, date: str | None,
              licence: str | None, licence_text: str | None, licence_url: str | None,
              page_url: str | None, image_url: str | None,
              metadata: dict[str, Any] | None) -> dict[str, Any]:
    """The fields a condition sees (the module's table)."""
    years = year_range(date)
    return {"title": title, "creator": creator, "date": date,
            "year_from": years[0] if years else None, "year_to": years[1] if years else None,
            "licence": licence, "licence_text": licence_text, "licence_url": licence_url,
            "source": source, "page_url": page_url, "image_url": image_url,
            "metadata": dict(metadata or {})}
