"""The README stays true: its recipes validate, its command reference and ledger schema
match the program."""

from __future__ import annotations

import re
from pathlib import Path

import pytest

from collector import sources
from collector.cli import app
from collector.config.recipe import parse_recipe
from collector.storage.ledger import Ledger

README = (Path(__file__).parent.parent / "README.md").read_text(encoding="utf-8")
RECIPES = re.findall(r"```toml\n(.*?)```", README, flags=re.S)


def test_readme_starts_with_one_paragraph_stating_the_job() -> None:
    """The first paragraph after the title names the user, the need and what the tool does."""
    first = README.split("\n\n")[1]
    assert "curate your own image dataset" in first and "ledger" in first


@pytest.mark.parametrize("text", RECIPES, ids=[f"recipe{i}" for i in range(len(RECIPES))])
def test_every_readme_recipe_validates(text: str) -> None:
    """Each complete recipe shown in the README passes `collector check`'s validation."""
    recipe = parse_recipe(text, Path("README.md"))
    assert recipe.sources, "README recipes show at least one source"


def test_readme_shows_one_recipe_per_source_kind() -> None:
    """The guide has an example recipe for every built-in source kind."""
    kinds = {s["kind"] for text in RECIPES for s in parse_recipe(text, Path("r")).sources}
    assert kinds == set(sources.builtin_kind_names())


def test_command_reference_lists_every_command() -> None:
    """Every CLI command appears in the README's command reference table."""
    names = [c.name or c.callback.__name__ for c in app.registered_commands]
    assert {"init", "gather", "trace"} <= set(names)
    for name in names:
        assert f"| `collector {name}" in README, name


def test_ledger_schema_section_documents_every_table_and_column(tmp_path: Path) -> None:
    """Each table and column of a new ledger is named in the README's schema table."""
    section = README[README.index("## The ledger schema"):README.index("## Cautions")]
    with Ledger.create(tmp_path / "l.sqlite") as ledger:
        tables = ledger.db.table_names()
        assert {"items", "files", "fetches"} <= set(tables)
        for table in tables:
            assert f"| `{table}` |" in section, table
            for column in ledger.db[table].columns:
                assert f"`{column.name}`" in section, f"{table}.{column.name}"
