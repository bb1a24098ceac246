"""datasheet.html in a real browser: headless Chromium loads it without console errors.

Chromium is driven by ``bench/datasheet_screenshot.py HTML PNG``, run as a program (tests never
import bench; ``support.browser``): it exits 1 on a Chromium failure or any console error line
and prints the count.
"""

from __future__ import annotations

from pathlib import Path

from support.browser import assert_opens_without_console_errors, needs_chromium
from support.datasheet_fixture import build_collection

from collector.exports.datasheet import export_datasheet


@needs_chromium
def test_html_opens_in_headless_chromium_without_console_errors(tmp_path: Path) -> None:
    """Chromium renders the page with the diversity panel's plots, logs no console error, and
    writes a non-empty screenshot."""
    root = build_collection(tmp_path / "leaves")
    html = export_datasheet(root, with_images=True).out / "datasheet.html"
    assert 'id="plot-div-hues"' in html.read_text(encoding="utf-8")
    png = tmp_path / "shot.png"
    assert_opens_without_console_errors(html, png)
    assert png.stat().st_size > 10_000
