"""SQL text lives only in the ledger and its queries module.

Every other module asks :class:`collector.storage.ledger.Ledger` (writes) or
:mod:`collector.storage.queries` (reads); a string that reads like an SQL statement anywhere
else in ``collector/`` or ``sources/`` fails here. Common practice, no source.
"""

from __future__ import annotations

import ast
import re
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent
# Reads are split by what they serve (status and trace; the datasheet and release; upkeep), so
# each module stays small; every one runs its SQL through the ledger's read helpers.
SQL_HOMES = {"collector/storage/ledger.py", "collector/storage/queries.py",
             "collector/storage/datasheet_queries.py", "collector/storage/upkeep_queries.py"}

# Upper-case SQL, as this project writes it: a statement anywhere in a string, or a string
# that starts with a clause (a fragment joined into a statement elsewhere).
_STATEMENT = re.compile(
    r"\bSELECT\s.*\bFROM\b|\bSELECT\s+(count|max|min|sum|coalesce)\(|"
    r"\bINSERT\s+(OR\s+[A-Z]+\s+)?INTO\b|\bUPDATE\s+\w+\s+SET\b|\bDELETE\s+FROM\b|"
    r"\bCREATE\s+(TABLE|INDEX|VIEW|TRIGGER)\b|\bDROP\s+(TABLE|INDEX)\b|"
    r"\bALTER\s+TABLE\b|\bPRAGMA\s+\w+", re.DOTALL)
_CLAUSE = re.compile(r"^\s*(FROM|WHERE|JOIN|GROUP BY|ORDER BY|AND|OR|LIMIT|VALUES|SET)\s+"
                     r"[\w(]")


def looks_like_sql(text: str) -> bool:
    """True for a string constant that holds SQL (a statement or a clause fragment)."""
    return bool(_STATEMENT.search(text) or _CLAUSE.match(text))


def python_files() -> list[Path]:
    """Every module of the package and of the built-in source kinds (``collector/sources``
    and ``collector/demo_site`` are links to the top-level folders: read once, as
    ``sources/``; the demo site never talks to a ledger)."""
    linked = ("collector/sources/", "collector/demo_site/")
    files = [p for p in (ROOT / "collector").rglob("*.py")
             if not p.relative_to(ROOT).as_posix().startswith(linked)]
    return sorted(files + list((ROOT / "sources").glob("*.py")))


def sql_strings(path: Path) -> list[tuple[int, str]]:
    """(line, text) of every string constant in ``path`` that looks like SQL; docstrings
    are prose and are skipped."""
    tree = ast.parse(path.read_text(encoding="utf-8"))
    docstrings = {id(node.body[0].value) for node in ast.walk(tree)
                  if isinstance(node, (ast.Module, ast.ClassDef, ast.FunctionDef,
                                       ast.AsyncFunctionDef))
                  and node.body and isinstance(node.body[0], ast.Expr)
                  and isinstance(node.body[0].value, ast.Constant)}
    return [(node.lineno, node.value) for node in ast.walk(tree)
            if isinstance(node, ast.Constant) and isinstance(node.value, str)
            and id(node) not in docstrings and looks_like_sql(node.value)]


@pytest.mark.parametrize("text", [
    "SELECT count(*) FROM files", "SELECT max(rowid) FROM files WHERE x = ?",
    "INSERT OR IGNORE INTO files (a) VALUES (?)", "UPDATE items SET state = ?",
    "DELETE FROM store_intents", "CREATE TABLE t (a)", "PRAGMA journal_mode=WAL",
    "FROM files f JOIN items i ON i.id = f.first_item_id ", " AND i.state = 'stored'",
    "SELECT f.sha256, f.ext,\n f.mime FROM files f",
])
def test_the_detector_finds_sql(text: str) -> None:
    """Statements and clause fragments, as this project writes them, count as SQL."""
    assert looks_like_sql(text)


@pytest.mark.parametrize("text", [
    "select", "the ledger records where each file came from",
    "Select the files to export, then delete them from your copy",
    "Update the recipe and run again", "from the collection's ledger",
    "and more", "https://example.org/?q=SELECT",
])
def test_the_detector_leaves_prose_alone(text: str) -> None:
    """Messages, recipe keys and prose that share words with SQL do not count."""
    assert not looks_like_sql(text)


def test_the_scan_covers_the_package_and_the_source_kinds() -> None:
    """The scan reads the ledger, the queries module, the run and every built-in kind."""
    names = {p.relative_to(ROOT).as_posix() for p in python_files()}
    assert names >= SQL_HOMES
    assert {"collector/run/gather.py", "collector/exports/datasheet.py",
            "sources/html_pages.py"} <= names
    assert any(sql_strings(ROOT / home) for home in SQL_HOMES)


def test_sql_lives_only_in_the_ledger_and_the_queries_module() -> None:
    """No module but ledger.py and queries.py holds SQL text."""
    found = [f"{path.relative_to(ROOT).as_posix()}:{line}: {text.strip()[:60]!r}"
             for path in python_files() if path.relative_to(ROOT).as_posix() not in SQL_HOMES
             for line, text in sql_strings(path)]
    assert not found, "SQL outside ledger.py/queries.py:\n" + "\n".join(found)


# Which driver modules each module may import. migrations.py: the schema history, written
# with sqlite-utils' table API and called only by Ledger.migrate inside its translation.
DRIVER_HOMES = {"collector/storage/ledger.py": {"sqlite3", "sqlite_utils"},
                "collector/storage/migrations.py": {"sqlite_utils"},
                # imports it once with pandas/numpy hidden (fast start); calls nothing of it
                "collector/storage/__init__.py": {"sqlite_utils"}}


def test_only_the_ledger_imports_sqlite() -> None:
    """Only ledger.py imports sqlite3 or sqlite_utils (and migrations.py, which Ledger.migrate
    alone calls, sqlite_utils): no other module can meet a raw sqlite3.Error, so the ledger's
    one translation is the only one."""
    drivers = {"sqlite3", "sqlite_utils"}
    found = []
    for path in python_files():
        name = path.relative_to(ROOT).as_posix()
        for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
            modules = ([a.name for a in node.names] if isinstance(node, ast.Import)
                       else [node.module or ""] if isinstance(node, ast.ImportFrom) else [])
            imported = drivers & {m.split(".")[0] for m in modules}
            if imported - DRIVER_HOMES.get(name, set()):
                found.append(f"{name}:{node.lineno}")
    assert not found, found


def test_only_the_ledger_calls_the_migrations() -> None:
    """The migrations module is imported by ledger.py alone, so every migration runs inside
    Ledger.migrate (one transaction, the one error translation)."""
    users = []
    for path in python_files():
        for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
            names = ([a.name for a in node.names] if isinstance(node, ast.Import)
                     else [f"{node.module}.{a.name}" for a in node.names]
                     + [node.module or ""] if isinstance(node, ast.ImportFrom) else [])
            if any(n.startswith("collector.storage.migrations") for n in names):
                users.append(path.relative_to(ROOT).as_posix())
    assert users == ["collector/storage/ledger.py"]
