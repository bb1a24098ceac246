"""Open datasheet.html in headless Chromium: collect console errors and take a screenshot.

Usage: python bench/datasheet_screenshot.py [DATASHEET_HTML] [PNG]
Without arguments it gathers the demo archive (``collector.demo.run_demo``, content generated
into a temp folder) and exports its datasheet with thumbnails first. Chromium gets
no network use: background networking, component updates and sync are off, and the page
itself loads nothing from outside.
"""

from __future__ import annotations

import re
import shutil
import subprocess
import sys
import tempfile
from pathlib import Path

CONSOLE_ERROR = re.compile(r"Uncaught|ERROR:CONSOLE|Refused to|net::ERR_")


def chromium() -> str | None:
    """The Chromium executable, or None."""
    return shutil.which("chromium") or shutil.which("chromium-browser")


def run_chromium(html: Path, screenshot: Path, *, width: int = 1100,
                 height: int = 2400) -> tuple[int, list[str]]:
    """Load ``html`` headless, write ``screenshot``; returns (exit code, console error lines)."""
    exe = chromium()
    if exe is None:
        raise FileNotFoundError("chromium is not installed")
    with tempfile.TemporaryDirectory() as profile:
        proc = subprocess.run(
            [exe, "--headless", "--no-sandbox", "--disable-gpu",
             "--disable-background-networking", "--disable-component-update", "--disable-sync",
             "--no-first-run", f"--user-data-dir={profile}", "--enable-logging=stderr",
             "--v=0", f"--window-size={width},{height}", "--hide-scrollbars",
             f"--screenshot={screenshot}", html.resolve().as_uri()],
            capture_output=True, text=True, timeout=120)
    errors = [line for line in proc.stderr.splitlines() if CONSOLE_ERROR.search(line)]
    return proc.returncode, errors


def main() -> int:
    if len(sys.argv) > 1:
        html = Path(sys.argv[1])
        png = Path(sys.argv[2]) if len(sys.argv) > 2 else html.with_suffix(".png")
    else:
        from collector.demo import run_demo
        from collector.demo_site import generate
        from collector.exports.datasheet import export_datasheet

        tmp = Path(tempfile.mkdtemp())
        generate(tmp / "content")
        root = run_demo(tmp / "demo", port=0, datasheet=False,
                        content=tmp / "content").collection.root
        html = export_datasheet(root, with_images=True).out / "datasheet.html"
        png = Path("datasheet-screenshot.png")
    if chromium() is None:
        print("chromium not found: install it (e.g. apt-get install chromium) to take a "
              "screenshot")
        return 0
    code, errors = run_chromium(html, png)
    print(f"{'page':<12} {html}\n{'screenshot':<12} {png} ({png.stat().st_size} bytes)\n"
          f"{'exit code':<12} {code}\n{'console errs':<12} {len(errors)}")
    for line in errors:
        print("  " + line)
    return 1 if code or errors else 0


if __name__ == "__main__":
    raise SystemExit(main())
