"""Source adapters (placeholder until the adapters land): the kinds a recipe may name."""

from __future__ import annotations

from typing import Any

from collector.errors import RecipeProblem

KINDS = ("json_api", "html", "scans")


def validate_source(table: dict[str, Any], key_prefix: str) -> list[RecipeProblem]:
    """Per-kind checks are added with the adapters; the kind itself is checked by the recipe."""
    return []
