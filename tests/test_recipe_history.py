"""Recipe history: each run keeps the recipe text it used (secrets hidden), and a source
renamed with ``former_names`` keeps its items."""

from __future__ import annotations

from pathlib import Path

from support.collections import SCANS_SOURCE, scans_collection

from collector.config.recipe import parse_recipe
from collector.run.gather import gather
from collector.storage import queries
from collector.storage import upkeep_queries as uq

NO_NETWORK = {"fetcher_factory": lambda recipe, ledger: None}


def test_a_renamed_source_keeps_its_items(tmp_path: Path) -> None:
    """Renaming "desk" to "bench" with former_names = ["desk"]: the same source row and
    items, nothing listed twice; without it the new name would start a new source."""
    col = scans_collection(tmp_path / "c", count=2)
    with col.ledger(readonly=True) as ledger:
        before = queries.counts(ledger)
    text = col.recipe_path.read_text().replace(
        'name = "desk"', 'name = "bench"\nformer_names = ["desk"]')
    col.recipe_path.write_text(text)
    assert gather(col, **NO_NETWORK).outcome == "finished"
    with col.ledger(readonly=True) as ledger:
        assert queries.counts(ledger) == before
        assert [name for name, _ in queries.source_names(ledger).values()] == ["bench"]
        recipes = uq.run_recipes(ledger)
        assert [r.text is not None for r in recipes] == [True, True]
        assert 'former_names = ["desk"]' in (recipes[1].text or "")


def test_the_kept_recipe_text_hides_written_in_secrets(tmp_path: Path) -> None:
    """A secret header value written into the recipe is kept as REDACTED (as 'check' shows
    it); a ${NAME} reference holds no secret and is kept as written."""
    text = ('contact = "me@example.org"\n[network]\nheaders = { Authorization = '
            '"Bearer s3cr3t-t0ken", Cookie = "${MY_COOKIE}" }\n' + SCANS_SOURCE)
    recipe = parse_recipe(text, tmp_path / "recipe.toml")
    kept = recipe.kept_text()
    assert "s3cr3t-t0ken" not in kept and "REDACTED" in kept
    assert "${MY_COOKIE}" in kept and 'name = "desk"' in kept
