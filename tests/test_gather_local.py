"""gather over a local folder: ingest checks, exact and near de-duplication, resume, status.

No network is involved: a `scans` source reads generated images from disk, so this exercises the
run's decisions (licence, image checks, de-duplication, store, ledger) on real files.
"""

from __future__ import annotations

import hashlib
import io
from pathlib import Path

import numpy as np
import pytest
from PIL import Image, ImageOps
from typer.testing import CliRunner

from collector.cli import app
from collector.run.gather import gather
from collector.run.scheduling import StopRules
from collector.storage.collection import init_collection

NO_FETCHER = {"fetcher_factory": lambda recipe, ledger: None}


def structured_image(seed: int, size: tuple[int, int] = (320, 240)) -> Image.Image:
    """A picture with real structure (smooth noise + shapes), unlike flat fills."""
    rng = np.random.default_rng(seed)
    small = rng.integers(0, 255, (6, 8, 3), dtype=np.uint8)
    im = Image.fromarray(small).resize(size, Image.BICUBIC)
    return im


def jpeg_bytes(im: Image.Image, quality: int = 90) -> bytes:
    buf = io.BytesIO()
    im.save(buf, "JPEG", quality=quality)
    return buf.getvalue()


@pytest.fixture
def folder_collection(tmp_path: Path):
    """A collection whose recipe reads ./incoming with a declared CC BY 4.0 licence."""
    col = init_collection(tmp_path / "c", contact="me@example.org")
    incoming = col.root / "incoming"
    incoming.mkdir()
    originals = [structured_image(s) for s in range(4)]
    for i, im in enumerate(originals):
        (incoming / f"a{i}.jpg").write_bytes(jpeg_bytes(im))
    (incoming / "copy_of_a0.jpg").write_bytes((incoming / "a0.jpg").read_bytes())
    (incoming / "a1_half.jpg").write_bytes(jpeg_bytes(originals[1].resize((160, 120))))
    (incoming / "a2_mirror.jpg").write_bytes(jpeg_bytes(ImageOps.mirror(originals[2])))
    (incoming / "broken.jpg").write_bytes(jpeg_bytes(originals[3])[:-2])  # EOI missing
    (incoming / "tiny.jpg").write_bytes(jpeg_bytes(structured_image(9, (40, 30))))
    (incoming / "page.jpg").write_bytes(b"<html><body>Not found</body></html>")
    recipe = col.recipe_path.read_text()
    recipe = recipe.replace("min_side = 0 ", "min_side = 64 ")
    recipe += ('\n[[sources]]\nname = "desk"\nkind = "scans"\npath = "incoming"\n'
               'include = ["*.jpg"]\ncreator = "R. Quillfeather"\nlicence = "CC-BY-4.0"\n')
    col.recipe_path.write_text(recipe)
    return col


def states(col) -> dict[str, tuple[str, str | None]]:
    with col.ledger(readonly=True) as ledger:
        return {r["source_key"]: (r["state"], r["reason"]) for r in ledger.query(
            "SELECT source_key, state, reason FROM items")}


def test_gather_decides_every_file(folder_collection) -> None:
    """Each file ends in the state a careful curator expects."""
    result = gather(folder_collection, **NO_FETCHER)
    assert result.outcome == "finished"
    assert states(folder_collection) == {
        "a0.jpg": ("stored", None), "a1.jpg": ("stored", None), "a2.jpg": ("stored", None),
        "a3.jpg": ("stored", None),
        "copy_of_a0.jpg": ("duplicate", "exact_duplicate"),
        "a1_half.jpg": ("near_duplicate", "near_duplicate"),
        "a2_mirror.jpg": ("near_duplicate", "near_duplicate"),
        "broken.jpg": ("rejected", "broken_image"),
        "tiny.jpg": ("rejected", "too_small"),
        "page.jpg": ("rejected", "not_an_image"),
    }


def test_store_holds_each_kept_file_once_under_its_sha256(folder_collection) -> None:
    """Stored files are named by their SHA-256; the exact duplicate is not stored twice."""
    gather(folder_collection, **NO_FETCHER)
    stored = dict(folder_collection.store.iter_stored())
    assert len(stored) == 6  # 4 originals + 2 kept near duplicates
    for sha, path in stored.items():
        assert hashlib.sha256(path.read_bytes()).hexdigest() == sha
    with folder_collection.ledger(readonly=True) as ledger:
        assert ledger.known_sha256s() == set(stored)
        dup = ledger.query("SELECT duplicate_of, file_sha256 FROM items "
                           "WHERE source_key = 'copy_of_a0.jpg'")[0]
        first = ledger.query("SELECT id, file_sha256 FROM items WHERE source_key = 'a0.jpg'")[0]
        assert dup == {"duplicate_of": first["id"], "file_sha256": first["file_sha256"]}
        mirror = ledger.query("SELECT near_mirrored, near_distance FROM items "
                              "WHERE source_key = 'a2_mirror.jpg'")[0]
        assert mirror["near_mirrored"] == 1 and mirror["near_distance"] <= 8


def test_near_duplicates_are_not_stored_when_the_recipe_says_drop(folder_collection) -> None:
    """near_duplicates = "drop" records near copies but keeps their bytes out of the store."""
    text = folder_collection.recipe_path.read_text().replace(
        'near_duplicates = "keep"', 'near_duplicates = "drop"')
    folder_collection.recipe_path.write_text(text)
    gather(folder_collection, **NO_FETCHER)
    assert len(dict(folder_collection.store.iter_stored())) == 4
    assert states(folder_collection)["a1_half.jpg"] == ("near_duplicate", "near_duplicate")


def test_licence_outside_allowlist_is_skipped_before_any_file_is_read(folder_collection) -> None:
    """A source declaring a non-commercial licence yields skipped items and stores nothing."""
    text = folder_collection.recipe_path.read_text().replace(
        'licence = "CC-BY-4.0"', 'licence = "CC BY-NC 4.0"')
    folder_collection.recipe_path.write_text(text)
    gather(folder_collection, **NO_FETCHER)
    found = states(folder_collection)
    assert set(found.values()) == {("skipped", "licence_not_allowed")}
    assert list(folder_collection.store.iter_stored()) == []


def test_rerun_resumes_without_touching_finished_items(folder_collection) -> None:
    """A second run finds every item done and changes nothing."""
    gather(folder_collection, **NO_FETCHER)
    before = states(folder_collection)
    result = gather(folder_collection, **NO_FETCHER)
    assert result.counts["already_done"] == len(before)
    assert states(folder_collection) == before


def test_max_items_stops_the_run_and_the_next_run_finishes(folder_collection) -> None:
    """--max-items 2 stores two new files; the next run completes the rest."""
    result = gather(folder_collection, stop=StopRules(max_items=2), **NO_FETCHER)
    assert result.outcome == "stopped: 2 new items stored"
    with folder_collection.ledger(readonly=True) as ledger:
        assert ledger.scalar("SELECT count(*) FROM files") == 2
    gather(folder_collection, **NO_FETCHER)
    assert states(folder_collection)["a3.jpg"] == ("stored", None)


def test_status_command_summarises_the_ledger(folder_collection) -> None:
    """`collector status` prints counts by state with reasons and the licence breakdown."""
    gather(folder_collection, **NO_FETCHER)
    result = CliRunner().invoke(app, ["status", str(folder_collection.root)])
    assert result.exit_code == 0
    assert "stored               4" in result.output
    assert "rejected             3   (broken_image 1, not_an_image 1, too_small 1)" \
        in result.output
    assert "licences of stored items: CC-BY-4.0 6" in result.output


def test_gather_without_sources_is_a_recipe_error(tmp_path: Path) -> None:
    """A recipe with no [[sources]] gives a clear exit-2 error."""
    col = init_collection(tmp_path / "c", contact="me@example.org")
    result = CliRunner().invoke(app, ["gather", str(col.root)])
    assert result.exit_code == 2
    assert "no [[sources]] yet" in result.stderr


def test_gather_refuses_a_recipe_whose_environment_variable_is_unset(
        tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    """A ${NAME} the recipe uses but the environment lacks is named before anything is sent,
    rather than sending an empty API key."""
    monkeypatch.delenv("FERN_ARCHIVE_KEY", raising=False)
    col = init_collection(tmp_path / "c", contact="me@example.org")
    col.recipe_path.write_text(col.recipe_path.read_text() + (
        '\n[[sources]]\nname = "api"\nkind = "json_api"\nurl = "http://127.0.0.9/items"\n'
        'params = { key = "${FERN_ARCHIVE_KEY}" }\nsecret_params = ["key"]\n'
        '[sources.fields]\nitems = "items"\nid = "id"\nimage_url = "image"\n'))
    result = CliRunner().invoke(app, ["gather", str(col.root)])
    assert result.exit_code == 2
    assert ('sources[1] ("api").params.key: uses ${FERN_ARCHIVE_KEY}, but the environment '
            "variable FERN_ARCHIVE_KEY is not set") in result.stderr
    with col.ledger(readonly=True) as ledger:
        assert ledger.scalar("SELECT count(*) FROM runs") == 0


def test_icc_profile_and_density_are_kept_in_the_ledger(tmp_path: Path) -> None:
    """A scan with an embedded sRGB profile at 300 dpi: its files row names the profile (its
    ICC.1 'desc' tag, read through Pillow's ImageCms) and the density; a plain PNG has NULLs.
    rebuild-ledger records the same facts."""
    from PIL import ImageCms

    from collector.storage.ledger_repair import rebuild_ledger

    col = init_collection(tmp_path / "c", contact="me@example.org")
    (col.root / "in").mkdir()
    profile = ImageCms.ImageCmsProfile(ImageCms.createProfile("sRGB"))
    structured_image(1).save(col.root / "in" / "with.jpg", icc_profile=profile.tobytes(),
                             dpi=(300, 300))
    structured_image(2).save(col.root / "in" / "plain.png")
    col.recipe_path.write_text(col.recipe_path.read_text() + (
        '\n[[sources]]\nname = "desk"\nkind = "scans"\npath = "in"\nlicence = "CC0-1.0"\n'))
    gather(col, **NO_FETCHER)
    query = ("SELECT i.source_key, f.icc_profile, f.dpi_x, f.dpi_y FROM items i "
             "JOIN files f ON f.sha256 = i.file_sha256 ORDER BY i.source_key")
    expected = [("plain.png", None, None, None),
                ("with.jpg", ImageCms.getProfileDescription(profile).strip(), 300.0, 300.0)]
    with col.ledger(readonly=True) as ledger:
        assert [tuple(r.values()) for r in ledger.query(query)] == expected
        before = {r["sha256"]: (r["icc_profile"], r["dpi_x"]) for r in ledger.query(
            "SELECT sha256, icc_profile, dpi_x FROM files")}
    col.ledger_path.write_bytes(b"")
    for leftover in col.root.glob("ledger.sqlite-*"):
        leftover.unlink()
    rebuild_ledger(col.root)
    with col.ledger(readonly=True) as ledger:
        after = {r["sha256"]: (r["icc_profile"], r["dpi_x"]) for r in ledger.query(
            "SELECT sha256, icc_profile, dpi_x FROM files")}
    assert after == before


def test_flat_images_of_different_colours_are_not_near_duplicates(tmp_path: Path) -> None:
    """Two single-colour pictures share a perceptual hash (the DC bit alone) but are not
    copies of each other: both are stored; and trace says a flat file is too plain to
    compare instead of naming one of them."""
    col = init_collection(tmp_path / "c", contact="me@example.org")
    (col.root / "in").mkdir()
    Image.new("RGB", (320, 240), (200, 30, 30)).save(col.root / "in" / "red.png")
    Image.new("RGB", (320, 240), (30, 30, 200)).save(col.root / "in" / "blue.png")
    col.recipe_path.write_text(col.recipe_path.read_text() + (
        '\n[[sources]]\nname = "desk"\nkind = "scans"\npath = "in"\nlicence = "CC0-1.0"\n'))
    gather(col, **NO_FETCHER)
    with col.ledger(readonly=True) as ledger:
        states = {r["source_key"]: r["state"] for r in ledger.query(
            "SELECT source_key, state FROM items")}
    assert states == {"red.png": "stored", "blue.png": "stored"}
    white = tmp_path / "white.png"
    Image.new("RGB", (320, 240), (255, 255, 255)).save(white)
    out = CliRunner().invoke(app, ["trace", str(white), "--in", str(col.root)])
    assert out.exit_code == 1
    assert "too plain" in out.output and "probably" not in out.output
