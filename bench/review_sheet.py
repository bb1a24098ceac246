"""The review sheet of a synthetic collection of a few thousand real pictures: time to write
it (thumbnails made, then reused), page weight, and how it opens in headless Chromium.

Usage: python bench/review_sheet.py [FILES] [SCREENSHOT_PNG]   (default 3000 files,
bench/out/review-sheet-screenshot.png)

The collection (5 sources, JPEGs of 480x360 from a few random colour fields around a hue, their
colour facts computed by collector.checks.colour_facts, every 20th a near duplicate of the one
before, every 50th set aside, a few hostile titles) is written straight into a real ledger and
store, the way bench/datasheet.py builds its ledgers; building it is not timed. Then
``write_review`` runs twice (thumbnails made; thumbnails reused). Chromium opens its first
page (``review.html``, 150 thumbnails) once for a screenshot (console errors counted) and once,
on a copy with a small timing script added at the end, to read the Paint Timing and
Navigation Timing entries (W3C Paint Timing, Navigation Timing Level 2) from the DOM it dumps.
The shipped pages have no script.
"""

from __future__ import annotations

import hashlib
import io
import json
import random
import re
import sqlite3
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
from datasheet_screenshot import chromium, run_chromium  # the neighbouring bench script
from PIL import Image

SOURCES = ["api-objects", "api-pages", "gallery", "oai-records", "scanner"]
LICENCES = ["CC-BY-4.0", "CC0-1.0", "CC-BY-SA-4.0", "CC-BY-NC-4.0"]
HOSTILE = ['Fern <script>alert(1)</script>', 'Moss" onmouseover="alert(2)', "=HYPERLINK(x)"]
TIMING = """<script>addEventListener("load", () => setTimeout(() => {
const nav = performance.getEntriesByType("navigation")[0];
const out = {dcl: nav.domContentLoadedEventEnd, load: nav.loadEventEnd};
for (const p of performance.getEntriesByType("paint")) out[p.name] = p.startTime;
const imgs = [...document.images];
out.images_complete = imgs.filter(i => i.complete && i.naturalWidth > 0).length;
out.images = imgs.length;
const pre = document.createElement("pre"); pre.id = "bench-timing";
pre.textContent = JSON.stringify(out); document.body.append(pre);
}, 0));</script>"""


def picture(rng: np.random.Generator) -> Image.Image:
    """A 480x360 picture: a 4x3 field of colours around one random hue, smoothly enlarged."""
    hue = rng.uniform(0, 1)
    hsv = np.stack([np.full((3, 4), hue) + rng.normal(0, 0.04, (3, 4)),
                    rng.uniform(0.2, 1.0, (3, 4)), rng.uniform(0.2, 1.0, (3, 4))], axis=-1)
    grid = Image.fromarray((np.clip(hsv % 1.0, 0, 1) * 255).astype(np.uint8), "HSV")
    return grid.convert("RGB").resize((480, 360), Image.Resampling.BICUBIC)


def _store(root: Path, im: Image.Image) -> tuple[str, str]:
    """Save ``im`` as a JPEG into the store; returns (sha256, colours JSON)."""
    from collector.checks.colour_facts import colour_facts
    from collector.storage.store import Store

    buf = io.BytesIO()
    im.save(buf, "JPEG", quality=85)
    data = buf.getvalue()
    sha = hashlib.sha256(data).hexdigest()
    path = Store(root / "files").path_for(sha, "jpg")
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_bytes(data)
    facts = colour_facts(im.resize((48, 36), Image.Resampling.BOX))
    return sha, json.dumps(facts.as_json()["colours"])


def build(root: Path, n: int) -> None:
    """A collection of ``n`` stored pictures with items, sources and colour facts."""
    from collector.storage.collection import init_collection

    init_collection(root, contact="bench@fernhollow.example", name="Synthetic review")
    rng, pick = np.random.default_rng(17), random.Random(17)
    conn = sqlite3.connect(root / "ledger.sqlite")
    conn.executemany("INSERT INTO sources (id, name, kind, config) VALUES (?, ?, 'json_api', "
                     "'{}')", list(enumerate(SOURCES, 1)))
    previous = None
    t = "2026-12-01T20:00:00.000Z"
    for i in range(1, n + 1):
        near = i % 20 == 0 and previous is not None
        im = previous.rotate(2) if near and previous else picture(rng)
        sha, colours = _store(root, im)
        title = HOSTILE[i % 3] if i % 500 == 0 else f"Leaf {i}, Fernhollow (no. {i})"
        conn.execute(
            "INSERT INTO items (id, source_id, source_key, title, creator, licence_raw, spdx_id, "
            "state, file_sha256, duplicate_of, run_id, created_at, updated_at) "
            "VALUES (?,?,?,?,?,?,?,?,?,?,1,?,?)",
            (i, 1 + i % len(SOURCES), f"k{i}", title, f"Member {i % 97}", "see page",
             pick.choice(LICENCES), "near_duplicate" if near else "stored", sha,
             i - 1 if near else None, t, t))
        aside = ("greyscale", "95 % of the pixels have chroma under 6") if i % 50 == 0 else (
            None, None)
        conn.execute("INSERT OR IGNORE INTO files (sha256, size, ext, format, mime, width, "
                     "height, mode, first_item_id, stored_at, flags, colours, set_aside, "
                     "set_aside_detail) VALUES (?, 0, 'jpg', 'JPEG', 'image/jpeg', 480, 360, "
                     "'RGB', ?, ?, '[]', ?, ?, ?)", (sha, i, t, colours, *aside))
        previous = im
    conn.commit()
    conn.close()


def timings(html: Path) -> dict[str, float]:
    """Paint and navigation timings of ``html`` in headless Chromium (ms), from a copy with
    the timing script added."""
    copy = html.with_name("bench-timing.html")
    copy.write_text(html.read_text(encoding="utf-8").replace("</body>", TIMING + "</body>"),
                    encoding="utf-8")
    exe = chromium()
    assert exe is not None
    with tempfile.TemporaryDirectory() as profile:
        proc = subprocess.run(
            [exe, "--headless", "--no-sandbox", "--disable-gpu", "--no-first-run",
             "--disable-background-networking", "--disable-component-update", "--disable-sync",
             f"--user-data-dir={profile}", "--window-size=1100,2400",
             "--virtual-time-budget=10000", "--dump-dom", copy.resolve().as_uri()],
            capture_output=True, text=True, timeout=120)
    copy.unlink()
    found = re.search(r'<pre id="bench-timing">(.*?)</pre>', proc.stdout)
    return json.loads(found[1].replace("&quot;", '"')) if found else {}


def main() -> int:
    n = int(sys.argv[1]) if len(sys.argv) > 1 else 3000
    png = Path(sys.argv[2]) if len(sys.argv) > 2 else Path("bench/out/review-sheet-screenshot.png")
    png.parent.mkdir(parents=True, exist_ok=True)
    with tempfile.TemporaryDirectory() as tmp:
        measure(Path(tmp) / "c", n, png.resolve())
    return 0


def measure(root: Path, n: int, png: Path) -> None:
    """Build the collection at ``root``, write its sheet twice, open it; print the table."""
    from collector.exports.review import write_review

    t0 = time.perf_counter()
    build(root, n)
    built = time.perf_counter() - t0
    t0 = time.perf_counter()
    first = write_review(root)
    made = time.perf_counter() - t0
    t0 = time.perf_counter()
    again = write_review(root)
    reused = time.perf_counter() - t0
    html = first.sheet
    thumbs = sorted((html.parent / "thumbs").iterdir())
    pages = [p.stat().st_size for p in html.parent.glob("*.html")]
    rows = [("files in the collection", f"{first.files}"),
            ("building it (not the sheet)", f"{built:.1f} s"),
            ("write, thumbnails made", f"{made:.2f} s ({first.thumbs.made} made)"),
            ("write, thumbnails reused", f"{reused:.2f} s ({again.thumbs.reused} reused)"),
            ("review.html (first page)", f"{html.stat().st_size / 1024:.0f} kB"),
            ("all pages", f"{len(pages)} files ({again.pages} pages and 4 contents), "
                          f"{sum(pages) / 2**20:.2f} MB, largest {max(pages) / 1024:.0f} kB"),
            ("thumbnails", f"{len(thumbs)}, {sum(p.stat().st_size for p in thumbs) / 2**20:.1f}"
                           f" MB, {sum(p.stat().st_size for p in thumbs) / len(thumbs) / 1024:.1f}"
                           " kB each")]
    if chromium() is None:
        rows.append(("chromium", "not installed (apt-get install chromium): no screenshot"))
    else:
        code, errors = run_chromium(html, png)
        got = timings(html)
        rows += [("screenshot", f"{png} (exit {code}, {len(errors)} console errors)")]
        rows += [(f"chromium {name}", f"{got[key]:.0f} ms") for key, name in (
            ("first-paint", "first paint"), ("first-contentful-paint", "first contentful paint"),
            ("dcl", "DOMContentLoaded end"), ("load", "load end")) if key in got]
        if "images" in got:
            # Headless Chromium fetched every thumbnail of the page, loading="lazy"
            # notwithstanding (a plain 55,000 px page of lazy images did the same here): the
            # load time above is the worst case, all of the page's thumbnails fetched.
            rows.append(("img elements in the DOM",
                         f"{got['images']} ({got['images_complete']} fetched by the headless "
                         "browser)"))
        for line in errors:
            print("  " + line)
    for name, value in rows:
        print(f"{name:<30} {value}")


if __name__ == "__main__":
    raise SystemExit(main())
