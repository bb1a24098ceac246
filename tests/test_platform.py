"""On a platform without the POSIX calls the no-link guarantees rest on (Windows: no
O_NOFOLLOW, no O_DIRECTORY, no dir_fd for os.open — Python documentation, ``os`` module,
"Availability" notes and ``os.supports_dir_fd``), every command refuses with exit 2 and says
what to do instead of writing through a link or failing with a traceback."""

from __future__ import annotations

import os

import pytest
from typer.testing import CliRunner

from collector.cli import app
from collector.storage.safe_paths import platform_problem


def test_this_machine_has_what_collector_needs() -> None:
    assert platform_problem() is None


def test_a_platform_without_dir_fd_is_refused_clearly(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setattr(os, "supports_dir_fd", set())
    monkeypatch.delattr(os, "O_NOFOLLOW")
    result = CliRunner().invoke(app, ["status", "anything"])
    assert result.exit_code == 2
    assert "lacks O_NOFOLLOW, dir_fd" in result.output
    assert "Windows Subsystem for Linux" in result.output
    assert "Traceback" not in result.output
