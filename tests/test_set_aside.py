"""Files set aside by pixel rules: at ingest, in status, trace and releases, and again by
``collector apply-rules``, which must work offline.

Judged from outside: the loopback server's own request log (no request during apply-rules),
a socket guard (no connection is even attempted) and the fetcher factory (never called); the
pictures are tinted grids whose hues are those of pure sRGB primaries (HSV hue, Smith 1978:
red 0, green 120), and a grey grid has no colour at all.
"""

from __future__ import annotations

import csv
import io
import socket
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from PIL import Image
from support.server import LoopbackServer, json_answer
from typer.testing import CliRunner

from collector.cli import app
from collector.exports.changelog import change_log
from collector.exports.datasheet import export_datasheet
from collector.exports.summary import format_summary, summarise, summary_as_dict
from collector.exports.trace import Tracer
from collector.exports.trace_format import format_record
from collector.run import gather as gather_module
from collector.run.gather import gather
from collector.run.set_aside import apply_rules
from collector.storage import upkeep_queries
from collector.storage.collection import Collection, init_collection

TINTS = {"grey": (1, 1, 1), "green": (0, 1, 0), "red": (1, 0, 0), "half": None}
COLOUR_RULE = '[[pixel_rules]]\nname = "colour"\ngreyscale = false\n'
GREENS_RULE = ('[[pixel_rules]]\nname = "greens"\nhues = [70, 170]\nmin_hue_share = 0.3\n'
               'sources = ["plates"]\n')


def picture(seed: int, tint: tuple[int, int, int] | None) -> bytes:
    """A 160x120 grid of random levels (distinct per seed), tinted; ``None``: the left half
    green, the right half red."""
    levels = np.random.default_rng(seed).integers(40, 256, (6, 8)).astype(np.float64)
    grid = np.kron(levels, np.ones((20, 20)))[..., None]
    if tint is None:
        rgb = np.concatenate([grid[:, :80] * (0, 1, 0), grid[:, 80:] * (1, 0, 0)], axis=1)
    else:
        rgb = grid * tint
    out = io.BytesIO()
    Image.fromarray(rgb.astype(np.uint8)).save(out, "PNG")
    return out.getvalue()


@pytest.fixture
def archive() -> Iterator[LoopbackServer]:
    with LoopbackServer() as srv:
        srv.route("/robots.txt", (404, b""))
        srv.route("/api", json_answer({"results": [
            {"id": key, "image": f"/img/{key}.png"} for key in TINTS]}))
        for n, (key, tint) in enumerate(TINTS.items()):
            srv.route(f"/img/{key}.png", (200, picture(n, tint), {"Content-Type": "image/png"}))
        yield srv


def recipe(srv: LoopbackServer, rules: str) -> str:
    return f'''contact = "curator@example.org"
[budgets]
min_interval = 0.01
[network]
allow_addresses = ["127.0.0.1"]
[licences]
allow_unknown = true
[images]
min_side = 64
near_duplicates = "keep"

[[sources]]
name = "plates"
kind = "json_api"
url = "{srv.url('/api')}"
[sources.pagination]
style = "none"
[sources.fields]
items = "results"
id = "id"
image_url = "image"

{rules}'''


def aside(col: Collection) -> dict[str, str | None]:
    """Source key -> the rule that sets its file aside (None: kept in releases)."""
    with col.ledger(readonly=True) as ledger:
        files = upkeep_queries.files_to_judge(ledger)
    return {f.source_key or "": f.set_aside for f in files}


@pytest.fixture
def gathered(archive: LoopbackServer, tmp_path: Path) -> Collection:
    col = init_collection(tmp_path / "col", contact="curator@example.org")
    col.recipe_path.write_text(recipe(archive, COLOUR_RULE))
    assert gather(col).outcome == "finished"
    return col


@pytest.fixture
def offline(monkeypatch: pytest.MonkeyPatch) -> list[str]:
    """Any attempt to build a fetcher or open a connection fails and is noted."""
    attempts: list[str] = []

    def refuse(*args: Any, **kwargs: Any) -> Any:
        attempts.append(f"{args!r}")
        raise AssertionError("apply-rules tried to reach the network")

    monkeypatch.setattr(gather_module, "build_fetcher", refuse)
    monkeypatch.setattr(socket.socket, "connect", refuse)
    monkeypatch.setattr(socket, "create_connection", refuse)
    return attempts


def test_a_file_failing_a_rule_is_stored_but_set_aside(gathered: Collection,
                                                       archive: LoopbackServer,
                                                       tmp_path: Path) -> None:
    """The grey picture is stored (its bytes are in the store) and set aside with the rule's
    words; status counts it on its own line, trace says it, the release leaves it out and
    counts it, and the datasheet's numbers do not count it."""
    assert aside(gathered) == {"grey": "colour", "green": None, "red": None, "half": None}
    with gathered.ledger(readonly=True) as ledger:
        grey = next(f for f in upkeep_queries.files_to_judge(ledger) if f.source_key == "grey")
        summary = summarise(ledger)
    lines = format_summary(summary)
    assert summary_as_dict(summary)["set_aside"] == {"colour": 1}
    assert gathered.store.find(grey.sha256) is not None
    assert grey.set_aside_detail == "greyscale = false, but the picture is greyscale"
    assert ("set aside by pixel rules: 1 of the 4 files (colour 1); kept in the store, left "
            "out of releases") in lines
    with Tracer.open(gathered.root) as tracer:
        shown = format_record(tracer.trace_file(gathered.store.find(grey.sha256)))
    assert any(line.strip().startswith('set aside:    pixel rule "colour": greyscale = false,')
               for line in shown), shown
    export = export_datasheet(gathered.root, out=tmp_path / "release", with_images=True)
    with open(tmp_path / "release" / "provenance.csv", newline="") as fh:
        released = {row["sha256"] for row in csv.DictReader(fh)}
    assert grey.sha256 not in released and len(released) == 3
    assert export.counts.excluded == {"set_aside": 1}
    assert export.facts["accepted"]["files"] == 3
    sheet = (tmp_path / "release" / "datasheet.md").read_text()
    assert ("Pixel rule 'colour' (greyscale = false): 1 file(s) set aside (kept in the store, "
            "left out of this release and of the accepted files counted here).") in sheet
    assert "| set aside by the recipe's pixel rules | 1 |" in sheet


def test_apply_rules_moves_exactly_what_the_changed_rules_say_without_a_request(
        gathered: Collection, archive: LoopbackServer, offline: list[str]) -> None:
    """A rule added (greens, for the source) sets the red picture aside; a dry run shows it
    and writes nothing; the real run records it in rule_changes; dropping both rules brings
    both back. The server sees no request, no connection is attempted, no fetcher built."""
    archive.clear()
    gathered.recipe_path.write_text(recipe(archive, COLOUR_RULE + GREENS_RULE))
    dry = apply_rules(gathered, dry_run=True)
    assert [(m.source_key, m.before, m.after) for m in dry.moves] == [("red", None, "greens")]
    assert aside(gathered)["red"] is None  # nothing written
    done = apply_rules(gathered)
    assert [(m.source_key, m.kind) for m in done.moves] == [("red", "set aside")]
    assert aside(gathered) == {"grey": "colour", "green": None, "red": "greens", "half": None}
    assert apply_rules(gathered).moves == []  # applying the same rules again changes nothing

    gathered.recipe_path.write_text(recipe(archive, ""))
    back = apply_rules(gathered)
    assert sorted((m.source_key, m.kind) for m in back.moves) == [
        ("grey", "brought back"), ("red", "brought back")]
    with gathered.ledger(readonly=True) as ledger:
        changes = upkeep_queries.rule_changes(ledger)
    assert (changes[0].rule_before, changes[0].rule_after) == (None, "greens")
    assert sorted((c.rule_before or "", c.rule_after) for c in changes[1:]) == [
        ("colour", None), ("greens", None)]
    assert "min_hue_share = 0.3" in (changes[0].detail or "")
    with gathered.ledger(readonly=True) as ledger:
        logged = [e["detail"] for e in change_log(ledger)
                  if e["event"] == "pixel rules applied again"]
    assert [d.split(": ", 1)[1] for d in logged] == ["1 file(s) set aside",
                                                     "2 file(s) brought back"]
    assert archive.targets() == [] and offline == []


def test_the_command_prints_the_moves_and_files_without_facts_are_not_judged(
        gathered: Collection, archive: LoopbackServer, offline: list[str]) -> None:
    """`collector apply-rules --dry-run` names each file that would move and changes
    nothing; a file whose facts are missing (stored before they were kept) is counted as not
    judged and keeps its state."""
    archive.clear()
    with gathered.ledger() as ledger:
        sha = next(f.sha256 for f in upkeep_queries.files_to_judge(ledger)
                   if f.source_key == "green")
        ledger.update_file(sha, dict.fromkeys(
            ("greyscale", "brightness", "contrast", "colourfulness", "sharpness",
             "background_share", "colours")))
    gathered.recipe_path.write_text(recipe(archive, COLOUR_RULE + GREENS_RULE))
    result = CliRunner().invoke(app, ["apply-rules", str(gathered.root), "--dry-run"])
    assert result.exit_code == 0, result.output
    assert "dry run: 4 stored files judged by 2 pixel rules" in result.output
    assert "1 would be set aside, 0 brought back" in result.output
    assert ('set aside: plates:red' in result.output
            and 'pixel rule "greens": min_hue_share = 0.3 in hues = [70, 170]' in result.output)
    assert "1 file has no colour facts" in result.output
    checked = CliRunner().invoke(app, ["check", str(gathered.root)])
    assert 'pixel_rules[2]: name = "greens", hues = [70, 170], min_hue_share = 0.3' in (
        checked.output)
    assert aside(gathered)["red"] is None and offline == []
    assert archive.targets() == []
