"""The datasheet's diversity panel: Hill numbers, hue bins, decades, warnings and the panel's
numbers against the ledger of a real collection (with set-aside and withdrawn files)."""

from __future__ import annotations

import colorsys
import math
import sqlite3
from pathlib import Path

import numpy as np
import pytest
from PIL import Image
from scipy.stats import entropy
from support.datasheet_fixture import RECIPE, build_collection

from collector.checks.colour_facts import colour_facts
from collector.config.recipe import parse_recipe
from collector.errors import RecipeError
from collector.exports import diversity as dv
from collector.exports.datasheet import export_datasheet
from collector.storage.ledger import Ledger


@pytest.mark.parametrize("n", [1, 2, 4, 10, 97])
def test_hill_numbers_of_n_equal_groups_are_n(n: int) -> None:
    """N equally common groups give N for every order (Hill 1973, Ecology 54(2):427-432,
    the evenness property; Jost 2006, Oikos 113:363-375, section "Diversity")."""
    order1, order2 = dv.hill_numbers([7] * n)
    assert order1 == pytest.approx(n) and order2 == pytest.approx(n)


def test_hill_numbers_of_one_dominant_group_are_near_one() -> None:
    """One group holding nearly everything gives nearly 1 for both orders (Hill 1973)."""
    order1, order2 = dv.hill_numbers([1_000_000, 1, 1, 1])
    assert 1.0 < order1 < 1.001 and 1.0 < order2 < 1.0001


def test_hill_numbers_worked_example() -> None:
    """Shares (0.5, 0.25, 0.25), worked by hand from the definitions (Jost 2006, eq. for
    qD): H = 0.5 ln 2 + 2 * 0.25 ln 4 = 1.5 ln 2, so 1D = exp(H) = 2^1.5 = 2.8284...;
    2D = 1 / (0.25 + 0.0625 + 0.0625) = 1 / 0.375 = 2.6667. Counts scale freely."""
    for counts in ([0.5, 0.25, 0.25], [2, 1, 1], [200, 100, 100]):
        order1, order2 = dv.hill_numbers(counts)
        assert order1 == pytest.approx(2 ** 1.5, rel=1e-12)
        assert order1 == pytest.approx(2.8284271247, rel=1e-9)
        assert order2 == pytest.approx(8 / 3, rel=1e-12)


def test_order_one_is_exp_of_scipys_shannon_entropy() -> None:
    """Order 1 equals exp of scipy.stats.entropy (natural log, a reference library) on
    uneven counts; empty counts give zeros, not an error."""
    counts = [31, 7, 7, 2, 1, 1, 120, 0]
    assert dv.hill_numbers(counts)[0] == pytest.approx(math.exp(entropy(counts)), rel=1e-12)
    assert dv.hill_numbers([]) == (0.0, 0.0) == dv.hill_numbers([0, 0])


@pytest.mark.parametrize(("rgb", "degrees", "index"), [
    ((255, 0, 0), 0, 0), ((0, 255, 0), 120, 4), ((0, 0, 255), 240, 8)])
def test_pure_srgb_primaries_land_in_the_bins_of_their_hsv_hue(
        rgb: tuple[int, int, int], degrees: int, index: int) -> None:
    """Pure sRGB red, green and blue have HSV hue 0, 120 and 240 degrees (A. R. Smith,
    "Color gamut transform pairs", SIGGRAPH 1978; Python's colorsys); a flat picture of each,
    through the colour facts ingest stores, lands in the bin centred there."""
    assert colorsys.rgb_to_hsv(*(c / 255 for c in rgb))[0] * 360 == pytest.approx(degrees)
    facts = colour_facts(Image.new("RGB", (40, 30), rgb))
    (colour,) = facts.colours
    assert dv.hue_bin(colour.hue) == index
    assert dv.hue_label(index).startswith(f"{degrees}° ")
    histogram = dv.hue_histogram([(colour.hue, colour.share)])
    assert histogram[index] == pytest.approx(1.0) and sum(histogram) == pytest.approx(1.0)


def test_hue_bins_are_centred_and_wrap_around() -> None:
    """Bin 0 covers 345-15 degrees (centred on red), bin 1 starts at 15 (our binning)."""
    assert [dv.hue_bin(h) for h in (0, 14.9, 15, 345, 344.9, 359.9, 360)] == [
        0, 0, 1, 0, 11, 0, 0]


@pytest.mark.parametrize(("text", "decade"), [
    ("1850", "1850s"), ("1850-03-14", "1850s"), ("1850s", "1850s"), ("185X", "1850s"),
    ("c. 1850", "1850s"),  # 1845-1855: the middle year 1850
    ("1895-1905", "1900s"), ("1850-1860", "1850s"), ("1848-1851", "1840s"),  # 1849.5 -> 1849
    ("1850-1870", "1860s"),  # 20 years: still given its middle decade
    ("1850-1871", dv.WIDE_RANGE), ("19th century", dv.WIDE_RANGE), ("1800s", dv.WIDE_RANGE),
    ("before 1900", dv.WIDE_RANGE), ("n.d.", dv.NOT_READ), ("", dv.NO_DATE), (None, dv.NO_DATE),
])
def test_decade_rule(text: str | None, decade: str) -> None:
    """Dates read by collector.checks.dates count in one decade by the documented rule."""
    assert dv.decade_of(text) == decade


def test_decades_are_in_time_order_then_the_rest() -> None:
    """Decades sorted by year (1900s after 1850s, not by text), then wide, unread, undated."""
    got = dv.decades({"": 3, "1901": 1, "n.d.": 2, "1850s": 4, "c. 1852": 1, "1800s": 5})
    assert list(got.items()) == [("1850s", 5), ("1900s", 1), (dv.WIDE_RANGE, 5),
                                 (dv.NOT_READ, 2), (dv.NO_DATE, 3)]


def test_warnings_appear_above_the_thresholds_and_not_at_them() -> None:
    """Exactly half is not "more than half"; near copies warn only above the threshold; a
    missing creator is never "one creator"."""
    even = {"a": 5, "b": 5}
    assert dv.warnings(10, even, even, 1, 0.1) == []
    creator = dv.warnings(10, {"a": 6, "b": 4}, even, 1, 0.1)
    assert len(creator) == 1 and creator[0].startswith("One creator, a, holds 6 of the 10")
    source = dv.warnings(10, even, {"s": 6, "t": 4}, 1, 0.1)
    assert len(source) == 1 and "One source, s," in source[0]
    assert dv.warnings(10, {dv.NO_CREATOR: 9, "a": 1}, even, 1, 0.1) == []
    near = dv.warnings(10, even, even, 2, 0.1)
    assert len(near) == 1 and "Near duplicates make up 2 of the 10 files" in near[0]
    assert dv.warnings(10, even, even, 1, 0.09) and not dv.warnings(10, even, even, 1, 0.1)
    assert dv.warnings(0, {}, {}, 0, 0.0) == []


def test_the_recipe_checks_the_threshold() -> None:
    """[datasheet] near_duplicate_warning defaults to 0.1, must lie in 0-1, and a misspelt key
    is named with its correction (collector.schema)."""
    assert parse_recipe(RECIPE, Path("r.toml")).datasheet.near_duplicate_warning == 0.1
    with pytest.raises(RecipeError) as bad:
        parse_recipe(RECIPE.replace("[images]", "[datasheet]\nnear_duplicate_warning = 1.5\n\n"
                                    "[images]"), Path("r.toml"))
    assert "datasheet.near_duplicate_warning: must be between 0 and 1, got 1.5" in str(bad.value)
    with pytest.raises(RecipeError) as typo:
        parse_recipe(RECIPE.replace("[images]", "[datasheet]\nnear_duplicate_warnings = 0.2\n\n"
                                    "[images]"), Path("r.toml"))
    assert "did you mean 'near_duplicate_warning'" in str(typo.value)


@pytest.fixture(scope="module")
def coll(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """The datasheet fixture collection (scans and a web source)."""
    return build_collection(tmp_path_factory.mktemp("diversity") / "leaves")


def _release(coll: Path) -> list[tuple]:
    """(source, creator, date, width, height, state, greyscale) of the accepted files that
    are not set aside, read with SQL of the test's own."""
    with sqlite3.connect(coll / "ledger.sqlite") as con:
        return con.execute(
            "SELECT s.name, coalesce(i.creator, ''), i.date, f.width, f.height, i.state, "
            "f.greyscale FROM files f JOIN items i ON i.id = f.first_item_id "
            "JOIN sources s ON s.id = i.source_id WHERE i.state IN ('stored', "
            "'near_duplicate') AND f.set_aside IS NULL").fetchall()


def test_panel_numbers_match_the_ledger(coll: Path) -> None:
    """Shares, effective numbers, sizes and near copies of the export equal counts of the
    test's own over the ledger; colours of every measured file are read (no sample)."""
    d = export_datasheet(coll, out=coll.parent / "sheet-numbers").facts["diversity"]
    rows = _release(coll)
    by_source: dict[str, int] = {}
    for row in rows:
        by_source[row[0]] = by_source.get(row[0], 0) + 1
    assert d["files"] == len(rows) == 10
    assert {r["name"]: r["files"] for r in d["by_source"]} == by_source
    assert d["sources"]["order2"] == pytest.approx(
        1 / sum((n / len(rows)) ** 2 for n in by_source.values()))
    assert sum(d["pixels"]) == sum(d["aspect"]) == len(rows)
    assert d["pixels"][dv.bin_index(max(r[3] * r[4] for r in rows) / 1e6,
                                    dv.PIXEL_EDGES)] >= 1
    assert d["near"] == {"clusters": 1, "largest": 2,
                         "files": sum(1 for r in rows if r[5] == "near_duplicate")}
    assert d["greyscale_files"] == sum(1 for r in rows if r[6] == 1) == 1
    assert d["measured_files"] == d["colour_files_read"] == len(rows)
    assert sum(d["lightness"]) == pytest.approx(len(rows), abs=0.01)  # one picture adds 1
    assert sum(d["chroma"]) == pytest.approx(len(rows), abs=0.01)
    coloured = sum(d["hues"]) + d["grey_weight"]
    assert 0 < coloured <= len(rows) - d["greyscale_files"] + 0.01


def test_warnings_follow_the_recipe_threshold_and_set_aside_files(coll: Path,
                                                                   tmp_path: Path) -> None:
    """The fixture's release: one source and one creator hold 6 of 10 files, 1 near copy
    (10 %). Both warnings show, the near-copy one only under a threshold below 10 %; with
    two of that source's files set aside (left out of releases) only the near one remains."""
    md = (export_datasheet(coll, out=tmp_path / "a").out / "datasheet.md").read_text()
    assert "Warning: One source, scanner-by, holds 6 of the 10 files" in md
    assert "Warning: One creator, Fernhollow Field Society, holds 6 of the 10 files" in md
    assert "Warning: Near duplicates" not in md
    caution = md.split("> **Caution**")[1].split("\n\n")[0]  # also in the caution box
    assert "> - One source, scanner-by, holds 6 of the 10 files" in caution
    recipe = coll / "recipe.toml"
    text = recipe.read_text()
    try:
        recipe.write_text(text.replace("[images]", "[datasheet]\nnear_duplicate_warning = "
                                       "0.05\n\n[images]"))
        html = (export_datasheet(coll, out=tmp_path / "b").out / "datasheet.html").read_text()
        assert "Warning: Near duplicates make up 1 of the 10 files" in html
        with sqlite3.connect(coll / "ledger.sqlite") as con:
            con.execute("UPDATE files SET set_aside = 'greyscale', set_aside_detail = 'test' "
                        "WHERE sha256 IN (SELECT f.sha256 FROM files f JOIN items i ON "
                        "i.id = f.first_item_id JOIN sources s ON s.id = i.source_id WHERE "
                        "s.name = 'scanner-by' AND i.state = 'stored' ORDER BY f.sha256 "
                        "LIMIT 2)")
        with Ledger.open(coll / "ledger.sqlite", readonly=True) as ledger:
            d = dv.panel_from_ledger(ledger, 0.05)
    finally:
        recipe.write_text(text)
        with sqlite3.connect(coll / "ledger.sqlite") as con:
            con.execute("UPDATE files SET set_aside = NULL, set_aside_detail = NULL")
    assert d["files"] == 8 and {r["name"]: r["files"] for r in d["by_source"]}[
        "scanner-by"] == 4
    assert len(d["warnings"]) == 1  # no creator or source warning left; the near one stays
    assert d["warnings"][0].startswith("Near duplicates make up 1 of the 8 files")


def test_colours_of_large_releases_are_read_from_an_even_sample(
        coll: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    """Above the cap, every k-th measured file's colours are read and scaled up to all
    measured files: the lightness total still counts one per picture."""
    monkeypatch.setattr(dv, "MAX_COLOUR_FILES", 3)
    with Ledger.open(coll / "ledger.sqlite", readonly=True) as ledger:
        d = dv.panel_from_ledger(ledger, 0.1)
    assert 0 < d["colour_files_read"] < d["measured_files"] == 10
    assert sum(d["lightness"]) == pytest.approx(10, abs=0.01)
    assert sum(d["chroma"]) == pytest.approx(10, abs=0.01)
    assert np.isfinite(d["hues"]).all() and sum(d["hues"]) > 0


def test_near_copies_group_under_the_original_their_chain_leads_to(tmp_path: Path) -> None:
    """A near copy of an item that was itself later demoted to a near copy (ingest's
    take-over: its duplicate_of set) belongs to the first item's group: originals A and E,
    B -> A, C -> A (demoted), D -> C, F -> E gives 2 groups, the largest A+B+C+D = 4 files,
    4 near copies (the grouping rule of collector.run.dedup; no outside source)."""
    from collector.storage import diversity_queries

    with Ledger.create(tmp_path / "ledger.sqlite") as ledger:
        source = ledger.source_id("desk", "scans", {})
        ids: dict[str, int] = {}
        for n, (key, state, up) in enumerate([("A", "stored", None), ("B", "near_duplicate", "A"),
                                              ("C", "near_duplicate", "A"),
                                              ("D", "near_duplicate", "C"),
                                              ("E", "stored", None),
                                              ("F", "near_duplicate", "E")]):
            ids[key] = item = ledger.add_item(source, key, {})
            sha = f"{n:064x}"
            ledger.add_file({"sha256": sha, "size": 1, "ext": "png", "width": 4, "height": 2,
                             "first_item_id": item})
            ledger.update_item(item, state=state, file_sha256=sha,
                               duplicate_of=ids[up] if up else None)
        assert diversity_queries._near_clusters(ledger) == (2, 4, 4)
        d = dv.panel_from_ledger(ledger, 0.5)
    assert d["near"] == {"clusters": 2, "largest": 4, "files": 4} and d["files"] == 6
    assert d["warnings"] == [
        "One source, desk, holds 6 of the 6 files of this release (100 %), more than half: a "
        "model trained on it will lean towards this source.",
        "Near duplicates make up 4 of the 6 files of this release (67 %), more than the "
        "recipe's [datasheet] near_duplicate_warning of 50 %: repeated pictures weigh more in "
        "training than single ones."]
    assert d["measured_files"] == 0 and sum(d["hues"]) == 0  # no colour facts: nothing drawn
