"""Local scans adapter: file discovery, recipe-declared facts, scanner EXIF/TIFF tags, and
scanner-bed splitting into crop Candidates with notes for blank and touching scans."""

from __future__ import annotations

import io
import os
from pathlib import Path

import numpy as np
from PIL import Image
from support.fetcher import collect
from test_splitter import _item, add_noise, iou, make_bed, place

from collector.sources.scans import glob_regex

PNG_MAGIC = bytes.fromhex("89504E470D0A1A0A")  # PNG spec §5.2 (standards.md §9)


def scans_source(path: str, **extra: object) -> dict[str, object]:
    """A scans source table."""
    table: dict[str, object] = {
        "name": "scanner", "kind": "scans", "path": path, "creator": "Fernhollow Field Society",
        "licence": "CC-BY-4.0", "device": "flatbed, 600 dpi", "date": "2026-03-01"}
    table.update(extra)
    return table


def test_files_are_found_recursively_with_relative_keys(tmp_path: Path) -> None:
    """Matching files anywhere under the folder become Candidates keyed by relative path."""
    root = tmp_path / "scans"
    (root / "box1").mkdir(parents=True)
    Image.new("RGB", (40, 30), "white").save(root / "a.png")
    Image.new("RGB", (40, 30), "white").save(root / "box1" / "B.PNG")
    (root / "box1" / "notes.txt").write_text("not an image")
    os.utime(root / "a.png", (1_700_000_000, 1_700_000_000))
    cands, notes = collect(scans_source("scans"), None, tmp_path)
    assert notes == []
    assert [c.source_key for c in cands] == ["a.png", "box1/B.PNG"]
    first = cands[0]
    assert first.local_path == root / "a.png"
    assert (first.creator, first.licence_raw, first.date) == (
        "Fernhollow Field Society", "CC-BY-4.0", "2026-03-01")
    assert first.metadata["device"] == "flatbed, 600 dpi"
    assert first.metadata["file"]["mtime"] == "2023-11-14T22:13:20Z"
    assert first.image_url is None and first.content is None


def test_scanner_tiff_tags_are_recorded(tmp_path: Path) -> None:
    """Make, Model, Software, DateTime and XResolution from the scan's TIFF IFD0 are kept."""
    im = Image.new("RGB", (60, 40), "white")
    # Tag numbers: Make 271, Model 272, DateTime 306 (standards.md §6.1, Exif/TIFF IFD0);
    # Software 305, XResolution 282 (TIFF 6.0, from memory).
    im.save(tmp_path / "s.tif", tiffinfo={271: "Quillworks", 272: "QF-600", 305: "bedscan 2.1",
                                          306: "2026:02:27 14:05:09", 282: 600.0, 283: 600.0,
                                          296: 2})
    table = scans_source(str(tmp_path), include=["*.tif"])
    del table["date"]
    cands, _ = collect(table, None, "/nonexistent")  # an absolute path ignores base_dir
    (cand,) = cands
    scanner = cand.metadata["scanner"]
    assert scanner["Make"] == "Quillworks" and scanner["Model"] == "QF-600"
    assert scanner["Software"] == "bedscan 2.1"
    assert scanner["DateTime"] == "2026:02:27 14:05:09"
    assert scanner["XResolution"] == 600.0
    # No recipe date: the scanner's DateTime, in ISO 8601 form.
    assert cand.date == "2026-02-27T14:05:09"


def test_split_scan_yields_the_scan_then_its_crops(tmp_path: Path) -> None:
    """A bed with six items gives the scan (role scan, items 6) and six PNG crops in order."""
    bed = make_bed(3, 6)
    bed.image.save(tmp_path / "bed.png")
    table = scans_source(str(tmp_path), split={"min_area": 2000, "padding": 0, "deskew": True})
    cands, notes = collect(table, None, tmp_path)
    assert notes == []
    scan, *crops = cands
    assert scan.source_key == "bed.png" and scan.metadata["role"] == "scan"
    assert scan.metadata["items"] == 6
    assert [c.source_key for c in crops] == [f"bed.png#crop{n}" for n in range(1, 7)]
    for crop, truth in zip(crops, bed.boxes, strict=True):
        assert crop.parent_key == "bed.png" and crop.local_path is None
        assert crop.content is not None and crop.content.startswith(PNG_MAGIC)
        assert crop.crop_box is not None and iou(crop.crop_box, truth) >= 0.9
        assert crop.licence_raw == "CC-BY-4.0" and crop.metadata["role"] == "crop"
        with Image.open(io.BytesIO(crop.content)) as im:
            # Deskewed crops are at most the padded box in size, give or take rounding.
            assert im.width <= crop.crop_box[2] + 2 and im.height <= crop.crop_box[3] + 2


def test_padding_grows_crop_boxes(tmp_path: Path) -> None:
    """split.padding adds that many pixels around each tight box."""
    bed = make_bed(4, 4)
    bed.image.save(tmp_path / "bed.png")
    tight, _ = collect(scans_source(str(tmp_path), split={"padding": 0}), None, tmp_path)
    padded, _ = collect(scans_source(str(tmp_path), split={"padding": 10}), None, tmp_path)
    assert len(tight) == len(padded) == 1 + 4  # the scan, then its four crops
    for a, b in zip(tight[1:], padded[1:], strict=True):
        assert a.crop_box is not None and b.crop_box is not None
        assert (b.crop_box[0], b.crop_box[1]) == (a.crop_box[0] - 10, a.crop_box[1] - 10)
        assert (b.crop_box[2], b.crop_box[3]) == (a.crop_box[2] + 20, a.crop_box[3] + 20)


def test_blank_scan_gives_no_crops_and_a_note(tmp_path: Path) -> None:
    """An empty scanner bed yields the scan with items 0 and a blank_scan note."""
    blank = add_noise(Image.new("RGB", (900, 700), (244, 244, 242)), np.random.default_rng(1))
    blank.save(tmp_path / "empty.png")
    cands, notes = collect(scans_source(str(tmp_path), split={}), None, tmp_path)
    assert [c.source_key for c in cands] == ["empty.png"]
    assert cands[0].metadata["items"] == 0
    assert [n.kind for n in notes] == ["blank_scan"]
    assert "empty.png" in notes[0].message


def test_touching_items_are_reported_with_scan_and_box(tmp_path: Path) -> None:
    """Overlapping items become one crop plus a touching_items note naming scan and box."""
    rng = np.random.default_rng(5)
    bed = Image.new("RGB", (1400, 1000), (244, 244, 242))
    place(bed, _item(rng, 280, 200), 80, 80, 1.5)
    place(bed, _item(rng, 280, 200), 600, 80, -2)
    place(bed, _item(rng, 300, 220), 120, 520, 0)
    place(bed, _item(rng, 300, 220), 350, 650, 0)
    add_noise(bed, rng).save(tmp_path / "pair.png")
    cands, notes = collect(scans_source(str(tmp_path), split={}), None, tmp_path)
    assert len(cands) == 1 + 3
    (note,) = notes
    assert note.kind == "touching_items" and note.url == "pair.png"
    assert "pair.png" in note.message and "box (x=" in note.message
    flagged = [c for c in cands[1:] if c.metadata["touching"]]
    assert len(flagged) == 1 and f"x={flagged[0].crop_box[0]}" in note.message


def test_missing_folder_gives_a_note(tmp_path: Path) -> None:
    """A scans path that does not exist is reported, not raised."""
    cands, notes = collect(scans_source("nope"), None, tmp_path)
    assert cands == [] and [n.kind for n in notes] == ["missing_folder"]


def test_glob_patterns_match_folders_and_case() -> None:
    """"**/" matches zero or more folders, "*" stays in one folder, case is ignored."""
    rx = glob_regex("**/*.png")
    assert rx.match("a.png") and rx.match("x/y/A.PNG") and not rx.match("a.png.txt")
    one = glob_regex("box?/*.tif")
    assert one.match("box1/s.tif") and not one.match("box1/sub/s.tif")
