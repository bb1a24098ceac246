"""Partial releases: a selection by licence holds exactly the expected files (checked against
the demo archive's manifest), whole scanner beds whose crops are released and blank scans are
left out and counted, released names are readable, unique and valid on every common file
system; source notes are listed without SQL."""

from __future__ import annotations

import csv
import re
from pathlib import Path

import pytest
from support.collections import one_page_recipe
from typer.testing import CliRunner

from collector.cli import app
from collector.demo_site import DemoServer
from collector.demo_site.recipes import render
from collector.errors import CollectionError
from collector.exports.datasheet import export_datasheet
from collector.exports.notes import list_notes
from collector.exports.release import parse_selection, readable_name
from collector.run.gather import gather
from collector.storage.collection import Collection, init_collection

runner = CliRunner()

# Microsoft Learn, "Naming Files, Paths, and Namespaces" (Win32 file namespace): reserved
# device names, also followed by an extension; reserved characters and 0-31; no trailing
# dot or space. 255 bytes: the name limit of ext4, NTFS and APFS (from memory).
WINDOWS_RESERVED = {"CON", "PRN", "AUX", "NUL", *(f"COM{n}" for n in range(1, 10)),
                    *(f"LPT{n}" for n in range(1, 10))}


def valid_everywhere(name: str) -> bool:
    """Whether ``name`` is a valid file name on Windows, macOS and Linux."""
    return (0 < len(name.encode()) <= 255 and not re.search(r'[<>:"/\\|?*\x00-\x1f]', name)
            and not name.endswith((".", " "))
            and name.split(".")[0].rstrip(" ").upper() not in WINDOWS_RESERVED)


@pytest.mark.parametrize(("source", "key"), [
    ("CON", "aux"), ("nul.txt", "COM1.png"), ("lpt9", ""), ("a<b>c", 'd:e"f/g\\h|i?j*k'),
    ("trailing. ", "dots... "), ("Fougère – été", "Ørsted/№7"), ("", None),
    ("\x00\x1f", "\t\n"), ("x" * 400, "y" * 400), ("..", "."),
])
def test_readable_names_are_valid_on_every_file_system(source: str, key: str | None) -> None:
    """Hostile source names and keys still give a name Windows, macOS and Linux accept."""
    name = readable_name(source, key, "ab" * 32, "jpg")
    assert valid_everywhere(name), name
    assert name.endswith("-abababababab.jpg")


def test_the_checker_itself_refuses_bad_names() -> None:
    """The validity check above is not vacuous: the names Windows refuses fail it."""
    for bad in ("CON.jpg", "nul", "a:b.jpg", "a.jpg.", "a.jpg ", "a?b", "COM1.tar.gz"):
        assert not valid_everywhere(bad), bad


def test_readable_names_keep_the_words() -> None:
    """The source, the key and 12 hex digits of the sha256 are all in the name."""
    assert readable_name("api-pages", "FH-S-0001", "0123456789abcdef" * 4, "JPG") == (
        "api-pages-FH-S-0001-0123456789ab.jpg")
    assert readable_name("scanner", "scan-01.png#crop3", "f" * 64, "png") == (
        "scanner-scan-01_png_crop3-ffffffffffff.png")


@pytest.mark.parametrize(("only", "words"), [
    (["licence"], "NAME=VALUE"), (["colour=red"], "NAME=VALUE"), (["source="], "NAME=VALUE"),
    (["date=2020"], "FROM..TO"),
])
def test_a_bad_selection_is_a_clear_error(only: list[str], words: str) -> None:
    """Every problem of a selection is named with the syntax to use."""
    with pytest.raises(CollectionError, match=words):
        parse_selection(only)


def test_a_sha256_file_is_read_and_checked(tmp_path: Path) -> None:
    """One digest a line, comments allowed; a line that is not a SHA-256 is named."""
    good = tmp_path / "good.txt"
    good.write_text("# chosen\n" + "AB" * 32 + "  # upper case is fine\n\n")
    assert parse_selection([], good).sha256s == {"ab" * 32}
    bad = tmp_path / "bad.txt"
    bad.write_text("ab" * 32 + "\nnot-a-hash\n")
    with pytest.raises(CollectionError, match=r"bad.txt:2"):
        parse_selection([], bad)


@pytest.fixture(scope="module")
def mixed(tmp_path_factory: pytest.TempPathFactory, demo_server: DemoServer,
          demo_content: Path) -> Collection:
    """The demo's first listing page (ten web items, several licences) and its scanner beds
    (crops, a blank bed), gathered once."""
    demo_server.reset()
    demo = render("demo", demo_server.port, demo_content / "scans")
    start = demo.index("[[sources]]\nname = \"scanner\"")
    end = demo.find("[[sources]]", start + 1)
    scans = demo[start:end if end != -1 else None]  # the scanner source alone
    col = init_collection(tmp_path_factory.mktemp("release") / "c", contact="me@example.org")
    web = one_page_recipe(demo_server.port).replace("min_side = 128", "min_side = 32")
    col.recipe_path.write_text(web + "\n" + scans)  # small crops kept too
    assert gather(col).outcome == "finished"
    return col


def _rows(out: Path) -> list[dict[str, str]]:
    with open(out / "provenance.csv", newline="") as fh:
        return list(csv.DictReader(fh))


def test_a_release_by_licence_holds_exactly_the_expected_files(
        mixed: Collection, demo_server: DemoServer, tmp_path: Path) -> None:
    """licence=CC-BY-4.0: the web items the manifest declares CC-BY-4.0 and every crop of
    the scanner beds; no whole bed whose crops are released, no blank bed; each exclusion
    counted; names readable, unique and valid everywhere."""
    manifest = demo_server.manifest
    first_page = [i for i in manifest["items"] if i["source"] == "api-pages"][:10]
    web = {i["sha256"] for i in first_page if i["expected_spdx"] == "CC-BY-4.0"}
    beds = manifest["scans"]
    # Items touching on a bed are one crop (the manifest's touching pairs).
    crops = sum(len(bed["items"]) - len(bed["touching_pairs"]) for bed in beds)
    export = export_datasheet(mixed.root, out=tmp_path / "r", with_images=True,
                              selection=parse_selection(["licence=CC-BY-4.0"]))
    rows = _rows(tmp_path / "r")
    assert {r["sha256"] for r in rows if r["source"] == "api-pages"} == web
    scanned = [r for r in rows if r["source"] == "scanner"]
    assert len(scanned) == crops and all("_crop" in r["file_name"] for r in scanned)
    assert not {r["sha256"] for r in rows} & {bed["sha256"] for bed in beds}
    excluded = export.counts.excluded
    assert excluded["whole_scan"] == sum(1 for bed in beds if not bed["blank"])
    assert excluded["blank_scan"] == sum(1 for bed in beds if bed["blank"]) == 1
    assert excluded["not_selected"] == len(first_page) - len(web)
    names = [r["file_name"] for r in rows]
    assert len(set(names)) == len(names) and all(valid_everywhere(n) for n in names)
    assert sorted(p.name for p in (tmp_path / "r" / "images").iterdir()) == sorted(names)
    with open(tmp_path / "r" / "attribution.csv", newline="") as fh:
        assert sorted(r["file_name"] for r in csv.DictReader(fh)) == sorted(names)
    text = (tmp_path / "r" / "datasheet.md").read_text()
    assert "Selection: licence = CC-BY-4.0" in text and "blank scans | 1" in text


def test_whole_beds_and_blank_scans_can_be_kept(mixed: Collection, demo_server: DemoServer,
                                                tmp_path: Path) -> None:
    """--keep-whole-scans and --keep-blank-scans put the beds back (command line)."""
    out = tmp_path / "r"
    result = runner.invoke(app, ["datasheet", str(mixed.root), "--out", str(out), "--only",
                                 "source=scanner", "--keep-whole-scans", "--keep-blank-scans"])
    assert result.exit_code == 0, result.output
    beds = {bed["sha256"] for bed in demo_server.manifest["scans"]}
    assert beds <= {r["sha256"] for r in _rows(out)}


def test_source_notes_are_listed_by_kind_and_source(mixed: Collection) -> None:
    """The blank bed's note is found by kind and source; a kind never seen is an error that
    names the kinds the ledger has (a typo is not "no notes")."""
    with mixed.ledger(readonly=True) as ledger:
        blank = list_notes(ledger, kinds=("blank_scan",), sources=("scanner",))
        assert len(blank) == 1 and "scan-04-blank" in blank[0].message
        assert list_notes(ledger, kinds=("blank_scan",), sources=("api-pages",)) == []
        with pytest.raises(CollectionError, match="blank_scan"):
            list_notes(ledger, kinds=("blank-scan",))
    result = runner.invoke(app, ["notes", str(mixed.root), "--kind", "touching_items"])
    assert result.exit_code == 0 and "touching_items:" in result.output
