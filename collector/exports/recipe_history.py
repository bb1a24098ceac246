"""Recipe history: which recipe each run used, when it last changed, and what changed.

Every run keeps the full text of its recipe in the ledger (``recipes``, by sha256, secrets
hidden; see :meth:`collector.config.recipe.Recipe.kept_text`), so the curator can see months
later what the first runs used. A change is a run whose recipe sha256 differs from the run
before it. The difference between two runs' recipes is a unified diff (Python's difflib, the
format of POSIX ``diff -u``).
"""

from __future__ import annotations

import difflib
from dataclasses import dataclass

from collector.errors import CollectionError
from collector.storage import upkeep_queries as uq
from collector.storage.ledger import Ledger


@dataclass(frozen=True)
class RecipeChange:
    """A run that used a recipe different from the run before it (the first run too)."""

    run_id: int
    started_at: str
    sha256: str | None
    previous_sha256: str | None


def recipe_changes(ledger: Ledger) -> list[RecipeChange]:
    """The runs where the recipe changed, oldest first (the first run starts the list)."""
    changes: list[RecipeChange] = []
    previous: str | None = None
    for i, run in enumerate(uq.run_recipes(ledger)):
        if i == 0 or run.recipe_sha256 != previous:
            changes.append(RecipeChange(run.run_id, run.started_at, run.recipe_sha256,
                                        previous if i else None))
        previous = run.recipe_sha256
    return changes


def last_change_line(ledger: Ledger) -> str | None:
    """The status line about the recipe: when it last changed and how many versions ran."""
    changes = recipe_changes(ledger)
    if not changes:
        return None
    last = changes[-1]
    versions = len({c.sha256 for c in changes})
    if len(changes) == 1:
        return (f"Recipe: unchanged since the first run (#{last.run_id}, "
                f"{last.started_at[:10]})")
    return (f"Recipe: last changed for run #{last.run_id} on {last.started_at[:10]} "
            f"({versions} versions over {len(changes) - 1} change(s); "
            f"'collector recipe-diff' shows them)")


def recipe_diff(ledger: Ledger, run_a: int, run_b: int) -> list[str]:
    """The unified diff from run ``run_a``'s recipe to run ``run_b``'s (no lines: the same
    recipe). A run that is missing, or whose text was not kept, is a clear error."""
    runs = {r.run_id: r for r in uq.run_recipes(ledger)}
    texts = []
    for run_id in (run_a, run_b):
        run = runs.get(run_id)
        if run is None:
            raise CollectionError(f"no run #{run_id} in this collection; 'collector status' "
                                  "counts the runs")
        if run.text is None:
            raise CollectionError(f"the recipe of run #{run_id} was not kept (the run is older "
                                  "than recipe history); only its sha256 is known: "
                                  f"{run.recipe_sha256}")
        texts.append(run.text)
    return list(difflib.unified_diff(
        texts[0].splitlines(), texts[1].splitlines(), fromfile=f"run #{run_a} recipe",
        tofile=f"run #{run_b} recipe", lineterm=""))
