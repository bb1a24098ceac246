"""Pixel rules: the recipe's ``[[pixel_rules]]`` over the colour and tone facts of a file.

A rule names requirements on the facts :mod:`collector.checks.colour_facts` computed at ingest
and the ledger keeps (``files.greyscale``, ``brightness``, ``contrast``, ``colourfulness``,
``sharpness``, ``background_share``, ``colours``). A stored file that fails a requirement is
*set aside*: kept in the store, left out of releases, under the name of the first rule (in
recipe order) it fails, with the reason in the recipe's words. Pure: no I/O; the ingest and
``collector apply-rules`` (collector.run.set_aside) call :meth:`PixelRules.verdict`.

==========================  ===================================================================
``name``                    required: what the ledger records (``files.set_aside``); unique
``sources``                 the sources the rule is for, by name (default: every source)
``greyscale``               ``false``: only pictures in colour; ``true``: only greyscale ones
``hues``                    ``[from, to]`` in degrees of HSV hue (red 0, green 120, blue 240);
                            a range whose ``from`` is larger wraps through 0: ``[330, 30]``
``min_hue_share``           at least this share (0-1) of the picture in the ``hues``
``max_hue_share``           at most this share of the picture in the ``hues``
``min_colourfulness``       Hasler and Süsstrunk's M at least this (their scale: 15 slightly,
                            33 moderately, 45 averagely, 59 quite, 82 highly colourful)
``max_colourfulness``       M at most this
``min_sharpness``           variance of the Laplacian at least this (blurred or empty: low)
``max_background_share``    the largest flat region covers at most this share (0-1)
``min_brightness``,         mean CIELAB L* (0 black - 100 white) within these bounds
``max_brightness``
``min_contrast``,           standard deviation of L* within these bounds
``max_contrast``
==========================  ===================================================================

The share of the picture in a hue range is the sum of the shares of its dominant colours
whose hue lies in the range; a dominant colour whose CIELAB chroma is under
``colour_facts.GREY_CHROMA`` has no hue (HSV gives grey the hue 0, red's) and is never in a
range. A file without the facts a requirement needs (stored before the facts were kept, or
gathered with ``dominant_colours = 0``) is not judged by that requirement: the verdict names
the rules it could not decide, and it is never set aside for a fact it lacks.
"""

from __future__ import annotations

import json
import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any, NamedTuple

from collector.checks.colour_facts import GREY_CHROMA
from collector.schema import (
    Key,
    Problems,
    at_least,
    between,
    check_table,
    describe,
    did_you_mean,
)

__all__ = ["RULE_KEYS", "PixelRules", "Verdict", "check_pixel_rules", "hue_share",
           "in_hues"]

_SHARE = between(0, 1)
RULE_KEYS: dict[str, Key] = {
    "name": Key("str", required=True, hint='a short name, e.g. name = "no-greyscale"'),
    "sources": Key("list[str]"),
    "greyscale": Key("bool"),
    "hues": Key("list"),
    "min_hue_share": Key("float", check=_SHARE),
    "max_hue_share": Key("float", check=_SHARE),
    "min_colourfulness": Key("float", check=at_least(0)),
    "max_colourfulness": Key("float", check=at_least(0)),
    "min_sharpness": Key("float", check=at_least(0)),
    "max_background_share": Key("float", check=_SHARE),
    "min_brightness": Key("float", check=between(0, 100)),
    "max_brightness": Key("float", check=between(0, 100)),
    "min_contrast": Key("float", check=between(0, 100)),
    "max_contrast": Key("float", check=between(0, 100)),
}
# Bounds on one fact: recipe key -> (ledger column, at least (True) or at most, in words).
_BOUNDS: dict[str, tuple[str, bool, str]] = {
    "min_colourfulness": ("colourfulness", True, "colourfulness"),
    "max_colourfulness": ("colourfulness", False, "colourfulness"),
    "min_sharpness": ("sharpness", True, "sharpness"),
    "max_background_share": ("background_share", False, "background share"),
    "min_brightness": ("brightness", True, "brightness"),
    "max_brightness": ("brightness", False, "brightness"),
    "min_contrast": ("contrast", True, "contrast"),
    "max_contrast": ("contrast", False, "contrast"),
}
_PAIRS = (("min_colourfulness", "max_colourfulness"), ("min_brightness", "max_brightness"),
          ("min_contrast", "max_contrast"), ("min_hue_share", "max_hue_share"))
REQUIREMENTS = ("greyscale", "min_hue_share", "max_hue_share", *_BOUNDS)


def _hues_problem(value: Any) -> str | None:
    ok = (isinstance(value, list) and len(value) == 2
          and all(isinstance(v, int | float) and not isinstance(v, bool) for v in value))
    if not ok:
        return f"must be two numbers [from, to] in degrees, e.g. [70, 170], got {describe(value)}"
    if not all(0 <= v <= 360 for v in value):
        return f"must be degrees from 0 to 360, got {value!r}"
    return None


def _rule_problems(table: dict[str, Any], path: str, sources: Sequence[str],
                   problems: Problems) -> None:
    """The checks across the keys of one rule (each key's own check is RULE_KEYS')."""
    if not any(k in table for k in REQUIREMENTS):
        problems.add(path, "has no requirement; give at least one of " + ", ".join(REQUIREMENTS))
    if isinstance(table.get("hues"), list):  # another type: check_table said so
        problem = _hues_problem(table["hues"])
        if problem:
            problems.add(f"{path}.hues", problem)
    if "hues" in table and "min_hue_share" not in table and "max_hue_share" not in table:
        problems.add(f"{path}.hues", "needs min_hue_share or max_hue_share: how much of "
                     "the picture must (or may) be in these hues, e.g. min_hue_share = 0.3")
    for key in ("min_hue_share", "max_hue_share"):
        if key in table and "hues" not in table:
            problems.add(f"{path}.{key}", "needs hues = [from, to]: the hue range (degrees) "
                         "the share is measured in")
    for low, high in _PAIRS:
        if (isinstance(table.get(low), int | float) and isinstance(table.get(high), int | float)
                and table[low] > table[high]):
            problems.add(f"{path}.{high}", f"must not be smaller than {low} ({table[low]!r})")
    if table.get("sources") == []:
        problems.add(f"{path}.sources", "must name at least one source (leave the key out for "
                     "a rule on every source)")
    known = f"the recipe's sources: {', '.join(sources)}" if sources else "the recipe has none"
    for i, name in enumerate(table.get("sources") or []):
        if isinstance(name, str) and name not in sources:
            problems.add(f"{path}.sources[{i}]", f"{name!r} names no source"
                         f"{did_you_mean(name, sources)}; {known}")


def check_pixel_rules(raw: Any, sources: Sequence[str], problems: Problems
                      ) -> tuple[dict[str, Any], ...]:
    """Check the recipe's ``pixel_rules`` (an array of tables) against :data:`RULE_KEYS` and
    the recipe's source names; every problem goes to ``problems`` with its key path. Returns
    the rule tables as written (the caller stops when ``problems`` holds any)."""
    if not isinstance(raw, list) or not all(isinstance(t, dict) for t in raw):
        problems.add("pixel_rules", "must be an array of tables written as [[pixel_rules]]")
        return ()
    names: set[str] = set()
    for i, table in enumerate(raw):
        path = f"pixel_rules[{i + 1}]"
        checked = check_table(table, RULE_KEYS, path, problems)
        name = checked.get("name")
        if isinstance(name, str):
            if not name.strip() or any(ord(c) < 32 or c == "\x7f" for c in name):
                problems.add(f"{path}.name", "must be a short name without control characters")
            elif name in names:
                problems.add(f"{path}.name", f"{name!r} is used by an earlier rule; names "
                             "must be unique (the ledger records which rule set a file aside)")
            names.add(name)
        _rule_problems(table, path, sources, problems)
    return tuple(dict(t) for t in raw)


def in_hues(hue: float, hues: Sequence[float]) -> bool:
    """Whether ``hue`` (degrees) lies in ``[from, to]``, going up from ``from`` and through
    360 = 0 when ``from`` is larger (``[330, 30]`` holds the reds); ``[0, 360]`` is every hue."""
    start, end = float(hues[0]), float(hues[1])
    if end - start >= 360:
        return True
    return (hue - start) % 360 <= (end - start) % 360


def hue_share(colours: Sequence[Mapping[str, Any]], hues: Sequence[float]) -> float:
    """The share of a picture in a hue range: the dominant colours (``{"lab", "share",
    "hue"}`` as the ledger keeps them) whose hue is in ``hues``; grey colours (chroma under
    GREY_CHROMA) have no hue."""
    total = 0.0
    for c in colours:
        lab = c.get("lab") or (0, 0, 0)
        if math.hypot(float(lab[1]), float(lab[2])) >= GREY_CHROMA and in_hues(
                float(c.get("hue") or 0.0), hues):
            total += float(c.get("share") or 0.0)
    return total


class Verdict(NamedTuple):
    """What the rules say of one file: the first rule it fails (None: none) and why, in the
    recipe's words (``greyscale = false, but the picture is greyscale``), and the rules that
    could not be decided for lack of facts."""

    rule: str | None
    detail: str | None
    undecided: tuple[str, ...] = ()

    def columns(self) -> dict[str, Any]:
        """The ledger ``files`` columns of this verdict."""
        return {"set_aside": self.rule, "set_aside_detail": self.detail}


def _number(value: Any) -> float | None:
    return None if value is None else float(value)


def _colours(value: Any) -> list[dict[str, Any]] | None:
    if value is None:
        return None
    if isinstance(value, str):
        try:
            value = json.loads(value)
        except ValueError:
            return None
    return value if isinstance(value, list) else None


@dataclass(frozen=True)
class PixelRule:
    """One checked ``[[pixel_rules]]`` table."""

    table: Mapping[str, Any]

    @property
    def name(self) -> str:
        return str(self.table["name"])

    def applies_to(self, source: str | None) -> bool:
        """Whether the rule is for files of ``source`` (None: a file no item explains yet)."""
        wanted = self.table.get("sources")
        return not wanted or source in wanted

    def failure(self, facts: Mapping[str, Any]) -> tuple[str | None, bool]:
        """(why the file fails this rule or None, whether any requirement was decided)."""
        decided = False
        t = self.table
        if "greyscale" in t and facts.get("greyscale") is not None:
            decided = True
            if bool(facts["greyscale"]) != t["greyscale"]:
                return (f"greyscale = {str(t['greyscale']).lower()}, but the picture is "
                        + ("greyscale" if facts["greyscale"] else "in colour")), True
        colours = _colours(facts.get("colours"))
        if "hues" in t and colours is not None:
            decided = True
            share = hue_share(colours, t["hues"])
            hues = f"[{t['hues'][0]:g}, {t['hues'][1]:g}]"
            if "min_hue_share" in t and share < t["min_hue_share"]:
                return (f"min_hue_share = {t['min_hue_share']:g} in hues = {hues}, but "
                        f"{share:.2f} of the picture is in those hues"), True
            if "max_hue_share" in t and share > t["max_hue_share"]:
                return (f"max_hue_share = {t['max_hue_share']:g} in hues = {hues}, but "
                        f"{share:.2f} of the picture is in those hues"), True
        for key, (column, lower_bound, words) in _BOUNDS.items():
            value = _number(facts.get(column))
            if key not in t or value is None:
                continue
            decided = True
            if (value < t[key]) if lower_bound else (value > t[key]):
                return f"{key} = {t[key]:g}, but the {words} is {value:.4g}", True
        return None, decided


class PixelRules:
    """The recipe's pixel rules, in recipe order (empty: nothing is ever set aside)."""

    def __init__(self, tables: Sequence[Mapping[str, Any]] = ()) -> None:
        self.rules = tuple(PixelRule(t) for t in tables)

    def __bool__(self) -> bool:
        return bool(self.rules)

    def verdict(self, source: str | None, facts: Mapping[str, Any]) -> Verdict:
        """The verdict on a file of ``source`` with these facts (a ``files`` row or
        ``ColourFacts.columns()``): the first rule, in recipe order, that it fails."""
        undecided: list[str] = []
        for rule in self.rules:
            if not rule.applies_to(source):
                continue
            why, decided = rule.failure(facts)
            if why is not None:
                return Verdict(rule.name, why, tuple(undecided))
            if not decided:
                undecided.append(rule.name)
        return Verdict(None, None, tuple(undecided))
