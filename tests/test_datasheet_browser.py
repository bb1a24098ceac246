"""datasheet.html in a real browser: headless Chromium loads it without console errors."""

from __future__ import annotations

import shutil
import sys
from pathlib import Path

import pytest
from support.datasheet_fixture import build_collection

from collector.datasheet import export_datasheet

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "bench"))
from datasheet_screenshot import run_chromium

needs_chromium = pytest.mark.skipif(
    shutil.which("chromium") is None and shutil.which("chromium-browser") is None,
    reason="chromium is not installed (apt-get install chromium); browser check skipped")


@needs_chromium
def test_html_opens_in_headless_chromium_without_console_errors(tmp_path: Path) -> None:
    """Chromium renders the page, logs no console error, and writes a non-empty screenshot."""
    root = build_collection(tmp_path / "leaves")
    html = export_datasheet(root, with_images=True).out / "datasheet.html"
    png = tmp_path / "shot.png"
    code, errors = run_chromium(html, png)
    assert code == 0 and errors == []
    assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"  # PNG signature (standards.md §9)
    assert png.stat().st_size > 10_000
