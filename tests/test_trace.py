"""collector trace: exact, near and no matches over a real collection (real SQLite, real images).

The collection is built the way collector/run/ingest.py builds it: web items get a ``fetches`` row
for
their image download (purpose 'image', status 200, as the fetcher records it) and are ingested
with ``collector.checks.images.inspect_image`` + the store + a ``files`` row; the scan and its
crops go
through the real ``Gatherer`` ingest path for local candidates.
"""

from __future__ import annotations

import csv
import hashlib
import io
import json
import random
import shutil
from dataclasses import dataclass
from pathlib import Path
from types import SimpleNamespace

import imagehash
import numpy as np
import pytest
from PIL import Image, ImageDraw
from typer.testing import CliRunner

from collector.checks.images import inspect_image
from collector.checks.licences import normalise_licence, rights_conflict
from collector.checks.phash import hamming, hash_image_file, to_signed64
from collector.cli import app
from collector.exports.trace import Tracer, TraceResult
from collector.exports.trace_format import attribution_line, format_record, summarise
from collector.run.scheduling import Gatherer
from collector.storage.collection import Collection, init_collection
from collector.storage.ledger import Ledger

runner = CliRunner()
CAUTION_START = "Licence facts are as declared by the sources"


def make_picture(seed: int, size: tuple[int, int] = (480, 360)) -> Image.Image:
    """A deterministic picture: a gradient background and a few random shapes."""
    rng = random.Random(seed)
    w, h = size
    yy, xx = np.mgrid[0:h, 0:w]
    angle = rng.uniform(0, 2 * np.pi)
    ramp = (np.cos(angle) * xx / w + np.sin(angle) * yy / h)
    base = ((ramp - ramp.min()) / (np.ptp(ramp) or 1) * 200 + 20).astype(np.uint8)
    tint = [rng.uniform(0.4, 1.0) for _ in range(3)]
    rgb = np.stack([(base * t).astype(np.uint8) for t in tint], axis=-1)
    im = Image.fromarray(rgb, "RGB")
    draw = ImageDraw.Draw(im)
    for _ in range(rng.randint(4, 8)):
        x0, y0 = rng.randrange(0, w - 40), rng.randrange(0, h - 40)
        x1, y1 = x0 + rng.randrange(30, w // 2), y0 + rng.randrange(30, h // 2)
        colour = tuple(rng.randrange(256) for _ in range(3))
        if rng.random() < 0.5:
            draw.ellipse((x0, y0, x1, y1), fill=colour)
        else:
            draw.rectangle((x0, y0, x1, y1), fill=colour)
    return im


def jpeg_bytes(im: Image.Image, quality: int = 90, **kwargs: object) -> bytes:
    """Encode an image as JPEG."""
    out = io.BytesIO()
    im.save(out, "JPEG", quality=quality, **kwargs)
    return out.getvalue()


@dataclass
class Built:
    """A test collection and what went into it."""

    root: Path
    items: dict[str, int]  # source_key -> item id
    shas: dict[str, str]  # source_key -> stored sha256
    pictures: dict[str, Image.Image]
    scan_path: Path
    crop_boxes: dict[str, tuple[int, int, int, int]]


def _ingest_web(gatherer: Gatherer, ledger: Ledger, source_id: int, key: str, data: bytes,
                *, title: str | None, creator: str | None, licence: str | None,
                page: str, etag: str) -> int:
    """Register a web item, record its image fetch and ingest the bytes as run.py does."""
    image_url = f"http://127.0.0.2:8080/media/{key}.jpg"
    candidate = SimpleNamespace(
        source_key=key, image_url=image_url, page_url=page, title=title, creator=creator,
        licence_raw=licence, licence_url=None, date="2026-03-01", metadata={}, local_path=None,
        content=None, parent_key=None, crop_box=None)
    item_id = ledger.add_item(source_id, key, {
        "image_url": image_url, "page_url": page, "title": title, "creator": creator,
        "licence_raw": licence, "spdx_id": normalise_licence(licence, None).spdx_id,
        "date": candidate.date, "run_id": gatherer.run_id})
    # What the fetcher writes for a successful download (CONTRACT: one row per attempt).
    ledger.record_fetch(run_id=gatherer.run_id, item_id=item_id, purpose="image",
                        url=image_url, host="127.0.0.2:8080", status=200, bytes=len(data),
                        started_at="2026-03-01T21:53:28.100Z",
                        ended_at="2026-03-01T21:53:28.123Z", attempt=1,
                        robots_verdict="allowed", robots_rule="Allow: /media/", etag=etag,
                        last_modified="Sun, 01 Mar 2026 10:00:00 GMT",
                        content_type="image/jpeg", from_cache=0)
    fd, tmp = gatherer.store.new_temp()
    with open(fd, "wb") as fh:
        fh.write(data)
    gatherer.ingest.ingest_file(item_id, normalise_licence(licence, None).spdx_id, tmp,
                     hashlib.sha256(data).hexdigest(), content_type="image/jpeg",
                     url=image_url)
    return item_id


@pytest.fixture(scope="module")
def built(tmp_path_factory: pytest.TempPathFactory) -> Built:
    """A collection with web items, a duplicate, a near copy, a scan with two crops."""
    root = tmp_path_factory.mktemp("trace") / "leaves"
    collection: Collection = init_collection(root, contact="curator@example.org")
    recipe = collection.recipe()
    pictures = {f"FH-{n:03d}": make_picture(n) for n in range(1, 6)}
    items: dict[str, int] = {}
    with Ledger.open(collection.ledger_path) as ledger:
        gatherer = Gatherer(collection, recipe, ledger, fetcher=None)
        gatherer.run_id = ledger.start_run(recipe.sha256, {}, "test")
        api = ledger.source_id("society-api", "json_api", {})
        gallery = ledger.source_id("gallery", "html", {})
        creators = {"FH-001": "Ada Moss", "FH-002": "Bram Fernley", "FH-003": None,
                    "FH-004": "Cora Lichen", "FH-005": "Dell Sedge"}
        licences = {"FH-001": "CC BY 4.0", "FH-002": "CC-BY-SA-4.0", "FH-003": None,
                    "FH-004": "CC0 1.0", "FH-005": "CC BY-NC 4.0"}
        for key, im in pictures.items():
            extra: dict[str, object] = {}
            if key == "FH-002":  # camera serial in the Exif IFD (Exif 2.3 tag 0xA431)
                exif = Image.Exif()
                exif.get_ifd(0x8769)[0xA431] = "SN-4711"
                extra["exif"] = exif
            items[key] = _ingest_web(
                gatherer, ledger, api, key, jpeg_bytes(im, **extra),
                title=f"Specimen {key}" if key != "FH-004" else None,
                creator=creators[key], licence=licences[key],
                page=f"http://127.0.0.2:8080/specimens/{key}", etag=f'"etag-{key}"')
        # The same bytes listed again by another source: an exact duplicate.
        items["g-1"] = _ingest_web(
            gatherer, ledger, gallery, "g-1", jpeg_bytes(pictures["FH-001"]),
            title="Moss study", creator="Ada Moss", licence="CC BY 4.0",
            page="http://127.0.0.3:8080/gallery/1", etag='"g1"')
        # A scan of a scanner bed and two crops from it, through the Gatherer's local path.
        scans = ledger.source_id("scanner", "scans", {})
        bed = Image.new("RGB", (900, 500), (250, 250, 250))
        boxes = {"bed-01#1": (40, 30, 360, 270), "bed-01#2": (460, 120, 400, 300)}
        crops: dict[str, bytes] = {}
        for n, (ckey, (x, y, w, h)) in enumerate(boxes.items()):
            piece = make_picture(100 + n, (w, h))
            bed.paste(piece, (x, y))
            buf = io.BytesIO()
            piece.save(buf, "PNG")
            crops[ckey] = buf.getvalue()
        scan_dir = root / "scans"
        scan_dir.mkdir()
        scan_path = scan_dir / "bed-01.png"
        bed.save(scan_path)
        gatherer._register(scans, SimpleNamespace(
            source_key="bed-01", image_url=None, page_url=None, title="Bed 01",
            creator="Fernhollow Field Society", licence_raw="CC-BY-4.0", licence_url=None,
            date="2026-03-01", metadata={}, local_path=scan_path, content=None,
            parent_key=None, crop_box=None))
        for ckey, data in crops.items():
            gatherer._register(scans, SimpleNamespace(
                source_key=ckey, image_url=None, page_url=None, title=f"Crop {ckey}",
                creator="Fernhollow Field Society", licence_raw="CC-BY-4.0", licence_url=None,
                date="2026-03-01", metadata={}, local_path=None, content=data,
                parent_key="bed-01", crop_box=boxes[ckey]))
        rows = ledger.query("SELECT id, source_key, file_sha256 FROM items")
        items.update({r["source_key"]: r["id"] for r in rows})
        shas = {r["source_key"]: r["file_sha256"] for r in rows}
    return Built(root, items, shas, pictures, scan_path, boxes)


def trace_one(built: Built, path: Path) -> TraceResult:
    """Trace one file through the library."""
    with Tracer.open(built.root) as tracer:
        return tracer.trace_file(path)


# --- exact ---------------------------------------------------------------------------------
def test_every_stored_file_traces_exactly_to_the_item_that_stored_it(built: Built) -> None:
    """Each file in the store traces as exact to files.first_item_id with its provenance."""
    collection = Collection(built.root)
    with Ledger.open(collection.ledger_path, readonly=True) as ledger:
        first = {r["sha256"]: r["first_item_id"]
                 for r in ledger.query("SELECT sha256, first_item_id FROM files")}
    stored = list(collection.store.iter_stored())
    assert len(stored) == len(first) == 8  # 5 web + 1 scan + 2 crops
    with Tracer.open(built.root) as tracer:
        for sha, path in stored:
            result = tracer.trace_file(path)
            assert result.kind == "exact"
            assert result.sha256 == sha
            assert result.item is not None and result.item.item_id == first[sha]


def test_exact_record_has_source_licence_fetch_and_robots_facts(built: Built, tmp_path: Path
                                                                ) -> None:
    """The record names source, pages, licence (raw, SPDX, deed), fetch time, ETag and robots."""
    copy = tmp_path / "copy.jpg"
    copy.write_bytes(jpeg_bytes(built.pictures["FH-001"]))
    result = trace_one(built, copy)
    item = result.item
    assert result.kind == "exact" and item is not None
    assert (item.source, item.source_kind, item.source_key) == ("society-api", "json_api",
                                                               "FH-001")
    assert item.page_url == "http://127.0.0.2:8080/specimens/FH-001"
    assert item.image_url == "http://127.0.0.2:8080/media/FH-001.jpg"
    assert (item.licence_raw, item.spdx_id) == ("CC BY 4.0", "CC-BY-4.0")
    # standards.md section 7: deed URL form https://creativecommons.org/licenses/<code>/<ver>/
    assert item.deed_url == "https://creativecommons.org/licenses/by/4.0/"
    assert item.fetch is not None
    assert (item.fetch.status, item.fetch.etag, item.fetch.robots_verdict) == (
        200, '"etag-FH-001"', "allowed")
    assert item.fetch.fetched_at == "2026-03-01T21:53:28.123Z"
    assert result.allowed == "yes"


def test_a_renamed_copy_traces_by_content_not_name(built: Built, tmp_path: Path) -> None:
    """A stored file copied under an unrelated name still traces exactly."""
    sha = built.shas["FH-003"]
    src = Collection(built.root).store.find(sha)
    assert src is not None
    renamed = tmp_path / "holiday-photo.jpeg"
    shutil.copyfile(src, renamed)
    result = trace_one(built, renamed)
    assert result.kind == "exact" and result.item is not None
    assert result.item.source_key == "FH-003"


def test_duplicates_list_the_other_items_that_brought_the_same_bytes(built: Built) -> None:
    """An exact match lists every other item with the same bytes (state duplicate)."""
    src = Collection(built.root).store.find(built.shas["FH-001"])
    assert src is not None
    result = trace_one(built, src)
    assert result.file is not None
    others = [(o.source, o.source_key, o.state) for o in result.file.others]
    assert others == [("gallery", "g-1", "duplicate")]
    lines = "\n".join(format_record(result))
    assert "also from:    item #" in lines and "http://127.0.0.3:8080/gallery/1" in lines


def test_a_crop_traces_to_its_scan_and_box(built: Built) -> None:
    """A crop's record names the scan it was cut from and the (x, y, w, h) box."""
    src = Collection(built.root).store.find(built.shas["bed-01#2"])
    assert src is not None
    result = trace_one(built, src)
    item = result.item
    assert result.kind == "exact" and item is not None
    assert item.parent_sha256 == built.shas["bed-01"]
    assert item.crop_box == [460, 120, 400, 300]
    assert item.scan is not None and item.scan.local_path == str(built.scan_path)
    text = "\n".join(format_record(result))
    assert f"cut from:     scan {built.shas['bed-01'][:12]} ({built.scan_path})" in text
    assert "x=460 y=120 w=400 h=300" in text


# --- near ----------------------------------------------------------------------------------
def test_a_resized_copy_traces_as_near_to_the_right_original(built: Built, tmp_path: Path
                                                             ) -> None:
    """A half-size copy is a near match to its original, worded as probable."""
    path = tmp_path / "small.jpg"
    built.pictures["FH-002"].resize((240, 180), Image.Resampling.LANCZOS).save(path, quality=90)
    result = trace_one(built, path)
    assert result.kind == "near"
    assert result.best is not None and result.best.sha256 == built.shas["FH-002"]
    assert not result.near[0].mirrored
    head = format_record(result)[0]
    assert "probably a resized/re-encoded copy of " + built.shas["FH-002"][:12] in head
    assert result.attribution is not None and result.attribution.endswith(", modified")


def test_a_jpeg_reencoded_copy_traces_as_near_to_the_right_original(built: Built,
                                                                    tmp_path: Path) -> None:
    """A quality-60 re-encode of a stored JPEG is a near match to that file."""
    src = Collection(built.root).store.find(built.shas["FH-004"])
    assert src is not None
    path = tmp_path / "requality.jpg"
    with Image.open(src) as im:
        im.save(path, quality=60)
    result = trace_one(built, path)
    assert result.kind == "near" and result.best is not None
    assert result.best.sha256 == built.shas["FH-004"]


def test_a_mirrored_copy_traces_as_near_and_says_mirrored(built: Built, tmp_path: Path) -> None:
    """A left-right flipped copy matches through the mirror hash and is called mirrored."""
    path = tmp_path / "flipped.jpg"
    built.pictures["FH-005"].transpose(Image.Transpose.FLIP_LEFT_RIGHT).save(path, quality=90)
    result = runner.invoke(app, ["trace", str(path), "--in", str(built.root)])
    assert result.exit_code == 0, result.output
    assert f"probably a mirrored copy of {built.shas['FH-005'][:12]}" in result.output


def test_rotated_and_cropped_copies_say_so(built: Built, tmp_path: Path) -> None:
    """A copy turned 90 degrees, one turned 180 degrees and mirrored, and one cropped to 85 %
    of each side trace to their original with the words of issue 14 ("probably a rotated
    copy of", "probably a cropped copy of"); the second look's score is shown."""
    picture = built.pictures["FH-005"]
    w, h = picture.size
    copies = {
        "turned.jpg": (picture.transpose(Image.Transpose.ROTATE_90),
                       "probably a rotated copy of", " (turned 90 degrees counter-clockwise"),
        "flipped.jpg": (picture.transpose(Image.Transpose.ROTATE_180).transpose(
            Image.Transpose.FLIP_LEFT_RIGHT), "probably a rotated and mirrored copy of",
            " (turned 180 degrees counter-clockwise, then mirrored)"),
        "cropped.jpg": (picture.crop((int(w * 0.1), int(h * 0.05), int(w * 0.95),
                                      int(h * 0.9))), "probably a cropped copy of", ""),
    }
    for name, (im, words, turn) in copies.items():
        im.save(tmp_path / name, quality=85)
        result = runner.invoke(app, ["trace", str(tmp_path / name), "--in", str(built.root)])
        assert result.exit_code == 0, (name, result.output)
        first = result.output.splitlines()[0]
        assert f"{words} {built.shas['FH-005'][:12]}{turn}" in first, first
        assert "thumbnails agree at" in first and "not certain" in first


def test_an_unrelated_image_gives_no_match_and_exit_1(built: Built, tmp_path: Path) -> None:
    """A picture the collection never stored is reported plainly as untraced, exit 1."""
    path = tmp_path / "stranger.png"
    make_picture(999).save(path)
    result = runner.invoke(app, ["trace", str(path), "--in", str(built.root)])
    assert result.exit_code == 1
    assert result.output.splitlines()[0] == (
        f"{path}: no match: no stored file has these bytes, and none is within 8 bits of its "
        "perceptual hash. Its provenance is unknown to this collection.")
    assert CAUTION_START in result.output


# --- attribution and licences ----------------------------------------------------------------
def test_attribution_follows_title_author_source_licence(built: Built) -> None:
    """The credit line has title, author, source URL and licence with its deed link (TASL)."""
    src = Collection(built.root).store.find(built.shas["FH-001"])
    assert src is not None
    result = trace_one(built, src)
    # standards.md section 8 (CC recommended practice): Title, Author, Source, Licence + deed.
    assert result.attribution == (
        '"Specimen FH-001" by Ada Moss, http://127.0.0.2:8080/specimens/FH-001, licensed under '
        "CC BY 4.0 (https://creativecommons.org/licenses/by/4.0/)")


def test_unknown_licence_gets_a_line_saying_so(built: Built) -> None:
    """An item without a recognised licence gets an attribution that says it is unknown."""
    src = Collection(built.root).store.find(built.shas["FH-003"])
    assert src is not None
    result = trace_one(built, src)
    assert result.allowed == "unknown"
    assert result.attribution == (
        '"Specimen FH-003" by an author the source did not name, '
        "http://127.0.0.2:8080/specimens/FH-003, licence unknown: find the licence before "
        "reusing this image")


def test_public_domain_items_are_marked_not_licensed(built: Built) -> None:
    """CC0 items say 'marked with CC0 1.0' and link the CC0 deed; no title means none given."""
    line = attribution_line(trace_one(
        built, Collection(built.root).store.find(built.shas["FH-004"])).item)  # type: ignore[arg-type]
    assert line == ("Untitled image by Cora Lichen, http://127.0.0.2:8080/specimens/FH-004, "
                    "marked with CC0 1.0 (https://creativecommons.org/publicdomain/zero/1.0/)")


# --- folders -------------------------------------------------------------------------------
@pytest.fixture
def mixed_folder(built: Built, tmp_path: Path) -> Path:
    """A folder to publish: 2 exact, 1 near, 1 unknown image, plus a non-image text file."""
    folder = tmp_path / "to-publish"
    (folder / "sub").mkdir(parents=True)
    store = Collection(built.root).store
    shutil.copyfile(store.find(built.shas["FH-002"]), folder / "a.jpg")  # type: ignore[arg-type]
    shutil.copyfile(store.find(built.shas["FH-005"]), folder / "sub" / "b.jpg")  # type: ignore[arg-type]
    built.pictures["FH-001"].resize((320, 240)).save(folder / "sub" / "c.jpg", quality=85)
    make_picture(4242).save(folder / "d.png")
    (folder / "notes.jpg").write_text("not an image, despite the name")
    return folder


def test_folder_trace_prints_a_table_and_the_summary(built: Built, mixed_folder: Path) -> None:
    """A folder argument gives one table row per image file (a broken one included, as
    unreadable) and the summary counts."""
    result = runner.invoke(app, ["trace", str(mixed_folder), "--in", str(built.root)])
    assert result.exit_code == 1  # d.png is untraced, notes.jpg unreadable
    lines = result.output.splitlines()
    assert lines[0].split() == ["file", "match", "distance", "source", "spdx_id", "allowed",
                                "flags", "copy_kind", "note"]
    rows = {Path(line.split()[0]).name: line.split() for line in lines[1:6]}
    assert set(rows) == {"a.jpg", "b.jpg", "c.jpg", "d.png", "notes.jpg"}
    assert rows["notes.jpg"][1] == "unreadable" and "not a readable image" in lines[
        [Path(x.split()[0]).name for x in lines[1:6]].index("notes.jpg") + 1]
    assert rows["a.jpg"][1:7] == ["exact", "0", "society-api", "CC-BY-SA-4.0", "yes",
                                  "camera_serial"]
    assert rows["b.jpg"][1:6] == ["exact", "0", "society-api", "CC-BY-NC-4.0", "no"]
    assert rows["c.jpg"][1] == "near" and rows["c.jpg"][4] == "CC-BY-4.0"
    assert rows["c.jpg"][7] == "resized/re-encoded"
    assert rows["d.png"][1:] == ["none", "-", "-", "-", "unknown", "-", "-", "-"]
    assert ("5 files: 2 exact, 1 near, 2 without known provenance (1 unreadable), 1 with "
            "licences outside the allowlist, 1 with personal-data flags") in result.output
    assert CAUTION_START in result.output


def test_folder_trace_as_csv_has_one_row_per_image(built: Built, mixed_folder: Path) -> None:
    """--csv gives a header and one parseable row per image, with the matched sha256."""
    result = runner.invoke(app, ["trace", str(mixed_folder), "--in", str(built.root), "--csv"])
    assert result.exit_code == 1
    rows = list(csv.DictReader(io.StringIO(result.stdout)))
    by_name = {Path(r["file"]).name: r for r in rows}
    assert sorted(by_name) == ["a.jpg", "b.jpg", "c.jpg", "d.png", "notes.jpg"]
    assert by_name["notes.jpg"]["match"] == "unreadable" and by_name["notes.jpg"]["note"]
    assert by_name["c.jpg"]["copy_kind"] == "resized/re-encoded"
    assert by_name["a.jpg"]["matched_sha256"] == built.shas["FH-002"]
    assert by_name["c.jpg"]["matched_sha256"] == built.shas["FH-001"]
    assert by_name["d.png"]["match"] == "none" and by_name["d.png"]["matched_sha256"] == ""


def test_folder_trace_as_json_has_records_and_summary(built: Built, mixed_folder: Path) -> None:
    """--json gives each file's full record, the summary counts and the caution."""
    result = runner.invoke(app, ["trace", str(mixed_folder), "--in", str(built.root), "--json"])
    data = json.loads(result.stdout)
    assert data["summary"] == {"files": 5, "exact": 2, "near": 1, "untraced": 2,
                               "outside_allowlist": 1, "personal_data": 1, "unreadable": 1,
                               "not_a_file": 0}
    near = next(r for r in data["results"] if r["kind"] == "near")
    assert near["near"][0]["file"]["origin"]["source_key"] == "FH-001"
    assert near["distance"] == near["near"][0]["distance"] <= 8
    assert data["caution"].startswith(CAUTION_START)


def test_folder_trace_lists_every_path_with_a_state(built: Built, tmp_path: Path) -> None:
    """Every entry of a folder is in the human table, the CSV and the JSON with a state: a
    FIFO, a socket, a broken link, a link loop and a link back to the folder are not_a_file
    (and do not hang the walk), a damaged image is unreadable with its reason; exit 1."""
    import os
    import socket

    folder = tmp_path / "mixed"
    folder.mkdir()
    store = Collection(built.root).store
    shutil.copyfile(store.find(built.shas["FH-002"]), folder / "a.jpg")  # type: ignore[arg-type]
    (folder / "cut.jpg").write_bytes(jpeg_bytes(make_picture(5))[:300])  # truncated
    os.mkfifo(folder / "pipe.jpg")
    sock = socket.socket(socket.AF_UNIX)
    sock.bind(str(folder / "sock"))
    (folder / "gone.png").symlink_to(folder / "missing.png")
    (folder / "loop.jpg").symlink_to(folder / "loop.jpg")
    (folder / "back").symlink_to(folder)  # a folder link loop: never followed
    try:
        expected = {"a.jpg": "exact", "cut.jpg": "unreadable", "pipe.jpg": "not_a_file",
                    "sock": "not_a_file", "gone.png": "not_a_file", "loop.jpg": "not_a_file",
                    "back": "not_a_file"}
        out = runner.invoke(app, ["trace", str(folder), "--in", str(built.root), "--csv"])
        assert out.exit_code == 1
        rows = {Path(r["file"]).name: r for r in csv.DictReader(io.StringIO(out.stdout))}
        assert {name: r["match"] for name, r in rows.items()} == expected
        assert rows["loop.jpg"]["note"] == "a symbolic link loop"
        assert rows["gone.png"]["note"] == "a broken symbolic link"
        assert rows["pipe.jpg"]["note"] == "a FIFO (named pipe)"
        assert rows["cut.jpg"]["note"].startswith("not a readable image")
        data = json.loads(runner.invoke(
            app, ["trace", str(folder), "--in", str(built.root), "--json"]).stdout)
        assert sorted(Path(r["path"]).name for r in data["results"]) == sorted(expected)
        assert data["summary"]["not_a_file"] == 5 and data["summary"]["unreadable"] == 1
        human = runner.invoke(app, ["trace", str(folder), "--in", str(built.root)])
        assert human.exit_code == 1
        for name in expected:
            assert any(Path(line.split()[0]).name == name
                       for line in human.output.splitlines()[1:8]), name
    finally:
        sock.close()


def test_a_fifo_given_by_name_is_not_a_file_and_exit_1(built: Built, tmp_path: Path) -> None:
    """A FIFO named on the command line is reported as not_a_file (never opened), exit 1."""
    import os

    fifo = tmp_path / "pipe.jpg"
    os.mkfifo(fifo)
    result = runner.invoke(app, ["trace", str(fifo), "--in", str(built.root)])
    assert result.exit_code == 1
    assert f"{fifo}: not a file: a FIFO (named pipe). Not traced." in result.output


# --- exit codes and messages -----------------------------------------------------------------
def test_all_traced_exits_0(built: Built) -> None:
    """Tracing only stored files exits 0 and prints the caution."""
    src = Collection(built.root).store.find(built.shas["bed-01"])
    result = runner.invoke(app, ["trace", str(src), "--in", str(built.root)])
    assert result.exit_code == 0
    assert f"{src}: exact match (same bytes, sha256 {built.shas['bed-01']})" in result.output


def test_missing_file_is_a_usage_error_exit_2(built: Built, tmp_path: Path) -> None:
    """A path that does not exist exits 2 with an actionable message."""
    missing = tmp_path / "nope.jpg"
    result = runner.invoke(app, ["trace", str(missing), "--in", str(built.root)])
    assert result.exit_code == 2
    assert result.stderr == (f"Error: {missing} does not exist; give an image file or a "
                             "folder\n")


def test_not_a_collection_is_a_usage_error_exit_2(built: Built, tmp_path: Path) -> None:
    """--in pointing at a plain folder exits 2 and says how to make a collection."""
    src = Collection(built.root).store.find(built.shas["FH-001"])
    result = runner.invoke(app, ["trace", str(src), "--in", str(tmp_path)])
    assert result.exit_code == 2
    assert result.stderr == (
        f"Error: {tmp_path} is not a collection folder (no recipe.toml and ledger.sqlite); "
        f"create one with 'collector init {tmp_path}'\n")


def test_collection_defaults_to_the_environment_variable(built: Built) -> None:
    """Without --in, COLLECTOR_COLLECTION names the collection."""
    src = Collection(built.root).store.find(built.shas["FH-002"])
    result = runner.invoke(app, ["trace", str(src)], env={"COLLECTOR_COLLECTION": str(built.root)})
    assert result.exit_code == 0, result.output


def test_trace_works_while_a_gather_holds_the_lock(built: Built) -> None:
    """Trace only reads the ledger, so it runs while gather holds the folder lock."""
    src = Collection(built.root).store.find(built.shas["FH-001"])
    with Collection(built.root).gather_lock():
        result = runner.invoke(app, ["trace", str(src), "--in", str(built.root)])
    assert result.exit_code == 0, result.output


# --- the hash against outside references -----------------------------------------------------
def test_query_hash_matches_imagehash_reference(tmp_path: Path) -> None:
    """The hash trace computes for a PNG equals imagehash.phash (test-only reference)."""
    # libraries.md section 2: numpy pHash is bit-identical to imagehash.phash; imagehash is a
    # test-only dependency. PNG: no draft(), so both see the same pixels.
    for seed in range(5):
        path = tmp_path / f"p{seed}.png"
        make_picture(seed).save(path)
        with Image.open(path) as im:
            reference = int(str(imagehash.phash(im)), 16)
        assert hash_image_file(path)[0] == reference


def test_threshold_separates_related_copies_from_unrelated_images(tmp_path: Path) -> None:
    """Resized/re-encoded/flipped copies fall within 8 bits, unrelated pictures beyond it."""
    # libraries.md section 2: resize/q70/flip-via-mirror-hash max 2 bits; closest unrelated
    # pair 14 bits; threshold 8 found every such copy and no unrelated pair.
    related, unrelated = [], []
    hashes = []
    for seed in range(12):
        im = make_picture(seed)
        orig = tmp_path / f"o{seed}.jpg"
        im.save(orig, quality=90)
        h, _ = hash_image_file(orig)
        hashes.append(h)
        im.resize((240, 180)).save(tmp_path / "r.jpg", quality=90)
        im.save(tmp_path / "q.jpg", quality=60)
        im.transpose(Image.Transpose.FLIP_LEFT_RIGHT).save(tmp_path / "f.jpg", quality=90)
        related.append(hamming(h, hash_image_file(tmp_path / "r.jpg")[0]))
        related.append(hamming(h, hash_image_file(tmp_path / "q.jpg")[0]))
        related.append(hamming(h, hash_image_file(tmp_path / "f.jpg")[1]))
    unrelated = [hamming(a, b) for i, a in enumerate(hashes) for b in hashes[i + 1:]]
    assert max(related) <= 8 < min(unrelated)


def test_summary_counts_personal_data_and_disallowed(built: Built) -> None:
    """summarise counts each kind once per file."""
    store = Collection(built.root).store
    with Tracer.open(built.root) as tracer:
        results = [tracer.trace_file(store.find(built.shas[k]))  # type: ignore[arg-type]
                   for k in ("FH-002", "FH-005", "bed-01")]
    s = summarise(results)
    assert (s.files, s.exact, s.outside_allowlist, s.personal_data) == (3, 3, 1, 1)


def test_rights_conflict_flag_is_reported(built: Built) -> None:
    """A files row flagged licence_conflict shows the flag in the trace."""
    # Sanity of the flag's origin: run.py adds it when rights_conflict() finds a contradiction.
    assert rights_conflict("CC0-1.0", {"exif_copyright": "All rights reserved"})
    with Ledger.open(Collection(built.root).ledger_path) as ledger:
        row = ledger.file(built.shas["FH-004"])
        assert row is not None
        ledger.db.execute("UPDATE files SET flags = ? WHERE sha256 = ?",
                          [json.dumps(["licence_conflict"]), built.shas["FH-004"]])
        ledger.db.conn.commit()
    try:
        src = Collection(built.root).store.find(built.shas["FH-004"])
        result = trace_one(built, src)  # type: ignore[arg-type]
        assert result.flags == ["licence_conflict"]
    finally:
        with Ledger.open(Collection(built.root).ledger_path) as ledger:
            ledger.db.execute("UPDATE files SET flags = ? WHERE sha256 = ?",
                              [json.dumps(row["flags"]), built.shas["FH-004"]])
            ledger.db.conn.commit()


def test_stored_hashes_are_signed_in_the_ledger(built: Built) -> None:
    """files.phash holds the signed form of the file's hash (CONTRACT ledger note)."""
    src = Collection(built.root).store.find(built.shas["FH-001"])
    with Ledger.open(Collection(built.root).ledger_path, readonly=True) as ledger:
        row = ledger.file(built.shas["FH-001"])
    assert row is not None and row["phash"] == to_signed64(inspect_image(src).phash)  # type: ignore[arg-type]
