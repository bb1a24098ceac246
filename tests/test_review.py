"""The review sheet (``collector review``) of the demo collection, all its pages read
together: every stored file once per view, set-aside files apart with their reason, withdrawn
files and their thumbnails gone, hostile titles escaped, thumbnails made once, and the first
page opened in headless Chromium.

The pages are read back with the standard library's HTML parser (``html.parser``, which
follows the HTML tokenisation of the WHATWG HTML Living Standard closely enough for our own
markup).
"""

from __future__ import annotations

import io
import re
import sqlite3
from html.parser import HTMLParser
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from PIL import Image
from support.browser import assert_opens_without_console_errors, needs_chromium
from support.collections import Gathered
from typer.testing import CliRunner

from collector.cli import app
from collector.errors import CollectionError
from collector.exports import review_groups as rg
from collector.exports.review import write_review
from collector.exports.thumbnails import render_thumbnail, thumb_size
from collector.storage.collection import Collection

HOSTILE_SCRIPT = "Fern <script>alert(1)</script> & frond"
HOSTILE_ATTRIBUTE = 'Moss" onmouseover="alert(2)'
runner = CliRunner()



class Sheet(HTMLParser):
    """What the review page holds: figures per view, every attribute, the text of reasons."""

    def __init__(self, texts: list[str]) -> None:
        super().__init__()
        self.view = ""
        self.group = ""
        self.figures: dict[str, list[dict[str, Any]]] = {}
        self.attrs: list[tuple[str, str, str]] = []  # (tag, name, value)
        self.imgs: list[dict[str, str]] = []
        self.tags: list[str] = []
        self._figure: dict[str, Any] | None = None
        self._in_reason = False
        for text in texts:
            self.feed(text)

    def handle_starttag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        a = {k: v or "" for k, v in attrs}
        self.tags.append(tag)
        self.attrs += [(tag, k, v) for k, v in a.items()]
        if tag == "section" and a.get("class") == "page":
            self.view = a["data-view"]
        elif tag == "h3":
            self.group = a["data-group"]
        elif tag == "figure":
            self._figure = {"sha256": a["data-sha256"], "hover": a["title"], "reason": "",
                            "group": self.group}
            self.figures.setdefault(self.view, []).append(self._figure)
        elif tag == "img":
            self.imgs.append(a)
        self._in_reason = tag == "p" and a.get("class") == "reason"

    def handle_endtag(self, tag: str) -> None:
        if tag == "figure":
            self._figure = None
        if tag == "p":
            self._in_reason = False

    def handle_data(self, data: str) -> None:
        if self._in_reason and self._figure is not None:
            self._figure["reason"] += data

    def shas(self, view: str) -> list[str]:
        return [f["sha256"] for f in self.figures.get(view, [])]


def _db(col: Collection) -> sqlite3.Connection:
    return sqlite3.connect(col.ledger_path)


@pytest.fixture(scope="module")
def reviewed(demo_gathered: Gathered,
             tmp_path_factory: pytest.TempPathFactory) -> dict[str, Any]:
    """The demo gathered once (a copy of the session's ``demo_gathered``, conftest.py) and
    reviewed twice through the command: before and after one file was withdrawn, two were set
    aside (written into the ledger as a pixel rule would) and two titles were made hostile."""
    col = demo_gathered.copy_to(tmp_path_factory.mktemp("review") / "c")
    first = runner.invoke(app, ["review", str(col.root)])
    assert first.exit_code == 0, first.output
    with _db(col) as db:
        stored = db.execute("SELECT f.sha256, f.first_item_id FROM files f JOIN items i "
                            "ON i.id = f.first_item_id WHERE i.state = 'stored' "
                            "ORDER BY f.sha256").fetchall()
        gone, aside = stored[0], stored[1:3]
        for sha, _ in aside:
            db.execute("UPDATE files SET set_aside = 'greyscale', set_aside_detail = "
                       "'95 % of the pixels have chroma under 6' WHERE sha256 = ?", (sha,))
        db.execute("UPDATE items SET title = ? WHERE id = ?", (HOSTILE_SCRIPT, stored[3][1]))
        db.execute("UPDATE items SET title = ? WHERE id = ?", (HOSTILE_ATTRIBUTE, stored[4][1]))
        db.execute("UPDATE files SET colours = NULL WHERE sha256 = ?", (stored[5][0],))
        # the demo recipe's own pixel rule sets its greyscale pictures aside too
        by_rule = {r[0] for r in db.execute(
            "SELECT sha256 FROM files WHERE set_aside = 'no-greyscale'")}
    withdrawn = runner.invoke(app, ["withdraw", str(col.root), f"item:{gone[1]}", "--reason",
                                    "personal-data", "--delete-bytes"])
    assert withdrawn.exit_code == 0, withdrawn.output
    second = runner.invoke(app, ["review", str(col.root)])
    assert second.exit_code == 0, second.output
    sheet = col.root / "review" / "review.html"
    texts = [p.read_text(encoding="utf-8") for p in sorted(sheet.parent.glob("*.html"))]
    return {"col": col, "first": first.output, "second": second.output, "sheet": sheet,
            "text": "".join(texts), "parsed": Sheet(texts), "gone": gone[0],
            "aside": {sha for sha, _ in aside} | by_rule, "by_rule": by_rule,
            "unmeasured": stored[5][0]}


def test_every_file_appears_once_by_source_and_by_colour(reviewed: dict[str, Any]) -> None:
    """Each stored file neither withdrawn nor set aside is shown exactly once by source and
    once by colour; the withdrawn one nowhere."""
    with _db(reviewed["col"]) as db:
        files = {r[0] for r in db.execute("SELECT sha256 FROM files")}
    expected = files - reviewed["aside"] - {reviewed["gone"]}
    parsed = reviewed["parsed"]
    for view in ("source", "colour"):
        shown = parsed.shas(view)
        assert len(shown) == len(set(shown)), view
        assert set(shown) == expected, view
    assert all(reviewed["gone"] not in parsed.shas(v) for v in parsed.figures)


def test_files_without_colour_facts_are_not_measured(reviewed: dict[str, Any]) -> None:
    """A file stored before colour facts (colours NULL) is in the 'not measured' bin, the
    last one; every other file is in a colour bin."""
    by_colour = reviewed["parsed"].figures["colour"]
    unmeasured = [f["sha256"] for f in by_colour if f["group"] == "c100"]
    assert unmeasured == [reviewed["unmeasured"]]
    assert by_colour[-1]["group"] == "c100"
    assert "not measured" in reviewed["text"]


def test_set_aside_files_are_apart_with_their_reason(reviewed: dict[str, Any]) -> None:
    """The two files set aside by hand and those the demo's pixel rule sets aside are in the
    set-aside part only, each with rule and reason."""
    aside = reviewed["parsed"].figures["aside"]
    assert {f["sha256"] for f in aside} == reviewed["aside"]
    for figure in aside:
        assert figure["reason"] == (
            "no-greyscale: greyscale = false, but the picture is greyscale"
            if figure["sha256"] in reviewed["by_rule"]
            else "greyscale: 95 % of the pixels have chroma under 6")
    assert f"{len(reviewed['aside'])} set aside" in reviewed["second"]


def test_withdrawn_file_leaves_no_thumbnail_behind(reviewed: dict[str, Any]) -> None:
    """The first review made a thumbnail of every file; the second removed the withdrawn
    file's and reused the others."""
    thumbs = {p.name[:64] for p in (reviewed["sheet"].parent / "thumbs").iterdir()}
    assert reviewed["gone"] not in thumbs
    assert "0 withdrawn left out; thumbnails" in reviewed["first"]
    assert re.search(r"1 withdrawn left out; thumbnails 0 made, \d+ reused, 1 removed",
                     reviewed["second"]), reviewed["second"]


def test_hostile_titles_are_escaped(reviewed: dict[str, Any]) -> None:
    """Titles with markup stay text: the page has no script element and no event handler
    attribute, and the titles read back unchanged (HTML Living Standard 13.1.2.3: a double
    quote inside a quoted attribute value is written as a character reference)."""
    parsed, text = reviewed["parsed"], reviewed["text"]
    assert "script" not in parsed.tags
    assert not [a for a in parsed.attrs if a[1].startswith("on")]
    assert "&lt;script&gt;alert(1)&lt;/script&gt; &amp; frond" in text
    hovers = [f["hover"] for f in parsed.figures["source"]]
    assert any(h.startswith(HOSTILE_SCRIPT + " | source: ") for h in hovers)
    assert any(h.startswith(HOSTILE_ATTRIBUTE + " | source: ") for h in hovers)


def test_thumbnails_are_lazy_sized_and_local(reviewed: dict[str, Any]) -> None:
    """Every img is lazy with its width and height, points into thumbs/ and is a WebP of that
    size (RIFF container with the form type WEBP: RFC 9649, section 2.4); nothing is loaded
    from elsewhere."""
    parsed, folder = reviewed["parsed"], reviewed["sheet"].parent
    assert parsed.imgs
    for img in parsed.imgs[:40]:
        assert img["loading"] == "lazy" and img["src"].startswith("thumbs/")
        data = (folder / img["src"]).read_bytes()
        assert data[:4] == b"RIFF" and data[8:12] == b"WEBP"
        with Image.open(io.BytesIO(data)) as im:
            assert im.size == (int(img["width"]), int(img["height"]))
            assert max(im.size) <= 160
    links = [v for _, k, v in parsed.attrs if k in ("src", "href")]
    assert not [v for v in links if re.match(r"^(https?:)?//", v)]


def test_every_link_between_pages_resolves(reviewed: dict[str, Any]) -> None:
    """Each link to a page of the sheet names a file the review wrote; each view's contents
    page lists its groups."""
    folder = reviewed["sheet"].parent
    pages = {v for _, k, v in reviewed["parsed"].attrs if k == "href" and v.endswith(".html")}
    assert {"review-source.html", "review-colour.html", "review-near.html",
            "review-aside.html"} <= pages
    assert all((folder / page).is_file() for page in pages)
    assert {p.name for p in folder.glob("*.html")} == pages | {"review.html"}


def test_near_duplicate_clusters_hold_each_item_with_its_original(
        reviewed: dict[str, Any]) -> None:
    """Each near duplicate's file is in the same cluster as its original's file."""
    with _db(reviewed["col"]) as db:
        pairs = db.execute("SELECT i.file_sha256, o.file_sha256 FROM items i JOIN items o "
                           "ON o.id = i.duplicate_of WHERE i.state = 'near_duplicate'").fetchall()
    assert pairs
    near = reviewed["parsed"].figures["near"]
    shown = set(reviewed["parsed"].shas("source"))
    assert len(near) == len({f["sha256"] for f in near})
    for sha, original in pairs:
        if sha in shown and original in shown:
            assert sha in {f["sha256"] for f in near} and original in {
                f["sha256"] for f in near}


@needs_chromium
def test_sheet_opens_in_headless_chromium_without_console_errors(
        reviewed: dict[str, Any], tmp_path: Path) -> None:
    """Chromium shows the first page without console errors; the screenshot is a PNG of the
    window's size with the thumbnails drawn (strongly coloured pixels: the page's own colours
    are greys, a pale yellow and link blue)."""
    png = tmp_path / "review.png"
    assert_opens_without_console_errors(reviewed["sheet"], png)  # and a PNG screenshot
    with Image.open(png) as shot:
        assert shot.size == (1100, 2400)  # the window bench/datasheet_screenshot.py asks for
        rgb = np.asarray(shot.convert("RGB").resize((110, 240), Image.Resampling.BOX), int)
    spread = rgb.max(axis=2) - rgb.min(axis=2)
    # Common practice, no source: a channel spread over 80 is no grey, pale or thin text.
    assert float((spread > 80).mean()) > 0.1


def test_colour_bins_of_known_colours() -> None:
    """The sRGB primaries and white land in their bins (CIELAB of the sRGB primaries, D65:
    red 53.24/80.09/67.20, green 87.74/-86.18/83.18, blue 32.30/79.19/-107.86, from memory;
    HSV hues 0, 120, 240)."""
    def bin_of(lab: list[float], hue: float) -> str:
        return rg.colour_bin([{"lab": lab, "hue": hue, "hex": "#000000", "share": 1.0}])[1]

    assert bin_of([53.24, 80.09, 67.20], 0.0) == "red, light"
    assert bin_of([87.74, -86.18, 83.18], 120.0) == "green, light"
    assert bin_of([32.30, 79.19, -107.86], 240.0) == "blue, dark"
    assert bin_of([100.0, 0.0, 0.0], 0.0) == "white"
    assert bin_of([10.0, 1.0, -1.0], 300.0) == "black"
    assert bin_of([50.0, 3.0, 3.0], 45.0) == "grey"  # chroma 4.2 < 6: neutral
    assert bin_of([60.0, 20.0, 20.0], 346.0) == "red, light"  # 345 starts red's sector
    assert rg.colour_bin(rg.parse_colours(None))[1] == rg.NOT_MEASURED
    assert rg.colour_bin(rg.parse_colours("not json"))[1] == rg.NOT_MEASURED


def test_pages_split_groups_and_keep_every_entry() -> None:
    """A group that does not fit continues on the next page; each entry is on one page."""
    def entry(n: int) -> rg.Entry:
        return rg.Entry(f"{n:064x}", n, f"t{n}", "s", "CC0-1.0", "stored", None, 1, 1, None)

    view = rg.View("v", "V", "", [rg.Group("a", "A", [entry(n) for n in range(5)]),
                                  rg.Group("b", "B", [entry(n) for n in range(5, 8)])])
    rg.paginate(view, 4)
    assert [[(s.group.key, len(s.entries), s.continued) for s in p.sections]
            for p in view.pages] == [[("a", 4, False)], [("a", 1, True), ("b", 3, False)]]
    assert view.first_page == {"a": 1, "b": 2}
    empty = rg.paginate(rg.View("e", "E", "", []), 4)
    assert len(empty.pages) == 1 and empty.pages[0].sections == []


def test_thumbnail_is_upright_for_exif_orientation_6(tmp_path: Path) -> None:
    """Orientation 6: the stored picture's 0th column is the visual top (CIPA DC-008, Exif
    2.32, 4.6.5, tag 274), so a picture red on the left shows red at the top."""
    im = Image.new("RGB", (200, 100), (0, 0, 255))
    im.paste((255, 0, 0), (0, 0, 100, 100))
    exif = Image.Exif()
    exif[274] = 6
    src = tmp_path / "turned.jpg"
    im.save(src, "JPEG", exif=exif, quality=95)
    size = thumb_size(200, 100, 6, 160)
    assert size == (80, 160)
    with Image.open(io.BytesIO(render_thumbnail(src, size, 6))) as thumb:
        assert thumb.size == (80, 160)
        red, _, blue = thumb.convert("RGB").getpixel((40, 20))
        assert red > 200 and blue < 60
        red, _, blue = thumb.convert("RGB").getpixel((40, 140))
        assert blue > 200 and red < 60


def test_folder_with_other_files_is_refused(reviewed: dict[str, Any], tmp_path: Path) -> None:
    """An output folder holding something a review did not write is refused, untouched."""
    out = tmp_path / "mine"
    out.mkdir()
    (out / "notes.txt").write_text("keep me")
    with pytest.raises(CollectionError, match=r"notes\.txt"):
        write_review(reviewed["col"].root, out=out)
    assert sorted(p.name for p in out.iterdir()) == ["notes.txt"]
