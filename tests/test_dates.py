"""Dates as archives write them, read as year ranges (collector.checks.dates).

Sources: ISO 8601-1:2019 calendar dates and date-times (YYYY, YYYY-MM, YYYY-MM-DD, with a
time); ISO 8601-2:2019 / the Library of Congress Extended Date/Time Format (EDTF) level 1:
approximate ``~``, uncertain ``?``, unspecified digits ``X`` and ``/`` intervals; the common
catalogue forms "1890s", "c. 1850", "19th century" (a century counted from year 1: the 19th
century is 1801-1900, as dictionaries define it); "c." widened by 5 years is our choice
(common practice, no source).
"""

from __future__ import annotations

import pytest

from collector.checks.dates import year_range

CASES = [
    ("1850", (1850, 1850)),
    ("1850-03", (1850, 1850)),
    ("1850-03-14", (1850, 1850)),
    ("2024-01-05T10:00:00Z", (2024, 2024)),
    ("1910-11", (1910, 1910)),  # ISO: November 1910, not 1910-1911
    ("1890s", (1890, 1899)),
    ("1890's", (1890, 1899)),
    ("1800s", (1800, 1899)),
    ("c. 1850", (1845, 1855)),
    ("ca.1850", (1845, 1855)),
    ("circa 1850", (1845, 1855)),
    ("about 1850", (1845, 1855)),
    ("1850~", (1845, 1855)),  # EDTF level 1 approximate
    ("1850?", (1845, 1855)),  # EDTF level 1 uncertain
    ("1850-1860", (1850, 1860)),
    ("1850–1860", (1850, 1860)),  # en dash
    ("1850 to 1860", (1850, 1860)),
    ("1850/1860", (1850, 1860)),  # ISO 8601 / EDTF interval
    ("1850-60", (1850, 1860)),
    ("185X", (1850, 1859)),  # EDTF level 1 unspecified digit
    ("18XX", (1800, 1899)),
    ("19th century", (1801, 1900)),
    ("1st century", (1, 100)),
    ("before 1900", (0, 1899)),
    ("after 1850", (1851, 9999)),
    ("photographed May 1923", (1923, 1923)),
]


@pytest.mark.parametrize(("text", "expected"), CASES)
def test_understood_forms(text: str, expected: tuple[int, int]) -> None:
    assert year_range(text) == expected


@pytest.mark.parametrize("text", [None, "", "  ", "n.d.", "undated", "unknown",
                                  "1850 or 1870",  # two readings: no guess
                                  "1860-1850",  # a span that ends before it starts
                                  "30th century"])
def test_anything_else_is_not_guessed(text: str | None) -> None:
    assert year_range(text) is None
