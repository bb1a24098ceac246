"""The command line: thin commands, help with examples, errors without tracebacks."""

from __future__ import annotations

import re
import subprocess
import sys
from pathlib import Path

import pytest
from typer.testing import CliRunner

from collector.cli import app

runner = CliRunner()


def test_every_command_has_help_with_an_example() -> None:
    """`collector --help` and each command's --help show an example line."""
    top = runner.invoke(app, ["--help"])
    assert top.exit_code == 0 and "Example:" in top.output
    names = [c.name or c.callback.__name__ for c in app.registered_commands]
    assert {"init", "check"} <= set(names)
    for name in names:
        result = runner.invoke(app, [name, "--help"])
        assert result.exit_code == 0, name
        assert "Example:" in result.output, name


def _help(args: list[str]) -> str:
    """A help screen as wide as it wants: a sentence broken by the source shows as two lines."""
    result = runner.invoke(app, args, terminal_width=1000, max_content_width=1000)
    assert result.exit_code == 0, result.output
    return result.output


def _command_names() -> list[str]:
    return [c.name or c.callback.__name__.replace("_", "-") for c in app.registered_commands]


# Type tags of the help renderer that a reader cannot act on (common practice, no source).
RAW_TYPES = re.compile(r"<(str|int|bool|path|float|list\[|int range|float range)|\[x[<>]=|\{")


@pytest.mark.parametrize("name", [None, *_command_names()])
def test_help_screens_read_plainly(name: str | None) -> None:
    """-h equals --help; usage names arguments in capitals ([FOLDER] when optional), no type
    tags or {folder}, flags take no <bool>; each paragraph is one line at any width; the
    screen ends with an example."""
    prefix = [name] if name else []
    text = _help([*prefix, "--help"])
    assert _help([*prefix, "-h"]) == text
    usage = text.splitlines()[0]
    assert usage.startswith(f"Usage: collector {name or ''}".rstrip() + " [OPTIONS]")
    assert not RAW_TYPES.search(text), RAW_TYPES.search(text)
    paragraphs = text.strip().split("\n\n")
    assert paragraphs[-1].lstrip().startswith("Example: collector ")
    for paragraph in paragraphs[1:-1]:  # the description: one line per paragraph
        if not paragraph.startswith(("Arguments:", "Options:", "Commands:")):
            assert "\n" not in paragraph.strip(), paragraph


def test_usage_lines_name_folder_and_files() -> None:
    """The usage lines read as on the command line: optional in brackets, lists with '...'."""
    assert _help(["gather", "-h"]).startswith("Usage: collector gather [OPTIONS] [FOLDER]\n")
    assert _help(["trace", "-h"]).startswith("Usage: collector trace [OPTIONS] FILE...\n")
    assert _help(["init", "-h"]).startswith("Usage: collector init [OPTIONS] FOLDER\n")
    gather = _help(["gather", "-h"])
    assert "--until HH:MM" in gather and "--max-items N" in gather
    assert re.search(r"^  --dry-run +Request nothing", gather, re.MULTILINE)  # no value


def test_init_then_check_round_trip(tmp_path: Path) -> None:
    """init then check succeeds and shows the User-Agent a run would send."""
    folder = tmp_path / "leaves"
    assert runner.invoke(app, ["init", str(folder), "--contact", "me@example.org"]).exit_code == 0
    result = runner.invoke(app, ["check", str(folder)])
    assert result.exit_code == 0
    assert "User-Agent: collector/0.1.0 (+me@example.org)" in result.output


def test_init_on_non_empty_folder_exits_2_with_error(tmp_path: Path) -> None:
    """A refused init is an 'Error:' line and exit 2."""
    (tmp_path / "x.txt").write_text("x")
    result = runner.invoke(app, ["init", str(tmp_path)])
    assert result.exit_code == 2
    assert result.stderr.startswith("Error: ")
    assert "Traceback" not in result.stderr


def test_check_on_missing_folder_explains(tmp_path: Path) -> None:
    """check on a folder that does not exist says how to create it."""
    result = runner.invoke(app, ["check", str(tmp_path / "nope")])
    assert result.exit_code == 2
    assert "collector init" in result.stderr


def test_core_library_does_not_import_the_cli_toolkit() -> None:
    """Importing the core modules loads neither typer nor rich (library first, CLI thin)."""
    code = ("import sys, collector.config.recipe, collector.storage.ledger, "
            "collector.storage.store, collector.storage.collection; "
            "print('typer' in sys.modules, 'rich' in sys.modules)")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                         check=True).stdout.split()
    assert out == ["False", "False"]


def test_python_dash_m_runs_the_cli() -> None:
    """`python -m collector --version` prints the version."""
    out = subprocess.run([sys.executable, "-m", "collector", "--version"], capture_output=True,
                         text=True, check=True).stdout
    assert out.strip() == "collector 0.1.0"
