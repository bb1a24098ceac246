"""datasheet.html in a real browser: headless Chromium loads it without console errors.

Chromium is driven by ``bench/datasheet_screenshot.py HTML PNG``, run as a program (tests never
import bench): it exits 1 on a Chromium failure or any console error line and prints the count.
"""

from __future__ import annotations

import os
import re
import shutil
import subprocess
import sys
from pathlib import Path

import pytest
from support.datasheet_fixture import build_collection

from collector.exports.datasheet import export_datasheet

SCREENSHOT = Path(__file__).resolve().parents[1] / "bench" / "datasheet_screenshot.py"

# CI (.ci/run) installs Debian's chromium and sets COLLECTOR_BROWSER_CHECK=required, so a
# missing browser fails there; a developer's machine without one skips, saying how to get it.
needs_chromium = pytest.mark.skipif(
    shutil.which("chromium") is None and shutil.which("chromium-browser") is None
    and os.environ.get("COLLECTOR_BROWSER_CHECK") != "required",
    reason="chromium is not installed; browser check skipped (Debian/Ubuntu: "
           "sudo apt-get install chromium)")


@needs_chromium
def test_html_opens_in_headless_chromium_without_console_errors(tmp_path: Path) -> None:
    """Chromium renders the page, logs no console error, and writes a non-empty screenshot."""
    root = build_collection(tmp_path / "leaves")
    html = export_datasheet(root, with_images=True).out / "datasheet.html"
    png = tmp_path / "shot.png"
    proc = subprocess.run([sys.executable, str(SCREENSHOT), str(html), str(png)],
                          capture_output=True, text=True, timeout=180)
    assert proc.returncode == 0, proc.stdout + proc.stderr
    assert re.search(r"^exit code\s+0$", proc.stdout, re.M), proc.stdout
    assert re.search(r"^console errs\s+0$", proc.stdout, re.M), proc.stdout
    assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"  # PNG signature (standards.md §9)
    assert png.stat().st_size > 10_000
