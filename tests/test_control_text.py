"""NUL and other control characters in listed text reach the pages collector writes as escapes.

JSON may carry ``"\\u0000"`` in any string (RFC 8259 §7). The ledger keeps the text as
received; the datasheet (HTML with inline SVG plots, Markdown), the review sheet and the CSV
files (provenance.csv, attribution.csv, ``trace --csv``) show each control character as an
escape (``\\x00``), the way the terminal does. Written raw, an HTML
parser drops U+0000 from text ("in body" insertion mode, HTML Standard §13.2.6.4.7) and
reports the other controls (control-character-in-input-stream, §13.2.3.5); XML 1.0 §2.2
(Char) leaves them out of SVG; CommonMark §2.3 replaces U+0000 by U+FFFD (all from memory).
"""

from __future__ import annotations

import csv
import io
import json
import re
from pathlib import Path

import pytest
from support.collections import one_listing_recipe, serve_leaves
from support.server import LoopbackServer
from typer.testing import CliRunner

from collector.cli import app
from collector.exports.datasheet import export_datasheet
from collector.run.gather import gather
from collector.safe_text import for_document
from collector.storage.collection import Collection, init_collection

# What no page we write may hold: C0 controls but TAB, LF, CR; DEL; C1 controls.
CONTROLS = re.compile("[\x00-\x08\x0b\x0c\x0e-\x1f\x7f-\x9f]")


def test_for_document_escapes_controls_and_keeps_line_breaks() -> None:
    """NUL, ESC, DEL and a C1 control become escapes; TAB, LF and CR stay (XML 1.0 §2.2
    Char allows #x9, #xA, #xD); other text, U+FFFD included, is unchanged."""
    assert for_document("a\x00b\x1bc\x7fd\x85e") == "a\\x00b\\x1bc\\x7fd\\x85e"
    assert for_document("tab\tline\nret\r\ufffd é") == "tab\tline\nret\r\ufffd é"


@pytest.fixture(scope="module")
def nul_collection(tmp_path_factory: pytest.TempPathFactory) -> Collection:
    """One gather over a JSON listing whose texts hold control characters (JSON escapes on
    the wire: ``"\\u0000"``): NUL and SOH in item 1, a line break, NEL (C1), DEL and a tab in
    item 2's title, ESC behind a formula character in item 0's creator."""
    with LoopbackServer("127.0.0.1") as server:
        leaves = serve_leaves(server, 3)
        leaves[0]["creator"] = "@\x1bcmd"
        leaves[1]["title"] = "Leaf\x00one"
        leaves[1]["creator"] = "Ann\x00Ex\x01"
        leaves[2]["title"] = "Two\nlines\x85 \x7f\tend"
        body = json.dumps({"results": leaves}).encode()
        assert b"\\u0000" in body
        server.route("/api", (200, body, {"Content-Type": "application/json"}))
        col = init_collection(tmp_path_factory.mktemp("control") / "col",
                              contact="x@example.org")
        recipe = one_listing_recipe(server.url("/api"), min_interval=0.0)
        col.recipe_path.write_text(recipe + 'creator = "creator"\n')
        assert gather(col).outcome == "finished"
    return col


def test_nul_in_a_listing_is_kept_in_the_ledger_and_escaped_in_pages(
        nul_collection: Collection, tmp_path: Path) -> None:
    """A title and creator holding NUL (JSON "\\u0000"): the items are stored, the ledger
    keeps the text as received, and datasheet.html (its inline SVG plots included),
    datasheet.md and the review sheet hold no control character but show ``\\x00``."""
    col = nul_collection
    with col.ledger(readonly=True) as ledger:
        row = ledger.query("SELECT state, title, creator FROM items WHERE source_key = '1'")[0]
    assert (row["state"], row["title"], row["creator"]) == ("stored", "Leaf\x00one",
                                                              "Ann\x00Ex\x01")
    sheet = tmp_path / "sheet"
    export_datasheet(col.root, out=sheet)
    review = tmp_path / "review"
    result = CliRunner().invoke(app, ["review", str(col.root), "--out", str(review)])
    assert result.exit_code == 0, result.output
    pages = {p: p.read_text("utf-8") for folder in (sheet, review) for p in folder.rglob("*")
             if p.suffix in (".html", ".md")}
    assert {"datasheet.html", "datasheet.md", "review.html"} <= {p.name for p in pages}
    for path, text in pages.items():
        assert not CONTROLS.search(text), (path, CONTROLS.search(text))
    html = pages[sheet / "datasheet.html"]
    assert "Ann\\x00Ex\\x01" in html and "<svg" in html
    assert "Ann\\x00Ex\\x01" in pages[sheet / "datasheet.md"]
    assert any("Leaf\\x00one" in text for path, text in pages.items() if review in path.parents)


def _read_csv(text: str) -> list[list[str]]:
    """Rows as Python's csv module (the reference reader) reads them."""
    return list(csv.reader(io.StringIO(text, newline="")))


def test_exported_csvs_show_controls_as_escapes_and_keep_line_breaks(
        nul_collection: Collection, tmp_path: Path) -> None:
    """provenance.csv, attribution.csv and ``trace --csv`` hold no control character but TAB,
    LF and CR (the datasheet's rule: a NUL reads as ``\\x00``, NEL as ``\\x85``, DEL as
    ``\\x7f``); a line break inside a title stays, inside a quoted field (RFC 4180 §2 rule 6),
    so every row read back by the csv module has the header's width; a formula character
    still gets its quote (OWASP "CSV Injection") after the escape."""
    col = nul_collection
    sheet = tmp_path / "sheet"
    export_datasheet(col.root, out=sheet)
    with col.ledger(readonly=True) as ledger:
        sha = ledger.query("SELECT file_sha256 FROM items WHERE source_key = '1'")[0][
            "file_sha256"]
    stored = col.store.find(sha)
    assert stored is not None
    traced = CliRunner().invoke(app, ["trace", str(stored), "--in", str(col.root), "--csv"])
    assert traced.exit_code == 0, traced.output
    texts = {name: (sheet / name).read_bytes().decode("utf-8")  # line ends as written
             for name in ("provenance.csv", "attribution.csv")}
    texts["trace --csv"] = traced.stdout
    for name, text in texts.items():
        assert not CONTROLS.search(text), (name, CONTROLS.search(text))
        rows = _read_csv(text)
        assert len(rows) >= 2 and {len(r) for r in rows} == {len(rows[0])}, name
    cells = {name: {c for row in _read_csv(text) for c in row} for name, text in texts.items()}
    for name in ("provenance.csv", "attribution.csv"):
        assert {"Leaf\\x00one", "Ann\\x00Ex\\x01", "Two\nlines\\x85 \\x7f\tend",
                "'@\\x1bcmd"} <= cells[name], name
        assert '"Two\nlines\\x85 \\x7f\tend"' in texts[name]  # quoted, the line break raw
    assert {"Leaf\\x00one", "Ann\\x00Ex\\x01"} <= cells["trace --csv"]
