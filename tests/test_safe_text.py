"""Text from servers and files is shown safely: CSV cells never start a spreadsheet formula,
and terminal output never carries control sequences or bidi overrides.

Sources: OWASP "CSV Injection" (cells beginning with =, +, -, @, tab, CR are neutralised with a
leading single quote); ECMA-48 §5 (C0/C1 control functions, ESC-introduced sequences);
Unicode TR 9 §2 (explicit directional formatting characters).
"""

from __future__ import annotations

import csv
import io
import sqlite3
from pathlib import Path

import pytest
from support.collections import scans_collection
from typer.testing import CliRunner

from collector.cli import app
from collector.display import PlainProgress
from collector.exports.datasheet import export_datasheet
from collector.safe_text import csv_cell, csv_row, for_terminal, one_line
from collector.storage.collection import Collection

FORMULAS = ['=HYPERLINK("http://127.0.0.59/x","click")', "+cmd|' /C calc'!A0", "@SUM(1+1)*cmd",
            "-2+3", "\t=1+1", "\r=1+1"]
SPOOF = "Leaf\x1b[1A\x1b[2K\r  allowed: yes (spoofed)\x1b]0;owned\x07 \u202eCC0\u202c"


@pytest.mark.parametrize("cell", FORMULAS)
def test_formula_cells_get_a_leading_quote(cell: str) -> None:
    """Every OWASP trigger character at the start of a cell is neutralised."""
    assert csv_cell(cell) == "'" + cell


@pytest.mark.parametrize("value", ["Bracken frond", "2026-03-01", 42, -7, None, ""])
def test_ordinary_cells_and_numbers_are_unchanged(value: object) -> None:
    """Text that starts harmlessly, and numbers (not text), are written as they are."""
    assert csv_cell(value) == value


@pytest.mark.parametrize(("value", "cell"), [
    ("Leaf\x00one", "Leaf\\x00one"), ("=\x00SUM(1)", "'=\\x00SUM(1)"),
    ("\x00=1+1", "\\x00=1+1"), ("a\x85b\x7f", "a\\x85b\\x7f"),
    ("two\nlines\r\tend", "two\nlines\r\tend"), ("\u2028\ufffd é", "\u2028\ufffd é"),
    ("\tx", "'\tx"), (7, 7), (None, None)])
def test_csv_cells_show_controls_as_escapes_then_neutralise_formulas(value: object,
                                                                     cell: object) -> None:
    """A CSV cell follows the datasheet's rule (C0 but TAB, LF, CR; DEL; C1 as ``\\xNN``:
    XML 1.0 §2.2 Char, HTML Standard §13.2.3.5, from memory), line breaks kept for quoting
    (RFC 4180 §2 rule 6), and the OWASP quote is decided on the escaped text; csv_row
    (inlined) agrees."""
    assert csv_cell(value) == cell
    assert csv_row({"k": value}) == {"k": cell}


def test_control_and_bidi_characters_are_shown_as_escapes() -> None:
    """ESC, CR, BEL, C1 CSI and RLO become visible escapes; one_line also escapes newlines,
    for_terminal keeps them."""
    shown = one_line(SPOOF + "\n\x9b2J")
    for raw in ("\x1b", "\r", "\x07", "\u202e", "\n", "\x9b"):
        assert raw not in shown
    assert "\\x1b[1A" in shown and "\\u202e" in shown and "\\x0a" in shown and "\\x9b" in shown
    assert for_terminal("a\nb\x1b") == "a\nb\\x1b"


@pytest.fixture
def hostile_collection(tmp_path: Path) -> Collection:
    """Two stored scans whose titles and creators are then set to what a hostile archive
    could send (written into the ledger the way a source's fields are recorded)."""
    col = scans_collection(tmp_path / "c", 2)
    with sqlite3.connect(col.ledger_path) as conn:
        ids = [r[0] for r in conn.execute("SELECT id FROM items ORDER BY id")]
        assert len(ids) == 2
        conn.execute("UPDATE items SET title = ?, creator = ? WHERE id = ?",
                     (FORMULAS[0], FORMULAS[2], ids[0]))
        conn.execute("UPDATE items SET title = ?, creator = ? WHERE id = ?",
                     (SPOOF, FORMULAS[3], ids[1]))
    return col


def csv_cells(path: Path) -> list[str]:
    """Every cell of a CSV file."""
    with open(path, newline="", encoding="utf-8") as fh:
        return [cell for row in csv.reader(fh) for cell in row]


def test_exported_csvs_hold_no_formula_cells(hostile_collection: Collection) -> None:
    """provenance.csv and attribution.csv: no cell starts with a trigger character, and the
    hostile titles are still there, behind a quote."""
    result = export_datasheet(hostile_collection.root)
    for name in ("provenance.csv", "attribution.csv"):
        cells = csv_cells(result.out / name)
        assert cells
        assert not [c for c in cells if c.startswith(("=", "+", "-", "@", "\t", "\r"))], name
        assert "'" + FORMULAS[0] in cells and "'" + FORMULAS[3] in cells


def test_trace_csv_holds_no_formula_cells(hostile_collection: Collection, tmp_path: Path,
                                          monkeypatch: pytest.MonkeyPatch) -> None:
    """trace --csv neutralises its cells too (here a file name that is a formula)."""
    stored = next(p for _, p in hostile_collection.store.iter_stored())
    work = tmp_path / "work"
    work.mkdir()
    (work / "=SUM(1+1).png").write_bytes(stored.read_bytes())
    monkeypatch.chdir(work)
    out = CliRunner().invoke(app, ["trace", "=SUM(1+1).png", "--in",
                                   str(hostile_collection.root), "--csv"])
    assert out.exit_code == 0, out.output
    cells = [c for row in csv.reader(io.StringIO(out.stdout)) for c in row]
    assert "'=SUM(1+1).png" in cells
    assert not [c for c in cells if c.startswith(("=", "+", "-", "@", "\t", "\r"))]


def test_trace_never_prints_a_control_sequence(hostile_collection: Collection) -> None:
    """A title carrying cursor-up, erase-line, an OSC title and an RLO is printed escaped:
    the terminal gets none of them, and no line can be overwritten or faked."""
    files = [p for _, p in hostile_collection.store.iter_stored()]
    out = CliRunner().invoke(app, ["trace", *map(str, files), "--in",
                                   str(hostile_collection.root)])
    assert out.exit_code == 0, out.output
    for raw in ("\x1b", "\r", "\x07", "\u202e"):
        assert raw not in out.output
    assert "\\x1b[1A" in out.output
    assert not any(line.lstrip().startswith("allowed: yes (spoofed)")
                   for line in out.output.splitlines())


def test_status_and_progress_lines_escape_server_text(hostile_collection: Collection) -> None:
    """A note message from a server is shown escaped by the plain progress view."""
    stream = io.StringIO()
    PlainProgress(stream).event("note", source="desk", note="bad_json", message=SPOOF)
    assert "\x1b" not in stream.getvalue() and "\\x1b" in stream.getvalue()
    status = CliRunner().invoke(app, ["status", str(hostile_collection.root)])
    assert status.exit_code == 0
    assert "\x1b" not in status.output
