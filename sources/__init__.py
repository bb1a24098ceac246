"""Source adapters: turn a recipe's [[sources]] table into Candidates, never downloading images.

Public API::

    KINDS                                    ("json_api", "html", "scans")
    validate_source(table, key_prefix)       -> list[RecipeProblem]
    iter_candidates(source, fetcher, notes, base_dir) -> Iterator[Candidate]
    Candidate, SourceNote, PageFetcher, Page
"""

from __future__ import annotations

from collections.abc import Iterator
from pathlib import Path
from typing import Any

from collector.recipe import did_you_mean
from sources import html_pages, json_api, scans
from sources.base import (
    Candidate,
    NoteSink,
    Page,
    PageFetcher,
    Problems,
    RecipeProblem,
    SourceError,
    SourceNote,
)

__all__ = [
    "KINDS",
    "Candidate",
    "Page",
    "PageFetcher",
    "SourceNote",
    "iter_candidates",
    "validate_source",
]

KINDS = ("json_api", "html", "scans")

_ADAPTERS: dict[str, Any] = {"json_api": json_api, "html": html_pages, "scans": scans}


def validate_source(table: dict[str, Any], key_prefix: str) -> list[RecipeProblem]:
    """Every problem in one [[sources]] table, with key paths like "sources[1].fields.id".

    "name" is checked by collector.recipe (uniqueness needs all sources); "kind" is checked here
    only so this function is useful on its own.
    """
    kind = table.get("kind")
    if kind not in _ADAPTERS:
        problems = Problems("")
        hint = did_you_mean(str(kind), list(KINDS))
        problems.add(f"{key_prefix}.kind", f"must be one of {', '.join(KINDS)}, got {kind!r}{hint}")
        return problems.items
    return _ADAPTERS[kind].validate(table, key_prefix)


def iter_candidates(
    source: dict[str, Any], fetcher: PageFetcher, notes: NoteSink, base_dir: Path
) -> Iterator[Candidate]:
    """Yield the Candidates of one source; source-level problems go to notes, not exceptions.

    Raises SourceError only when the table itself is invalid (validate_source should have caught
    that when the recipe was loaded).
    """
    problems = validate_source(source, "source")
    name = str(source.get("name", "?"))
    if problems:
        detail = "; ".join(f"{p.key_path}: {p.message}" for p in problems)
        raise SourceError(name, None, f"invalid source table ({detail}); fix the recipe")
    yield from _ADAPTERS[source["kind"]].iter_candidates(source, fetcher, notes, Path(base_dir))


__all__ += ["NoteSink", "SourceError"]
