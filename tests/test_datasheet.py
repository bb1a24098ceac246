"""The datasheet export: every number recomputed from the ledger, answers, CSVs, images, safety."""

from __future__ import annotations

import csv
import errno
import hashlib
import json
import os
import re
import sqlite3
import statistics
import subprocess
import sys
from pathlib import Path
from urllib.parse import urlsplit

import pytest
from support.datasheet_fixture import HOSTILE_TITLE, build_collection
from typer.testing import CliRunner

from collector.cli import app
from collector.errors import CollectionError
from collector.exports import datasheet as ds
from collector.exports import datasheet_questions as dq
from collector.exports.datasheet import export_datasheet
from collector.exports.datasheet_questions import QUESTIONS, parse_answers
from collector.exports.datasheet_render import FACTS
from collector.exports.diversity_plots import PANEL_TITLES
from collector.exports.release import readable_name

FACT_IDS = set(FACTS)

ACCEPTED = "('stored', 'near_duplicate')"


@pytest.fixture(scope="module")
def coll(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """The fixture collection, built once per module (a real gather over scans + a web source)."""
    return build_collection(tmp_path_factory.mktemp("ds") / "leaves")


@pytest.fixture(scope="module")
def export(coll: Path) -> ds.ExportResult:
    """One export with images into coll/datasheet."""
    return export_datasheet(coll, with_images=True)


def q(coll: Path, sql: str) -> list[tuple]:
    with sqlite3.connect(coll / "ledger.sqlite") as conn:
        return conn.execute(sql).fetchall()


def accepted_rows(coll: Path) -> list[tuple]:
    """Accepted items with their file facts: our own query (distinct sha256 of stored items)."""
    return q(coll, f"SELECT DISTINCT i.file_sha256, f.format, f.mode, f.width, f.height, "
                   f"i.spdx_id, i.image_url, f.flags, i.title, i.creator, f.size, i.date "
                   f"FROM items i JOIN files f ON f.sha256 = i.file_sha256 "
                   f"WHERE i.state IN {ACCEPTED}")


def test_counts_by_state_and_reason_match_the_ledger(coll: Path, export: ds.ExportResult) -> None:
    """Item counts per state and per state/reason equal a GROUP BY of our own, in facts and md."""
    md = (export.out / "datasheet.md").read_text()
    states = dict(q(coll, "SELECT state, count(*) FROM items GROUP BY state"))
    assert export.facts["items"]["by_state"] == states
    assert export.facts["items"]["total"] == sum(states.values()) == 16
    for state, n in states.items():
        assert f"| {state} | {n} |" in md
    reasons = {f"{s}/{r}": n for s, r, n in q(
        coll, "SELECT state, reason, count(*) FROM items WHERE reason IS NOT NULL "
              "GROUP BY state, reason")}
    assert export.facts["items"]["by_reason"] == reasons
    assert reasons  # the fixture has skipped, rejected and duplicate items
    for key, n in reasons.items():
        assert f"| {key} | {n} |" in md


def test_file_facts_match_the_ledger(coll: Path, export: ds.ExportResult) -> None:
    """Formats, colour modes, min/median/max dimensions and bytes match our own computation."""
    rows = accepted_rows(coll)
    facts, md = export.facts["accepted"], (export.out / "datasheet.md").read_text()
    assert facts["files"] == len(rows) == 10
    assert facts["bytes"] == sum(r[10] for r in rows)
    formats: dict[str, int] = {}
    modes: dict[str, int] = {}
    for r in rows:
        formats[r[1]] = formats.get(r[1], 0) + 1
        modes[r[2]] = modes.get(r[2], 0) + 1
    assert facts["formats"] == formats and facts["modes"] == modes
    for name, n in formats.items():
        assert f"| {name} | {n} |" in md
    # Modes in words beside Pillow's code (Pillow handbook, "Concepts", "Modes":
    # RGB = 3x8-bit true colour, L = 8-bit greyscale).
    words = {"RGB": "colour (RGB)", "L": "greyscale, 8 bit (L)", "RGBA":
             "colour with transparency (RGBA)", "P": "palette colour (P)"}
    for name, n in modes.items():
        assert f"| {words[name]} | {n} |" in md
    for col, dim in ((3, "width"), (4, "height")):
        values = [r[col] for r in rows]
        median = statistics.median(values)
        expected = {"min": min(values), "median": median, "max": max(values)}
        assert facts[dim] == expected
        shown = int(median) if median == int(median) else median
        assert f"| {dim} | {min(values)} | {shown} | {max(values)} |" in md


def test_licences_hosts_and_sources_match_the_ledger(coll: Path,
                                                     export: ds.ExportResult) -> None:
    """Licence, host and source breakdowns of accepted files match our own counts."""
    rows = accepted_rows(coll)
    lic: dict[str, int] = {}
    hosts: dict[str, int] = {}
    for r in rows:
        lic[r[5] or "unknown"] = lic.get(r[5] or "unknown", 0) + 1
        u = urlsplit(r[6]) if r[6] else None
        host = f"{u.hostname}:{u.port or 80}" if u else ds.LOCAL_HOST
        hosts[host] = hosts.get(host, 0) + 1
    facts, md = export.facts, (export.out / "datasheet.md").read_text()
    assert facts["accepted"]["by_licence"] == lic
    assert facts["accepted"]["by_host"] == hosts
    by_source = dict(q(coll, f"SELECT s.name, count(DISTINCT i.file_sha256) FROM items i JOIN "
                             f"sources s ON s.id = i.source_id WHERE i.state IN {ACCEPTED} "
                             "AND i.file_sha256 IS NOT NULL GROUP BY s.name"))
    assert facts["accepted"]["by_source"] == by_source
    assert sum(by_source.values()) == len(rows) == 10
    for name, n in by_source.items():
        assert f"| {name} | {n} |" in md
    assert facts["release"]["by_licence"]
    for spdx, n in facts["release"]["by_licence"].items():
        assert re.search(rf"\| {re.escape(spdx)} \| {n} \|", md)


def test_politeness_numbers_match_the_fetch_log(coll: Path, export: ds.ExportResult) -> None:
    """Requests, 429s, robots refusals and the budget applied match the fetches/hosts rows."""
    (total,) = q(coll, "SELECT count(*) FROM fetches WHERE status IS NOT NULL")[0]
    (n429,) = q(coll, "SELECT count(*) FROM fetches WHERE status = 429")[0]
    (refused,) = q(coll, "SELECT count(*) FROM fetches WHERE robots_verdict = 'disallowed'")[0]
    r = export.facts["requests"]
    assert (r["total"], r["status_429"], r["robots_disallowed"]) == (total, n429, refused)
    assert (total, n429, refused) == (6, 1, 1)
    md = (export.out / "datasheet.md").read_text()
    assert f"| answered requests | {total} |" in md
    assert f"| 429 Too Many Requests received | {n429} |" in md
    assert f"| refused by robots.txt | {refused} |" in md
    host, budget_json = q(coll, "SELECT host, effective_budget FROM hosts")[0]
    budget = json.loads(budget_json)
    names = sorted({n for (n,) in q(coll, "SELECT DISTINCT s.name FROM fetches x JOIN items i "
                                          "ON i.id = x.item_id JOIN sources s ON "
                                          f"s.id = i.source_id WHERE x.host = '{host}'")})
    assert names == ["fernhollow-api"]  # the host row names the source, not only host:port
    row = next(line for line in md.splitlines()
               if line.startswith(f"| {host} | {', '.join(names)} | 200 |"))
    assert f"| {budget['effective_interval']} | {budget['requests_per_hour']} |" in row


def test_duplicates_missing_fields_flags_and_timeframe_match(coll: Path,
                                                             export: ds.ExportResult) -> None:
    """Duplicate, missing-field, flag and time-frame facts equal our own queries."""
    f, md = export.facts, (export.out / "datasheet.md").read_text()
    (exact,) = q(coll, "SELECT count(*) FROM items WHERE state = 'duplicate'")[0]
    (near,) = q(coll, "SELECT count(*) FROM items WHERE state = 'near_duplicate' "
                      "AND file_sha256 IS NOT NULL")[0]
    assert (f["duplicates"]["exact"], f["duplicates"]["near_kept"]) == (exact, near) == (1, 1)
    assert f"not stored again: {exact}." in md
    assert f"{near} kept and marked" in md
    rows = accepted_rows(coll)
    no_creator = sum(1 for r in rows if not (r[9] or "").strip())
    no_title = sum(1 for r in rows if not (r[8] or "").strip())
    assert f["missing"]["no_creator"] == no_creator
    assert f["missing"]["no_title"] == no_title
    assert f"| a creator | {no_creator} |" in md and f"| a title | {no_title} |" in md
    flags: dict[str, int] = {}
    for r in rows:
        for flag in json.loads(r[7] or "[]"):
            flags[flag] = flags.get(flag, 0) + 1
    assert f["flags"] == flags == {"gps": 1, "licence_conflict": 1}
    assert f["flagged"]["personal"] == 1 and f["flagged"]["conflict"] == 1
    for flag, n in flags.items():
        assert f"| {flag} | {n} |" in md
    start, end = q(coll, "SELECT min(t), max(t) FROM (SELECT started_at t FROM fetches "
                         "UNION ALL SELECT stored_at FROM files)")[0]
    assert f["timeframe"] == {"start": start, "end": end}
    assert f"{start} to {end} (UTC)" in md


def test_no_word_on_text_that_is_not_unicode_when_no_item_held_any(
        coll: Path, export: ds.ExportResult) -> None:
    """No item's metadata (read with Python's json) names a field that held text that is not
    valid Unicode, so the datasheet counts none and says nothing of it
    (tests/test_invalid_unicode.py has the collection that did)."""
    named = [json.loads(m or "{}").get("invalid_unicode") for (m,) in
             q(coll, "SELECT metadata FROM items")]
    assert named and not any(named)
    assert export.facts["not_unicode"] == {"items": 0, "accepted": 0, "fields": {}}
    for page in ("datasheet.md", "datasheet.html"):
        text = (export.out / page).read_text("utf-8")
        assert "not valid Unicode" not in text and "t-not-unicode" not in text


def test_answers_fill_questions_and_the_rest_is_marked_unanswered(coll: Path,
                                                                  tmp_path: Path) -> None:
    """Curator answers appear; every other curator/pre-filled question says it is unanswered."""
    answers = tmp_path / "answers.toml"
    answers.write_text('motivation.purpose = "Teaching leaf shapes to first-year students."\n'
                       "[maintenance]\ncontact = \"leaves@fernhollow.example\"\n")
    result = export_datasheet(coll, out=tmp_path / "out", answers_path=answers)
    md = (result.out / "datasheet.md").read_text()
    assert "**Curator:** Teaching leaf shapes to first-year students." in md
    assert "**Curator:** leaves@fernhollow.example" in md
    # "Not answered" once per section that has open curator questions, never beside the
    # facts of a pre-filled question (common practice, no source: say a thing once).
    open_sections = {x.id.split(".")[0] for x in QUESTIONS.values()
                     if x.kind == "C" and x.id not in ("motivation.purpose",)
                     and x.id not in FACT_IDS}
    assert md.count("Not answered") == len(open_sections)
    page = (result.out / "datasheet.html").read_text()
    assert page.count("Not answered") == len(open_sections)
    # The mark only heads a section's list of open questions, never a pre-filled answer.
    assert md.count("*Not answered by the curator.* Questions for the curator") == len(
        open_sections)
    assert "Pre-filled from the ledger — curator, please confirm" in md
    for x in QUESTIONS.values():
        assert f"`{x.id}`" in md


def test_unknown_answer_key_is_rejected_with_exit_2(coll: Path, tmp_path: Path) -> None:
    """An unknown key in the answers file exits 2 naming the key, with a suggestion."""
    answers = tmp_path / "a.toml"
    answers.write_text('motivation.purpos = "x"\nuses = { avoid = 3 }\n')
    res = CliRunner().invoke(app, ["datasheet", str(coll), "--out", str(tmp_path / "o"),
                                   "--answers", str(answers)])
    assert res.exit_code == 2
    assert "the answers file has 2 problems" in res.output
    assert "motivation.purpos: unknown key (did you mean 'motivation.purpose'?)" in res.output
    assert "uses.avoid: must be a string" in res.output
    assert not (tmp_path / "o").exists()


def test_answers_template_lists_keys_that_parse_back() -> None:
    """Every key the template documents is accepted by the parser."""
    text = dq.answers_template()
    keys = re.findall(r"^# ([a-z_]+\.[a-z_]+) = ", text, re.M)
    assert len(keys) == len(dq.ANSWER_KEYS)
    assert parse_answers("\n".join(f'{k} = "2026-05-01"' for k in keys)).keys() == set(keys)


def test_html_is_self_contained_escaped_and_has_its_plots(export: ds.ExportResult) -> None:
    """The HTML escapes server text, loads nothing from outside, has 4 SVG plots at a glance and
    the diversity panel's, and print CSS."""
    page = (export.out / "datasheet.html").read_text()
    assert "<script" not in page.lower()
    assert "alert(1)</script>" not in page
    assert not re.search(r"""(src|href)\s*=\s*["']?(https?:)?//""", page)
    assert "@import" not in page and "<link" not in page
    assert page.count("<svg") == 4 + len(PANEL_TITLES)  # At a glance + the diversity panel
    assert "@media print" in page
    for caution in ("not legal advice", "personal data", "terms of use"):
        assert caution in page


def test_hostile_title_is_escaped_in_html_and_markdown(coll: Path, tmp_path: Path) -> None:
    """A title with markup and a pipe is shown as text, never as markup or a table break."""
    from collector.exports.datasheet_render import render_html, render_markdown

    facts = export_datasheet(coll, out=tmp_path / "o").facts
    facts["collection"]["name"] = HOSTILE_TITLE
    page = render_html(facts, {}, {})
    assert "<script>" not in page
    assert "Bracken &lt;script&gt;alert(1)&lt;/script&gt; | frond &amp; stem" in page
    assert "Bracken <script>alert(1)</script> \\| frond & stem" in render_markdown(facts, {})


def test_caution_block_is_in_both_datasheets(export: ds.ExportResult) -> None:
    """Both datasheet files warn about licences, personal data and robots.txt vs terms."""
    for name in ("datasheet.md", "datasheet.html"):
        text = (export.out / name).read_text()
        assert "not legal advice" in text
        assert "need review before publication" in text
        assert "robots.txt permission is not the same as permission under a site" in text


def test_provenance_and_attribution_rows_describe_each_file(coll: Path,
                                                            export: ds.ExportResult) -> None:
    """provenance.csv has one row per accepted file with its ledger facts; attribution.csv
    gives title, author, source and licence (CC attribution practice, standards.md §8)."""
    with open(export.out / "provenance.csv", newline="") as fh:
        prov = list(csv.DictReader(fh))
    assert {r["sha256"] for r in prov} == {r[0] for r in accepted_rows(coll)}
    assert all(r["file_name"] == readable_name(r["source"], r["source_key"], r["sha256"],
                                               r["file_name"].rsplit(".", 1)[1])
               for r in prov)
    web = next(r for r in prov if r["title"] == HOSTILE_TITLE)
    assert web["image_url"].startswith("http://127.0.0.2:8080/img/")
    assert web["spdx_id"] == "CC-BY-SA-4.0" and web["fetched_at"] == "2026-12-01T21:52:00.000Z"
    assert web["licence_url"] == "https://creativecommons.org/licenses/by-sa/4.0/"
    with open(export.out / "attribution.csv", newline="") as fh:
        attr = {r["file_name"]: r for r in csv.DictReader(fh)}
    a = attr[web["file_name"]]
    assert (a["title"], a["author"], a["source"], a["licence"]) == (
        HOSTILE_TITLE, "A. Gardener", "http://127.0.0.2:8080/item/w1", "CC-BY-SA-4.0")


def test_with_images_hard_links_exactly_the_release(coll: Path, export: ds.ExportResult) -> None:
    """images/ holds exactly the provenance files, hard-linked, with the ledger's sha256."""
    with open(export.out / "provenance.csv", newline="") as fh:
        prov = {r["file_name"]: r["sha256"] for r in csv.DictReader(fh)}
    files = {p.name: p for p in (export.out / "images").iterdir()}
    assert set(files) == set(prov) and len(files) == 10
    for name, path in files.items():
        assert hashlib.sha256(path.read_bytes()).hexdigest() == prov[name]  # FIPS 180-4
        assert path.stat().st_nlink >= 2
    assert export.counts.linked == len(files) and export.counts.copied == 0


def test_copies_when_a_hard_link_is_impossible(coll: Path, tmp_path: Path,
                                              monkeypatch: pytest.MonkeyPatch) -> None:
    """A cross-device link error (EXDEV) falls back to a byte-identical copy."""
    def no_link(src: object, dst: object) -> None:
        raise OSError(errno.EXDEV, "Invalid cross-device link")

    monkeypatch.setattr(ds.os, "link", no_link)
    result = export_datasheet(coll, out=tmp_path / "o", with_images=True)
    assert result.counts.copied == result.counts.files == 10 and result.counts.linked == 0
    copies = list((tmp_path / "o/images").iterdir())
    assert len(copies) == 10
    for path in copies:
        assert path.stat().st_nlink == 1
        assert hashlib.sha256(path.read_bytes()).hexdigest().startswith(path.stem[-12:])


def test_exclude_flagged_leaves_out_personal_data_and_conflicts(coll: Path,
                                                                tmp_path: Path) -> None:
    """--exclude-flagged drops the GPS-tagged file and the licence-conflict file."""
    result = export_datasheet(coll, out=tmp_path / "o", with_images=True, exclude_flagged=True)
    assert result.counts.excluded_flagged == 2 and result.counts.files == 8
    with open(tmp_path / "o/provenance.csv", newline="") as fh:
        rows = list(csv.DictReader(fh))
    assert len(rows) == 8 and all(r["flags"] == "" for r in rows)
    assert len(list((tmp_path / "o/images").iterdir())) == 8


def test_release_follows_the_recipes_current_allowlist(tmp_path: Path) -> None:
    """A licence removed from the allowlist after gathering keeps its files out of the release."""
    root = build_collection(tmp_path / "c")
    recipe = (root / "recipe.toml").read_text()
    (root / "recipe.toml").write_text(recipe.replace(
        "[images]", '[licences]\nallow = ["CC0-1.0", "CC-BY-4.0"]\n\n[images]'))
    result = export_datasheet(root, with_images=True)
    (sa,) = q(root, f"SELECT count(*) FROM items WHERE state IN {ACCEPTED} "
                    "AND spdx_id = 'CC-BY-SA-4.0'")[0]
    assert result.counts.excluded_licence == sa == 1 and result.counts.files == 9
    assert "CC-BY-SA-4.0" not in (root / "datasheet/provenance.csv").read_text()


def test_non_empty_out_is_refused_and_overwrite_touches_only_our_files(
        coll: Path, tmp_path: Path) -> None:
    """A non-empty --out is refused (exit 2); --overwrite replaces our files, keeps the rest."""
    out = tmp_path / "o"
    out.mkdir()
    (out / "mine.txt").write_text("keep me")
    res = CliRunner().invoke(app, ["datasheet", str(coll), "--out", str(out)])
    assert res.exit_code == 2 and "not empty" in res.output
    assert sorted(p.name for p in out.iterdir()) == ["mine.txt"]
    (out / "datasheet.md").write_text("old")
    res = CliRunner().invoke(app, ["datasheet", str(coll), "--out", str(out), "--overwrite"])
    assert res.exit_code == 0, res.output
    assert (out / "mine.txt").read_text() == "keep me"
    assert (out / "datasheet.md").read_text().startswith("# Datasheet: Fernhollow leaves")
    assert sorted(p.name for p in out.iterdir()) == sorted([*ds.OUR_FILES, "mine.txt"])


def test_out_folder_inside_the_store_is_refused(coll: Path) -> None:
    """Exporting into the collection's files/ store is refused before anything is written."""
    with pytest.raises(CollectionError, match="inside the collection's file store"):
        export_datasheet(coll, out=coll / "files" / "ds")
    assert not (coll / "files" / "ds").exists()


def test_foreign_file_in_images_is_kept_and_reported(coll: Path, tmp_path: Path) -> None:
    """A file in images/ that is not in the release is never deleted; the export says so."""
    out = tmp_path / "o"
    (out / "images").mkdir(parents=True)
    (out / "images" / "stray.png").write_bytes(b"x")
    with pytest.raises(CollectionError, match="1 file"):
        export_datasheet(coll, out=out, with_images=True, overwrite=True)
    assert (out / "images" / "stray.png").read_bytes() == b"x"


def test_importing_the_modules_does_not_import_matplotlib() -> None:
    """matplotlib is loaded only when plots are drawn."""
    code = ("import sys, collector.exports.datasheet, collector.exports.croissant, "
            "collector.exports.plots, collector.exports.datasheet_render; "
            "print('matplotlib' in sys.modules)")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                         check=True, env={**os.environ, "PYTHONPATH": os.getcwd()})
    assert out.stdout.strip() == "False"
