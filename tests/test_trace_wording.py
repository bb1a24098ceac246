"""How `collector trace` words a record: a licence given only as a URL, "1 file", and the CSV
columns a reuse check needs (title, creator, licence, attribution)."""

from __future__ import annotations

import csv
import io
from collections.abc import Iterator
from pathlib import Path

import pytest
from support.collections import scan_image
from support.server import LoopbackServer, json_answer
from typer.testing import CliRunner

from collector.cli import app
from collector.run.gather import gather
from collector.storage.collection import init_collection

runner = CliRunner()
CC_BY = "https://creativecommons.org/licenses/by/4.0/"  # the CC BY 4.0 deed URL (CC's site)

RECIPE = """contact = "me@example.org"
[budgets]
min_interval = 0.0
[network]
allow_addresses = ["127.0.0.1"]
[[sources]]
name = "moss-api"
kind = "json_api"
url = "{base}/api/items"
[sources.fields]
items = "items"
id = "id"
title = "title"
creator = "creator"
licence_url = "licence_url"
image_url = "image"
"""


@pytest.fixture(scope="module")
def gathered(tmp_path_factory: pytest.TempPathFactory) -> Iterator[tuple[Path, Path]]:
    """A collection gathered from a loopback API whose one item gives its licence only as a
    URL; returns the collection and a copy of the stored picture."""
    root = tmp_path_factory.mktemp("wording")
    picture = io.BytesIO()
    scan_image(5, (240, 180)).save(picture, "PNG")
    with LoopbackServer() as server:
        server.route("/api/items", json_answer({"items": [{
            "id": "m-1", "title": "Moss on a stone", "creator": "A. Moss",
            "licence_url": CC_BY, "image": server.url("/img/m-1.png")}]}))
        server.route("/img/m-1.png", (200, picture.getvalue(), {"Content-Type": "image/png"}))
        col = init_collection(root / "c", contact="me@example.org")
        col.recipe_path.write_text(RECIPE.format(base=server.base))
        assert gather(col).outcome == "finished"
    copy = root / "copy.png"
    copy.write_bytes(picture.getvalue())
    yield col.root, copy


def test_a_licence_given_only_as_a_url_is_shown_before_the_arrow(
        gathered: tuple[Path, Path]) -> None:
    """The record shows the URL the source gave, then the SPDX id: no empty value before the
    arrow, and the URL once."""
    root, copy = gathered
    result = runner.invoke(app, ["trace", str(copy), "--in", str(root)])
    assert result.exit_code == 0, result.output
    licence = [line.strip() for line in result.output.splitlines()
               if line.strip().startswith("licence:")]
    assert licence == [f"licence:      {CC_BY} -> CC-BY-4.0"]


def test_one_file_is_one_file(gathered: tuple[Path, Path]) -> None:
    """The summary of a single traced file says "1 file", not "1 files"."""
    root, copy = gathered
    result = runner.invoke(app, ["trace", str(copy), "--in", str(root)])
    assert "1 file: 1 exact, 0 near" in result.output and "1 files" not in result.output


def test_csv_has_title_creator_licence_and_attribution(gathered: tuple[Path, Path]) -> None:
    """--csv carries what a reuse check needs: title, creator, the licence as given and the
    attribution line (TASL: title, author, source, licence; CC's recommended practice)."""
    root, copy = gathered
    result = runner.invoke(app, ["trace", str(copy), "--in", str(root), "--csv"])
    assert result.exit_code == 0
    (row,) = list(csv.DictReader(io.StringIO(result.stdout)))
    assert (row["title"], row["creator"], row["licence"], row["spdx_id"]) == (
        "Moss on a stone", "A. Moss", CC_BY, "CC-BY-4.0")
    assert row["attribution"].startswith('"Moss on a stone" by A. Moss, ')
    assert row["attribution"].endswith(f"licensed under CC BY 4.0 ({CC_BY})")
