"""Dates as archives write them, read as ranges of years: for conditions that compare dates.

An archive's date field is rarely an ISO date. It says "1890s", "c. 1850", "1850-1860",
"19th century" or "n.d.". Each form this module understands becomes a closed range of years
(earliest, latest); anything else is None, never a guess. Understood, with what each means:

=============================  ============================================================
``1850``                        1850-1850
``1850-03``, ``1850-03-14``     1850-1850 (ISO 8601 calendar dates and date-times; only the
                                year is kept; "1910-11" is November 1910, as ISO reads it)
``1850-60``                     1850-1860 (a span whose end shares the start's century)
``1850s``, ``1850's``           1850-1859 (a decade)
``1800s``                       1800-1899 (as commonly meant; never the decade 1800-1809)
``c. 1850``, ``ca. 1850``,      1845-1855: "circa" widened by 5 years each way (our choice,
``circa 1850``, ``about 1850``, common practice, no source); EDTF's approximate ``1850~``
``1850?``, ``1850~``            and uncertain ``1850?`` (ISO 8601-2:2019 / EDTF level 1) too
``1850-1860``, ``1850–1860``,   1850-1860 (an inclusive span; the en dash is what typeset
``1850 to 1860``, ``1850/1860`` catalogues write; ``/`` is the ISO 8601 / EDTF interval)
``185X``, ``18XX``              1850-1859, 1800-1899 (EDTF level 1 unspecified digits)
``19th century``                1801-1900 (a century counted from year 1, as dictionaries
                                define it; "1800s" is the other reading)
``before 1900``, ``after 1850`` 0-1899 and 1851-9999 (open ends kept inside 4 digits)
=============================  ============================================================

A date with words around it ("photographed 1923") is read when exactly one of these forms
appears in it; two different ones ("1850 or 1870") give None.
"""

from __future__ import annotations

import re

__all__ = ["YearRange", "year_range"]

YearRange = tuple[int, int]
CIRCA_YEARS = 5  # "c. 1850" -> 1845-1855 (our choice, no source)

_DASH = r"\s*(?:-|–|—|to|/)\s*"
_FORMS: list[tuple[re.Pattern[str], str]] = [
    # ISO 8601 calendar dates first: "1910-11" is November 1910, not 1910-1911
    (re.compile(r"(?<![\d-])(\d{4})-(?:0[1-9]|1[0-2])(?:-\d{2})?(?:T[\d:.]+(?:Z|[+-][\d:]+)?)?"
                r"(?![\d-])"), "year"),
    (re.compile(r"(?<!\d)(\d{4})" + _DASH + r"(\d{4})(?!\d)"), "span"),
    (re.compile(r"(?<!\d)(\d{2})(\d{2})" + _DASH + r"(\d{2})(?!\d)"), "short_span"),
    (re.compile(r"\b(\d{1,2})(?:st|nd|rd|th)[\s-]+century\b", re.I), "century"),
    (re.compile(r"(?:\b(?:c|ca|circa)\.?\s*|\babout\s+)(\d{4})(?!\d)", re.I), "circa"),
    (re.compile(r"(?<!\d)(\d{4})[~?%](?![\d])"), "circa"),
    (re.compile(r"(?<!\d)(\d{2})00'?s\b", re.I), "hundred"),
    (re.compile(r"(?<!\d)(\d{3})0'?s\b", re.I), "decade"),
    (re.compile(r"(?<![\dX])(\d{3})X(?![\dX])"), "decade"),
    (re.compile(r"(?<![\dX])(\d{2})XX(?![\dX])"), "hundred"),
    (re.compile(r"\bbefore\s+(\d{4})(?!\d)", re.I), "before"),
    (re.compile(r"\bafter\s+(\d{4})(?!\d)", re.I), "after"),
    (re.compile(r"(?<![\d-])(\d{4})(?:-\d{2}(?:-\d{2})?)?(?![\d])"), "year"),
]


def _range(kind: str, groups: tuple[str, ...]) -> YearRange | None:
    numbers = [int(g) for g in groups]
    if kind == "span":
        low, high = numbers
    elif kind == "short_span":  # "1850-60": the second year shares the first's century
        low, high = numbers[0] * 100 + numbers[1], numbers[0] * 100 + numbers[2]
    elif kind == "century":
        if not 1 <= numbers[0] <= 21:
            return None
        low, high = (numbers[0] - 1) * 100 + 1, numbers[0] * 100
    elif kind == "circa":
        low, high = numbers[0] - CIRCA_YEARS, numbers[0] + CIRCA_YEARS
    elif kind == "decade":
        low, high = numbers[0] * 10, numbers[0] * 10 + 9
    elif kind == "hundred":
        low, high = numbers[0] * 100, numbers[0] * 100 + 99
    elif kind == "before":
        low, high = 0, numbers[0] - 1
    elif kind == "after":
        low, high = numbers[0] + 1, 9999
    else:
        low = high = numbers[0]
    return (low, high) if low <= high else None


def year_range(text: str | None) -> YearRange | None:
    """The years a date text covers (inclusive), or None when it is not understood (see the
    module's table). Pure; never guesses between two readings."""
    if not text or not text.strip():
        return None
    rest = text.strip()
    found: list[YearRange] = []
    for pattern, kind in _FORMS:
        for match in pattern.finditer(rest):
            years = _range(kind, match.groups())
            if years is None:
                return None
            found.append(years)
        rest = pattern.sub(" ", rest)  # a span's years are not read again as single years
    distinct = set(found)
    return distinct.pop() if len(distinct) == 1 else None
