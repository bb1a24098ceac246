"""Errors and screens that guide a newcomer: trace outside a collection, `check` in one round
with values as TOML, the recipe template's `${NAME}`."""

from __future__ import annotations

import json
import re
import tomllib
from pathlib import Path

import pytest
from PIL import Image
from typer.testing import CliRunner

from collector.cli import app
from collector.storage.collection import init_collection, recipe_template

runner = CliRunner()

API_SOURCE = (
    '\n[[sources]]\nname = "api"\nkind = "json_api"\nurl = "https://api.example.org/items"\n'
    'params = { key = "${H19_UNSET_KEY}" }\nheaders = { X-Token = "${H19_TOKEN}" }\n'
    '[sources.fields]\nitems = "r"\nid = "id"\nimage_url = "u"\n')
GALLERY_SOURCE = ('\n[[sources]]\nname = "gallery"\nkind = "html"\n'
                  'listing_pages = ["https://g.example.org/"]\n[sources.select]\nitm = "li"\n')


def test_trace_outside_a_collection_says_to_pass_in_or_set_the_variable(
        tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    """`collector trace small.jpg` in a folder that is no collection names --in DIR and
    COLLECTOR_COLLECTION (not `collector init .`), exit 2."""
    monkeypatch.chdir(tmp_path)
    monkeypatch.delenv("COLLECTOR_COLLECTION", raising=False)
    Image.new("RGB", (40, 30), "red").save(tmp_path / "small.jpg")
    result = runner.invoke(app, ["trace", "small.jpg"])
    assert result.exit_code == 2
    assert "--in DIR" in result.stderr and "COLLECTOR_COLLECTION" in result.stderr
    assert "collector init" not in result.stderr


def test_check_reports_every_problem_in_one_round(
        tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    """Structure, an unset ${NAME} and a header that breaks once filled in come together;
    sources are named by position from 1 and by name."""
    monkeypatch.delenv("H19_UNSET_KEY", raising=False)
    monkeypatch.setenv("H19_TOKEN", "abc\r")  # a token read from a file with CRLF endings
    col = init_collection(tmp_path / "c", contact="me@example.org")
    col.recipe_path.write_text(col.recipe_path.read_text() + API_SOURCE + GALLERY_SOURCE)
    result = runner.invoke(app, ["check", str(col.root)])
    assert result.exit_code == 2
    lines = [line for line in result.stderr.splitlines() if line.startswith("  - ")]
    assert result.stderr.startswith(f"Error: the recipe has {len(lines)} problems:")
    where = [re.sub(r"^  - .*?recipe\.toml: (.*?): .*$", r"\1", line) for line in lines]
    assert where == ['sources[2] ("gallery").select.itm', 'sources[2] ("gallery").select.item',
                     'sources[1] ("api").params.key', 'sources[1] ("api").headers.X-Token']
    assert "H19_UNSET_KEY is not set" in lines[2]
    assert "carriage return" in lines[3] and "abc" not in lines[3]  # the value never shows


def test_check_prints_the_settings_as_toml(tmp_path: Path,
                                           monkeypatch: pytest.MonkeyPatch) -> None:
    """Each setting line is TOML that Python's tomllib (TOML 1.0) reads back to the value in
    force: true, "keep", lists, inline tables; the sources are named from 1."""
    monkeypatch.setenv("H19_UNSET_KEY", "k")
    monkeypatch.setenv("H19_TOKEN", "t")
    col = init_collection(tmp_path / "c", contact="me@example.org")
    col.recipe_path.write_text(col.recipe_path.read_text().replace(
        "allow_addresses = []", 'allow_addresses = []\nheaders = { "X-Note" = "a \\"b\\"" }')
        + API_SOURCE + GALLERY_SOURCE.replace("itm", "item"))
    result = runner.invoke(app, ["check", str(col.root), "--json"])
    assert result.exit_code == 0, result.output
    settings = json.loads(result.output)
    text = runner.invoke(app, ["check", str(col.root)]).output
    section = ""
    seen = 0
    for line in text.splitlines():
        if re.fullmatch(r"  \[\w+\]", line):
            section = line.strip()[1:-1]
        elif line.startswith("    ") and section:
            (key, value), = tomllib.loads(line.strip()).items()
            assert value == settings[section][key], line
            seen += 1
    assert seen == sum(len(settings[s]) for s in ("budgets", "network", "licences", "images",
                                                  "stop", "items", "reservations"))
    assert "    allow_unknown = false" in text and '    near_duplicates = "keep"' in text
    assert '    headers = { X-Note = "a \\"b\\"" }' in text
    assert '  sources[1] ("api"): kind = "json_api"' in text
    assert '  sources[2] ("gallery"): kind = "html"' in text


def test_recipe_template_shows_environment_references_as_written() -> None:
    """The template's comment shows ${NAME}, the syntax the fetcher fills in (not ${{NAME}})."""
    text = recipe_template(contact="me@example.org")
    assert re.search(r'"\$\{[A-Z_]+\}"', text)
    assert "${{" not in text and "}}" not in text
