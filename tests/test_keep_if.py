"""keep_if: conditions on an item's fields, decided before any image byte is requested.

Judged from the server's request log: an item a condition leaves out causes no image request,
and is recorded as skipped with the condition and how its date was read. The recipe names a
condition that cannot work before anything is sent."""

from __future__ import annotations

from collections.abc import Iterator
from pathlib import Path

import pytest
from support.collections import grid_picture
from support.server import LoopbackServer, json_answer

from collector.config.recipe import parse_recipe
from collector.errors import RecipeError
from collector.run.gather import gather
from collector.storage.collection import init_collection
from collector.storage.ledger import Ledger

RECORDS = [  # (id, date, licence)
    ("a", "c. 1850", "CC0-1.0"),
    ("b", "1890s", "CC0-1.0"),
    ("c", "1923", "CC0-1.0"),
    ("d", "n.d.", "CC0-1.0"),
    ("e", "1870", "CC-BY-4.0"),
]


def picture(seed: int) -> bytes:
    return grid_picture(seed, "PNG")


@pytest.fixture
def archive() -> Iterator[LoopbackServer]:
    with LoopbackServer() as srv:
        srv.route("/robots.txt", (404, b""))
        srv.route("/api", json_answer({"results": [
            {"id": key, "date": date, "licence": lic, "image": f"/img/{key}.png"}
            for key, date, lic in RECORDS]}))
        for n, (key, _, _) in enumerate(RECORDS):
            srv.route(f"/img/{key}.png", (200, picture(n), {"Content-Type": "image/png"}))
        yield srv


def recipe(srv: LoopbackServer, source_if: str, items_if: str) -> str:
    return f'''contact = "curator@example.org"
[budgets]
min_interval = 0.01
[network]
allow_addresses = ["127.0.0.1"]
[licences]
allow = ["CC0-1.0", "CC-BY-4.0"]
[images]
min_side = 64
[items]
keep_if = "{items_if}"
[[sources]]
name = "plates"
kind = "json_api"
url = "{srv.url('/api')}"
keep_if = "{source_if}"
[sources.pagination]
style = "none"
[sources.fields]
items = "results"
id = "id"
date = "date"
licence = "licence"
image_url = "image"
'''


def test_items_left_out_by_a_condition_cause_no_image_request(
        archive: LoopbackServer, tmp_path: Path) -> None:
    col = init_collection(tmp_path / "col", contact="curator@example.org")
    col.recipe_path.write_text(recipe(archive, "year_to < `1900`", "licence == 'CC0-1.0'"))
    gather(col)
    images = sorted(t for t in archive.targets() if t.startswith("/img/"))
    assert images == ["/img/a.png", "/img/b.png"]  # c: 1923; d: no date; e: CC-BY-4.0
    with Ledger.open(col.ledger_path, readonly=True) as ledger:
        rows = {r["source_key"]: r for r in ledger.query(
            "SELECT source_key, state, reason, detail FROM items")}
    assert rows["a"]["state"] == rows["b"]["state"] == "stored"
    for key in "cde":
        assert (rows[key]["state"], rows[key]["reason"]) == ("skipped", "condition_not_met")
    assert "1923-1923" in rows["c"]["detail"] and "source 'plates'" in rows["c"]["detail"]
    assert "could not be read" in rows["d"]["detail"]
    assert "[items] keep_if" in rows["e"]["detail"]

    archive.clear()  # the condition changed: the skipped items are decided again
    col.recipe_path.write_text(recipe(archive, "year_to < `1950`", "licence != null"))
    gather(col)
    assert sorted(t for t in archive.targets() if t.startswith("/img/")) == [
        "/img/c.png", "/img/e.png"]


@pytest.mark.parametrize(("source_if", "items_if", "where", "says"), [
    ("year_to <", "", 'sources[1] ("s").keep_if', "not a JMESPath expression"),
    ("shout(title)", "", 'sources[1] ("s").keep_if', "Unknown function"),
    ("", "contains(title)", "items.keep_if", "cannot be evaluated"),
])
def test_a_condition_that_cannot_work_is_named(source_if: str, items_if: str, where: str,
                                               says: str, tmp_path: Path) -> None:
    text = _offline_recipe(source_if, items_if)
    with pytest.raises(RecipeError) as caught:
        parse_recipe(text, tmp_path / "recipe.toml")
    problems = {p.key_path: p.message for p in caught.value.problems}
    assert where in problems, problems
    assert says in problems[where]


def _offline_recipe(source_if: str, items_if: str) -> str:
    return (f'contact = "c@example.org"\n[items]\nkeep_if = "{items_if}"\n[[sources]]\n'
            f'name = "s"\nkind = "scans"\npath = "in"\nkeep_if = "{source_if}"\n')
