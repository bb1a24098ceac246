"""The recipe's ``${NAME}`` references: which environment variables a recipe needs that are not
set, and which header values would break once filled in. Checked by ``collector check`` (all at
once, with the recipe's own problems) and before a gather sends anything; the value itself is
never shown."""

from __future__ import annotations

import json
import os
from collections.abc import Mapping
from typing import TYPE_CHECKING, Any

from collector.errors import RecipeProblem
from collector.schema import env_names, expand_env, header_value_problem

if TYPE_CHECKING:
    from collector.config.recipe import Recipe


def env_problems(recipe: Recipe, *, unset: bool = True) -> list[RecipeProblem]:
    """A problem for every ``${NAME}`` the recipe uses whose variable is not set (unless
    ``unset`` is false), and for every header whose value, once its variables are filled in,
    holds CR, LF or NUL (a token read from a file with Windows line endings). The problem
    never shows the value."""
    data = {"network": {"headers": recipe.network.headers}, "sources": recipe.sources}
    return env_problems_in(data, str(recipe.path), unset=unset)


def env_places(data: Mapping[str, Any]) -> list[tuple[str, Any]]:
    """(key path, value) of every params/headers value in parsed recipe data, checked or not."""
    network = data.get("network")
    headers = network.get("headers") if isinstance(network, dict) else None
    places = [(f"network.headers.{k}", v) for k, v in headers.items()] \
        if isinstance(headers, dict) else []
    raw_sources = data.get("sources")
    for i, src in enumerate(raw_sources if isinstance(raw_sources, list) else []):
        for table in ("params", "headers"):
            values = src.get(table) if isinstance(src, dict) else None
            if isinstance(values, dict):
                places += [(f"{source_prefix(i, src)}.{table}.{k}", v) for k, v in values.items()]
    return places


def env_problems_in(data: Mapping[str, Any], file: str, *, unset: bool) -> list[RecipeProblem]:
    problems: list[RecipeProblem] = []
    for path, text in env_places(data):
        if not isinstance(text, str):
            continue
        names = env_names(text)
        missing = [name for name in names if name not in os.environ]
        if unset:
            problems += [RecipeProblem(file, path,
                                       f"uses ${{{name}}}, but the environment variable {name} "
                                       "is not set; set it before gathering")
                         for name in missing]
        if names and not missing and ".headers." in path:
            problem = header_value_problem(expand_env(text))
            if problem:
                problems.append(RecipeProblem(
                    file, path,
                    f"{problem} once ${{{names[0]}}} is filled in; remove the line ending "
                    "from the environment variable (was it read from a file with Windows "
                    "line endings?)"))
    return problems


def source_prefix(index: int, table: Any) -> str:
    """How a problem names the ``index``-th (from 0) [[sources]] table: by position from 1,
    and by name when it has one: ``sources[2] ("gallery")``."""
    name = table.get("name") if isinstance(table, dict) else None
    named = f" ({json.dumps(name, ensure_ascii=False)})" if isinstance(name, str) and \
        name.strip() else ""
    return f"sources[{index + 1}]{named}"
