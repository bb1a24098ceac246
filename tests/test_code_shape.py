"""Module and function size: no module over 600 lines, no function over 60 lines.

The project rule (DEVELOPERS.md, Conventions): a module holds one concern and a function does
one thing; a long one is split by concern, not wrapped. Declarative functions (one big literal,
such as a JSON-LD document) are the exception, each listed in ALLOWED_LONG with its reason.
Common practice, no source.

``collector/sources`` and ``collector/demo_site`` are links to the top-level folders; the
source kinds are checked once, as ``sources/``, and the demo archive is exempt (it stands
alone and is not part of the package's code).
"""

from __future__ import annotations

import ast
import os
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent
MAX_MODULE_LINES = 600
MAX_FUNCTION_LINES = 60

# (module, qualified function name) -> why it may be long.
# (module, function) -> why it may be longer. None is needed today (the Croissant builders
# were split too); an entry must say why the function is declarative.
ALLOWED_LONG: dict[tuple[str, str], str] = {}


def python_files() -> list[Path]:
    """Every module of the package and of the built-in source kinds, links not followed (the
    linked ``collector/sources`` is read as ``sources/``; ``collector/demo_site`` is exempt)."""
    files: list[Path] = []
    for top in (ROOT / "collector", ROOT / "sources"):
        for dirpath, dirnames, filenames in os.walk(top):  # followlinks=False: links skipped
            dirnames[:] = sorted(d for d in dirnames if d != "__pycache__")
            files += [Path(dirpath) / f for f in sorted(filenames) if f.endswith(".py")]
    return files


def function_lengths(path: Path) -> dict[str, int]:
    """Qualified name (``Class.method``, ``outer.inner``) -> lines from ``def`` to the last
    line of the body, for every function in ``path``, nested ones included."""
    lengths: dict[str, int] = {}

    def visit(node: ast.AST, prefix: str) -> None:
        for child in ast.iter_child_nodes(node):
            if isinstance(child, (ast.FunctionDef, ast.AsyncFunctionDef, ast.ClassDef)):
                name = f"{prefix}{child.name}"
                if not isinstance(child, ast.ClassDef):
                    assert child.end_lineno is not None
                    lengths[name] = child.end_lineno - child.lineno + 1
                visit(child, f"{name}.")
            else:
                visit(child, prefix)

    visit(ast.parse(path.read_text(encoding="utf-8")), "")
    return lengths


def rel(path: Path) -> str:
    """``path`` relative to the checkout, with forward slashes."""
    return path.relative_to(ROOT).as_posix()


def test_the_walk_finds_the_package_and_skips_the_links() -> None:
    """The files checked include core, fetching and sources modules but nothing through a link."""
    names = {rel(p) for p in python_files()}
    assert {"collector/cli.py", "collector/fetching/fetcher.py", "sources/json_api.py"} <= names
    assert not any(n.startswith(("collector/sources/", "collector/demo_site/")) for n in names)
    assert (ROOT / "collector" / "sources").is_symlink()


def test_function_lengths_count_from_def_to_the_last_line(tmp_path: Path) -> None:
    """A 3-line method and a nested function are measured by their own lines, qualified."""
    sample = tmp_path / "sample.py"
    sample.write_text("class A:\n"
                      "    def f(self):\n"
                      "        x = 1\n"
                      "        return x\n"
                      "\n"
                      "def g():\n"
                      "    def h():\n"
                      "        pass\n"
                      "    return h\n", encoding="utf-8")
    assert function_lengths(sample) == {"A.f": 3, "g": 4, "g.h": 2}


@pytest.mark.parametrize("path", python_files(), ids=rel)
def test_module_is_at_most_600_lines(path: Path) -> None:
    """A module over 600 lines holds more than one concern: split it."""
    lines = len(path.read_text(encoding="utf-8").splitlines())
    assert lines <= MAX_MODULE_LINES, (
        f"{rel(path)} has {lines} lines (at most {MAX_MODULE_LINES}); split it by concern")


@pytest.mark.parametrize("path", python_files(), ids=rel)
def test_functions_are_at_most_60_lines(path: Path) -> None:
    """A function over 60 lines that is not an allowed declarative table is split."""
    long = {name: n for name, n in function_lengths(path).items()
            if n > MAX_FUNCTION_LINES and (rel(path), name) not in ALLOWED_LONG}
    assert not long, (f"{rel(path)}: functions over {MAX_FUNCTION_LINES} lines: "
                      + ", ".join(f"{name} ({n})" for name, n in sorted(long.items())))


def test_every_allowance_is_still_needed() -> None:
    """Each ALLOWED_LONG entry names a function that exists and is still over 60 lines (one
    test over all entries, so an empty allowlist runs rather than skips)."""
    stale = []
    for module, name in sorted(ALLOWED_LONG):
        lengths = function_lengths(ROOT / module)
        if lengths.get(name, 0) <= MAX_FUNCTION_LINES:
            stale.append(f"{module} {name} ({lengths.get(name, 'gone')} lines)")
    assert not stale, f"drop from ALLOWED_LONG: {', '.join(stale)}"
