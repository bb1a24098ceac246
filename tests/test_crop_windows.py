"""Crops and rotations found through the window hashes: the hashes against imagehash, the
window scan, a gather that drops a rotated and a cropped copy, and trace of a crop, also for
files stored before there were window hashes."""

from __future__ import annotations

import io
import sqlite3
from pathlib import Path

import imagehash
import numpy as np
import pytest
from PIL import Image, ImageDraw

from collector.checks.phash import (
    WINDOW_ALGO,
    WINDOWS,
    hamming,
    pack_windows,
    prepare_for_hash,
    unpack_windows,
    window_hashes,
    windows_of,
)
from collector.exports.trace import Tracer
from collector.run.gather import gather
from collector.storage.collection import init_collection
from collector.storage.hashindex import N_WINDOWS, discard_hash_file, scan_windows

NO_FETCHER = {"fetcher_factory": lambda recipe, ledger: None}
EXIF_ORIENTATION = 0x0112  # EXIF 2.32 section 4.6.4, tag Orientation (standards.md 6.1)


def picture(seed: int, size: tuple[int, int] = (300, 240)) -> Image.Image:
    """A structured picture: a smooth colour field with ellipses and bars on it."""
    rng = np.random.default_rng(seed)
    small = rng.integers(0, 256, (8, 10, 3), dtype=np.uint8)
    im = Image.fromarray(small).resize(size, Image.Resampling.BICUBIC)
    draw = ImageDraw.Draw(im)
    w, h = size
    for _ in range(6):
        x0, y0 = (int(v) for v in rng.integers(0, w - 50, 1).tolist() + rng.integers(
            0, h - 40, 1).tolist())
        colour = tuple(int(c) for c in rng.integers(0, 256, 3))
        if rng.random() < 0.5:
            draw.ellipse([x0, y0, x0 + 48, y0 + 36], fill=colour)
        else:
            draw.rectangle([x0, y0, x0 + 60, y0 + 12], fill=colour)
    return im


def window_boxes(size: tuple[int, int]) -> list[tuple[int, int, int, int]]:
    """The 16 windows in whole pixels (our own layout, collector.checks.phash.WINDOWS)."""
    w, h = size
    return [(round(a * w), round(b * h), round(c * w), round(d * h)) for a, b, c, d in WINDOWS]


def test_window_hashes_match_imagehash_of_each_window() -> None:
    """Each window hash of an 8-bit RGB picture is imagehash's phash of that crop (imagehash
    4.3 phash, hash_size 8; libraries.md section 2) within 2 bits, and most are the same bits:
    the windows are resampled in floating point, without Pillow's rounding to 8 bits between
    its two passes, so a coefficient at the median may tip (one bit pair)."""
    assert len(WINDOWS) == 16 and all(
        abs((c - a) - 0.8) < 1e-9 and abs((d - b) - 0.8) < 1e-9 for a, b, c, d in WINDOWS)
    same = 0
    for seed in range(4):
        im = picture(seed)
        reference = [int(str(imagehash.phash(im.crop(box))), 16)
                     for box in window_boxes(im.size)]
        ours = windows_of(prepare_for_hash(im))
        assert all(hamming(a, b) <= 2 for a, b in zip(ours, reference, strict=True))
        same += sum(a == b for a, b in zip(ours, reference, strict=True))
    assert same >= 48  # of 64: measured 57 (the margin is ours, common practice, no source)


def test_packed_window_hashes_round_trip_and_damage_reads_as_none() -> None:
    """The ledger's 128 bytes give the 16 hashes back; NULL or a damaged length gives none."""
    hashes = [(1 << 64) - 1 - n for n in range(16)]
    raw = pack_windows(hashes)
    assert len(raw) == 128 and unpack_windows(raw) == hashes
    assert unpack_windows(None) == [] and unpack_windows(raw[:-1]) == []


def test_window_scan_finds_the_closest_rows_and_never_an_empty_row() -> None:
    """scan_windows returns the rows with a window within the radius, closest first; a row
    of zeros (a file without window hashes) is never near, even for a query of few bits."""
    rng = np.random.default_rng(4)
    windows = rng.integers(0, 2**63, size=(50, N_WINDOWS), dtype=np.int64).astype(np.uint64)
    windows[7] = 0  # stored before there were window hashes
    query = int(windows[3, 5]) ^ 0b111  # 3 bits from row 3's sixth window
    windows[20, 0] = np.uint64(query ^ 0b1111111)  # 7 bits from row 20
    assert scan_windows(windows, query)[:2] == [(3, 3), (20, 7)]
    few_bits = (1 << 10) - 1  # 10 bits set: within 12 bits of a zero hash
    assert all(row != 7 for row, _ in scan_windows(windows, few_bits))


def jpeg_bytes(im: Image.Image, orientation: int = 1) -> bytes:
    """JPEG quality 90, with an EXIF orientation when it is not 1."""
    buf = io.BytesIO()
    exif = Image.Exif()
    if orientation != 1:
        exif[EXIF_ORIENTATION] = orientation
    im.save(buf, "JPEG", quality=90, exif=exif.tobytes())
    return buf.getvalue()


@pytest.fixture
def gathered(tmp_path: Path) -> tuple[object, dict[str, Path]]:
    """A gather with near_duplicates = "drop" over: an original JPEG stored sideways (EXIF
    orientation 6, shown upright), a copy turned by 90 degrees, a crop keeping 80 % of each
    side, and an unrelated picture."""
    col = init_collection(tmp_path / "c", contact="me@example.org")
    folder = col.root / "in"
    folder.mkdir()
    upright = picture(11)
    # Orientation 6: the viewer turns the stored pixels 90 degrees clockwise (standards.md
    # 6.1), so the stored pixels are the upright picture turned counter-clockwise.
    (folder / "a_original.jpg").write_bytes(
        jpeg_bytes(upright.transpose(Image.Transpose.ROTATE_90), orientation=6))
    (folder / "b_turned.jpg").write_bytes(jpeg_bytes(
        upright.transpose(Image.Transpose.ROTATE_270)))
    crop = upright.crop((37, 11, 37 + 240, 11 + 192))
    crop.save(folder / "c_cropped.png")
    picture(12).save(folder / "d_other.png")
    text = col.recipe_path.read_text().replace('near_duplicates = "keep"',
                                               'near_duplicates = "drop"')
    col.recipe_path.write_text(text + (
        '\n[[sources]]\nname = "desk"\nkind = "scans"\npath = "in"\nlicence = "CC0-1.0"\n'))
    gather(col, **NO_FETCHER)
    paths = {p.name: p for p in folder.iterdir()}
    return col, paths


def test_gather_drops_a_rotated_and_a_cropped_copy(gathered) -> None:
    """With near_duplicates = "drop", a copy turned by 90 degrees and a crop to 80 % of a
    stored picture are recorded as near duplicates of it, worded by kind, and not stored;
    the unrelated picture is stored."""
    col, _ = gathered
    with col.ledger(readonly=True) as ledger:
        items = {r["source_key"]: r for r in ledger.query(
            "SELECT id, source_key, state, detail, duplicate_of FROM items")}
    original = items["a_original.jpg"]["id"]
    assert items["a_original.jpg"]["state"] == items["d_other.png"]["state"] == "stored"
    turned, cropped = items["b_turned.jpg"], items["c_cropped.png"]
    assert (turned["state"], turned["duplicate_of"]) == ("near_duplicate", original)
    assert turned["detail"].startswith(f"probably a rotated copy of item {original} ")
    assert (cropped["state"], cropped["duplicate_of"]) == ("near_duplicate", original)
    assert cropped["detail"].startswith(f"probably a cropped copy of item {original} ")
    assert "not stored (recipe: drop)" in cropped["detail"]
    assert len(dict(col.store.iter_stored())) == 2


def test_stored_window_hashes_are_what_window_hashes_gives_for_the_stored_file(gathered,
                                                                               ) -> None:
    """The window hashes ingest recorded equal window_hashes() of the stored file (the
    function that fills them in for files stored before), EXIF orientation applied."""
    col, _ = gathered
    with col.ledger(readonly=True) as ledger:
        rows = ledger.query("SELECT sha256, window_hashes, window_algo, orientation FROM files")
    assert len(rows) == 2
    for row in rows:
        assert row["window_algo"] == WINDOW_ALGO
        with Image.open(col.store.find(row["sha256"])) as im:
            assert window_hashes(im, row["orientation"]) == unpack_windows(
                row["window_hashes"])


def _original_sha(col: object) -> str:
    with col.ledger(readonly=True) as ledger:  # type: ignore[attr-defined]
        return str(ledger.scalar("SELECT file_sha256 FROM items WHERE source_key = ?",
                                 ("a_original.jpg",)))


def test_trace_names_a_crop_and_a_turned_copy(gathered) -> None:
    """trace finds the crop through the window hashes ("cropped") and the turned copy
    through the turned pHash ("rotate270": turned back 90 degrees), both of the original."""
    col, paths = gathered
    with Tracer.open(col.root) as tracer:
        crop = tracer.trace_file(paths["c_cropped.png"])
        turned = tracer.trace_file(paths["b_turned.jpg"])
    sha = _original_sha(col)
    assert crop.kind == "near" and (crop.near[0].how, crop.near[0].file.sha256) == ("crop", sha)
    assert turned.kind == "near" and turned.near[0].file.sha256 == sha
    assert turned.near[0].how == "rotate270"


def test_files_stored_before_window_hashes_still_trace(gathered) -> None:
    """A ledger whose files have no window hashes (NULL, then no such columns at all, as
    before the migration) still traces: the turned copy is found, the crop is either not
    found or found as a crop of the right file, nothing else, and no error."""
    col, paths = gathered
    sha = _original_sha(col)
    for change in ("UPDATE files SET window_hashes = NULL, window_algo = NULL",
                   "ALTER TABLE files DROP COLUMN window_hashes"):
        with sqlite3.connect(col.ledger_path) as conn:
            conn.execute(change)
        conn.close()
        discard_hash_file(col.hash_index_path)
        with Tracer.open(col.root) as tracer:
            assert not tracer.hashes.windows.any()
            crop = tracer.trace_file(paths["c_cropped.png"])
            turned = tracer.trace_file(paths["b_turned.jpg"])
        assert turned.kind == "near" and turned.near[0].file.sha256 == sha
        assert crop.kind in ("near", "none")
        assert all((c.how, c.file.sha256) == ("crop", sha) for c in crop.near)
