"""A page in a real browser: headless Chromium driven by ``bench/datasheet_screenshot.py``, run
as a program (tests never import bench). It exits 1 on a Chromium failure or any console error
line and prints the count."""

from __future__ import annotations

import os
import re
import shutil
import subprocess
import sys
from pathlib import Path

import pytest

SCREENSHOT = Path(__file__).resolve().parents[2] / "bench" / "datasheet_screenshot.py"

# CI (.ci/run) installs Debian's chromium and sets COLLECTOR_BROWSER_CHECK=required, so a
# missing browser fails there; a developer's machine without one skips, saying how to get it.
needs_chromium = pytest.mark.skipif(
    shutil.which("chromium") is None and shutil.which("chromium-browser") is None
    and os.environ.get("COLLECTOR_BROWSER_CHECK") != "required",
    reason="chromium is not installed; browser check skipped (Debian/Ubuntu: "
           "sudo apt-get install chromium)")


def assert_opens_without_console_errors(html: Path, png: Path) -> None:
    """Chromium renders ``html``, logs no console error, and writes a PNG screenshot."""
    proc = subprocess.run([sys.executable, str(SCREENSHOT), str(html), str(png)],
                          capture_output=True, text=True, timeout=180)
    assert proc.returncode == 0, proc.stdout + proc.stderr
    assert re.search(r"^exit code\s+0$", proc.stdout, re.M), proc.stdout
    assert re.search(r"^console errs\s+0$", proc.stdout, re.M), proc.stdout
    assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"  # PNG signature (standards.md §9)
