"""A damaged ledger (random bytes where the SQLite file should be) gives every command one
``Error: ...`` paragraph and a non-zero exit, never a traceback, and changes no stored file.

The damaged header is outside the SQLite file format (sqlite.org "Database File Format" §1.3:
a database file starts with the 16 bytes "SQLite format 3\\0").
"""

from __future__ import annotations

import hashlib
import os
from pathlib import Path

import pytest
from support.collections import scans_collection
from typer.testing import CliRunner

from collector.cli import app
from collector.storage.collection import Collection


@pytest.fixture
def damaged(tmp_path: Path) -> Collection:
    """A collection with two stored scans whose ledger is then overwritten with noise."""
    col = scans_collection(tmp_path / "c", 2)
    for leftover in col.root.glob("ledger.sqlite-*"):
        leftover.unlink()
    col.ledger_path.write_bytes(os.urandom(8192))
    return col


def store_digest(col: Collection) -> dict[str, str]:
    """Every stored file and the sha256 of its bytes."""
    return {p.name: hashlib.sha256(p.read_bytes()).hexdigest()
            for _, p in col.store.iter_stored()}


@pytest.mark.parametrize("command", [
    ["status", "{root}"], ["gather", "{root}", "--quiet"], ["gather", "{root}", "--dry-run"],
    ["datasheet", "{root}", "--out", "{root}/../sheet"], ["trace", "{file}", "--in", "{root}"],
])
def test_every_command_explains_a_damaged_ledger(damaged: Collection, command: list[str]) -> None:
    """Exit 1 or 2 with an 'Error:' paragraph naming the ledger; no traceback; the store is
    unchanged."""
    before = store_digest(damaged)
    assert len(before) == 2
    some_file = next(p for _, p in damaged.store.iter_stored())
    args = [a.format(root=damaged.root, file=some_file) for a in command]
    result = CliRunner().invoke(app, args)
    assert result.exit_code in (1, 2), result.output
    assert result.exception is None or isinstance(result.exception, SystemExit), \
        repr(result.exception)
    assert "Error:" in result.output and "ledger" in result.output
    assert "Traceback" not in result.output
    assert store_digest(damaged) == before
