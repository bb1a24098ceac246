"""Transparency share and enlarged-image estimate (collector.checks.pixel_facts), their recipe
policies in inspect_image, and the ledger columns a gather fills."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
from PIL import Image, ImageDraw

from collector.checks.images import inspect_image
from collector.checks.pixel_facts import estimate_enlargement, transparent_share
from collector.errors import ImageRejected
from collector.run.gather import gather
from collector.storage.collection import init_collection


def detailed(seed: int, size: tuple[int, int] = (480, 360)) -> Image.Image:
    """A picture with detail up to its Nyquist limit: hard-edged shapes drawn at twice the
    size, reduced with Lanczos, plus a little grain (as bench/enlarged.py's originals)."""
    rng = np.random.default_rng(seed)
    big = Image.new("RGB", (size[0] * 2, size[1] * 2), (90, 120, 60))
    draw = ImageDraw.Draw(big)
    for _ in range(60):
        colour = tuple(int(c) for c in rng.integers(0, 256, 3))
        x0, y0 = int(rng.integers(-40, big.width)), int(rng.integers(-40, big.height))
        x1, y1 = x0 + int(rng.integers(8, 300)), y0 + int(rng.integers(8, 300))
        if rng.random() < 0.5:
            draw.ellipse((x0, y0, x1, y1), fill=colour)
        else:
            draw.line((x0, y0, x1, y1), fill=colour, width=int(rng.integers(1, 6)))
    small = np.asarray(big.resize(size, Image.Resampling.LANCZOS), dtype=np.float64)
    grain = rng.normal(0, 2.0, small.shape)
    return Image.fromarray(np.clip(small + grain, 0, 255).astype(np.uint8))


def enlarged(im: Image.Image, factor: float) -> Image.Image:
    """Reduced by ``factor`` and enlarged back to the same size with bicubic interpolation."""
    small = im.resize((round(im.width / factor), round(im.height / factor)),
                      Image.Resampling.LANCZOS)
    return small.resize(im.size, Image.Resampling.BICUBIC)


# --- transparency ------------------------------------------------------------------------------
# Pillow documentation, "Image file formats > PNG": a P image's info["transparency"] is the
# index of the transparent palette entry (or per-entry alpha bytes, the tRNS chunk); for L and
# RGB it is one colour value; "Concepts > Modes": RGBA and LA carry an alpha band.
def test_palette_png_with_a_transparent_entry_reports_its_share(tmp_path: Path) -> None:
    """A P image whose index 0 is transparent (tRNS) on 1/4 of the pixels: share 0.25."""
    im = Image.new("P", (80, 60), 1)
    im.putpalette([255, 255, 255, 200, 30, 30] + [0] * 762)
    im.paste(0, (0, 0, 40, 30))  # a quarter of the pixels use the transparent index
    path = tmp_path / "pal.png"
    im.save(path, transparency=0)
    facts = inspect_image(path)
    assert facts.alpha and facts.mode == "P"
    assert facts.pixel.transparent_share == pytest.approx(0.25)


@pytest.mark.parametrize("mode", ["RGBA", "LA"])
def test_alpha_band_share_counts_pixels_not_fully_opaque(tmp_path: Path, mode: str) -> None:
    """Half the pixels at alpha 0, a tenth at alpha 128, the rest opaque: share 0.6."""
    alpha = np.full((100, 100), 255, dtype=np.uint8)
    alpha[:50] = 0
    alpha[50:60] = 128
    im = detailed(1, (100, 100)).convert(mode[:-1])
    im.putalpha(Image.fromarray(alpha))
    path = tmp_path / f"{mode}.png"
    im.save(path)
    assert inspect_image(path).pixel.transparent_share == pytest.approx(0.6)


def test_rgb_with_a_transparent_colour_and_an_opaque_rgba_image() -> None:
    """RGB with info["transparency"] counts the pixels of that colour; an RGBA image whose
    alpha is 255 everywhere has no transparent pixel; a plain RGB image has none."""
    rgb = Image.new("RGB", (10, 10), (0, 0, 0))
    rgb.paste((9, 9, 9), (0, 0, 10, 3))
    rgb.info["transparency"] = (9, 9, 9)
    assert transparent_share(rgb) == pytest.approx(0.3)
    assert transparent_share(Image.new("RGBA", (10, 10), (5, 5, 5, 255))) == 0.0
    assert transparent_share(Image.new("RGB", (10, 10))) == 0.0


def test_transparency_policy_keep_flag_reject(tmp_path: Path) -> None:
    """keep records the share only; flag adds the flag "transparent"; reject refuses with
    reason "transparent"; a fully opaque RGBA image passes every policy unflagged."""
    im = detailed(2, (120, 90)).convert("RGBA")
    im.putalpha(Image.new("L", im.size, 0).resize(im.size))
    clear = tmp_path / "clear.png"
    im.save(clear)
    opaque = tmp_path / "opaque.png"
    detailed(3, (120, 90)).convert("RGBA").save(opaque)
    assert "transparent" not in inspect_image(clear).flags
    assert "transparent" in inspect_image(clear, transparent="flag").flags
    with pytest.raises(ImageRejected) as err:
        inspect_image(clear, transparent="reject")
    assert err.value.reason == "transparent" and "100.0% of the pixels" in err.value.detail
    facts = inspect_image(opaque, transparent="reject")
    assert facts.alpha and facts.pixel.transparent_share == 0.0 and facts.flags == []


# --- enlargement -------------------------------------------------------------------------------
# Sampling theorem (common practice, no source for the thresholds): an image enlarged by k holds
# almost no energy above 1/(2k) cycles per pixel.
@pytest.mark.parametrize("seed", [4, 5, 6])
def test_untouched_detailed_images_are_not_enlarged(seed: int) -> None:
    """Originals with detail up to their Nyquist limit keep their own size as native size."""
    est = estimate_enlargement(detailed(seed))
    assert est is not None and not est.enlarged
    assert (est.native_width, est.native_height) == (480, 360)


@pytest.mark.parametrize("factor", [1.5, 2.0, 3.0, 4.0])
def test_enlarged_images_are_found_with_a_native_size_near_the_truth(factor: float) -> None:
    """Reduced by k and enlarged back: flagged, native size within 30 % of size / k."""
    est = estimate_enlargement(enlarged(detailed(7), factor))
    assert est is not None and est.enlarged
    assert est.native_width == pytest.approx(480 / factor, rel=0.3)
    assert est.native_height == pytest.approx(360 / factor, rel=0.3)


def test_tiny_images_are_not_judged() -> None:
    """Under 64 px on a side there are too few frequencies to judge: no estimate."""
    assert estimate_enlargement(detailed(8, (63, 200))) is None


def test_enlargement_policy_uses_min_side_and_reaches_the_jpeg_draft_path(
        tmp_path: Path) -> None:
    """A 2x enlargement saved as JPEG (the ingest's draft path): keep records no estimate;
    flag estimates it (luma decode) and flags it when the native side is under min_side;
    reject refuses it with reason "enlarged"; a min_side the native size meets lets it pass."""
    path = tmp_path / "big.jpg"
    enlarged(detailed(9), 2.0).save(path, quality=92)
    kept = inspect_image(path, full_decode=False)
    assert kept.pixel.enlargement is None and kept.flags == []
    flagged = inspect_image(path, full_decode=False, enlarged="flag", min_side=300)
    assert "enlarged" in flagged.flags
    assert flagged.pixel.enlargement is not None
    assert flagged.pixel.enlargement.native_height < 300
    with pytest.raises(ImageRejected) as err:
        inspect_image(path, full_decode=False, enlarged="reject", min_side=300)
    assert err.value.reason == "enlarged" and "under min_side 300" in err.value.detail
    assert "enlarged" not in inspect_image(path, enlarged="flag", min_side=120).flags


def test_gather_records_share_and_native_size_in_the_ledger(tmp_path: Path) -> None:
    """A gather over a folder fills files.transparent_share, native_width and native_height
    (migration 4); with [images] transparent = "reject" the transparent PNG is rejected."""
    col = init_collection(tmp_path / "c", contact="me@example.org")
    folder = col.root / "in"
    folder.mkdir()
    rgba = detailed(10, (160, 120)).convert("RGBA")
    rgba.putalpha(Image.new("L", (160, 120), 255).crop((0, 0, 160, 120)))
    rgba.paste((0, 0, 0, 0), (0, 0, 80, 120))
    rgba.save(folder / "half.png")
    enlarged(detailed(11), 3.0).save(folder / "big.png")
    col.recipe_path.write_text(col.recipe_path.read_text() + (
        '\n[[sources]]\nname = "desk"\nkind = "scans"\npath = "in"\nlicence = "CC0-1.0"\n'))
    gather(col, fetcher_factory=lambda recipe, ledger: None)
    query = ("SELECT i.source_key, f.transparent_share, f.native_width, f.native_height "
             "FROM items i JOIN files f ON f.sha256 = i.file_sha256 ORDER BY i.source_key")
    with col.ledger(readonly=True) as ledger:
        rows = {r["source_key"]: r for r in ledger.query(query)}
    assert rows["half.png"]["transparent_share"] == pytest.approx(0.5)
    assert rows["big.png"]["transparent_share"] == 0.0
    assert rows["big.png"]["native_width"] == pytest.approx(160, rel=0.3)
    assert rows["half.png"]["native_width"] == 160  # not enlarged: its own size


def test_release_flattens_transparent_images_onto_the_recipe_colour(tmp_path: Path) -> None:
    """With [images] release_background = "#ffeedd" the release holds a flattened PNG of the
    transparent image (clear pixels become that colour; alpha compositing as Pillow's
    alpha_composite), provenance.csv names the stored original in derived_from, the stored
    bytes are unchanged, and an opaque image is released as stored."""
    import csv
    import hashlib

    from collector.exports.datasheet import export_datasheet

    col = init_collection(tmp_path / "c", contact="me@example.org")
    folder = col.root / "in"
    folder.mkdir()
    clear = detailed(12, (90, 60)).convert("RGBA")
    clear.paste((0, 0, 0, 0), (0, 0, 45, 60))
    clear.save(folder / "clear.png")
    detailed(13, (90, 60)).save(folder / "opaque.png")
    original_sha = hashlib.sha256((folder / "clear.png").read_bytes()).hexdigest()
    recipe = col.recipe_path.read_text().replace('release_background = ""',
                                                 'release_background = "#ffeedd"')
    col.recipe_path.write_text(recipe + (
        '\n[[sources]]\nname = "desk"\nkind = "scans"\npath = "in"\nlicence = "CC0-1.0"\n'))
    gather(col, fetcher_factory=lambda recipe, ledger: None)
    export = export_datasheet(col.root, with_images=True)
    with open(export.out / "provenance.csv", newline="") as fh:
        rows = {r["source_key"]: r for r in csv.DictReader(fh)}
    flat = rows["clear.png"]
    # the readable release name of the original (collector.exports.release), marked -flat
    assert flat["file_name"] == f"desk-clear_png-{original_sha[:12]}-flat.png"
    assert flat["derived_from"] == original_sha and "flattened:#ffeedd" in flat["flags"]
    data = (export.out / "images" / flat["file_name"]).read_bytes()
    assert flat["sha256"] == hashlib.sha256(data).hexdigest()
    with Image.open(export.out / "images" / flat["file_name"]) as im:
        assert im.mode == "RGB" and im.getpixel((10, 10)) == (255, 238, 221)
        assert im.getpixel((80, 10)) == clear.getpixel((80, 10))[:3]
    stored = next(col.root.glob(f"files/*/*/{original_sha}.png"))
    assert hashlib.sha256(stored.read_bytes()).hexdigest() == original_sha
    assert rows["opaque.png"]["derived_from"] == ""
    assert rows["opaque.png"]["file_name"].endswith(".png")
    assert not rows["opaque.png"]["file_name"].endswith("-flat.png")


@pytest.mark.parametrize(("text", "message"), [
    ('transparent = "drop"', "images.transparent: must be one of 'keep', 'flag', 'reject'"),
    ('enlarged = "yes"', "images.enlarged: must be one of 'keep', 'flag', 'reject'"),
    ('release_background = "white"', 'images.release_background: must be a colour written'),
])
def test_recipe_policy_keys_name_what_is_expected(tmp_path: Path, text: str,
                                                  message: str) -> None:
    """Bad values of the new [images] keys are reported with their key path; the defaults
    keep everything and flatten nothing."""
    from collector.config.recipe import load_recipe
    from collector.errors import RecipeError

    good = 'contact = "me@example.org"\n'
    (tmp_path / "ok.toml").write_text(good)
    images = load_recipe(tmp_path / "ok.toml").images
    assert (images.transparent, images.enlarged, images.release_background) == (
        "keep", "keep", "")
    (tmp_path / "bad.toml").write_text(good + f"[images]\n{text}\n")
    with pytest.raises(RecipeError) as err:
        load_recipe(tmp_path / "bad.toml")
    assert message in str(err.value)


def test_every_pillow_mode_is_measured_without_error() -> None:
    """Pillow's modes (Pillow docs, "Concepts > Modes": 1, L, LA, La, P, PA, RGB, RGBA, RGBa,
    CMYK, YCbCr, LAB, HSV, I, I;16, I;16B, F): the estimate and the share never fail; the
    premultiplied modes (RGBa, La) read their lowercase "a" band."""
    base = detailed(14, (120, 100))
    rgba = base.convert("RGBA")
    alpha = np.full((100, 120), 255, dtype=np.uint8)
    alpha[:25] = 0
    rgba.putalpha(Image.fromarray(alpha))
    grey16 = np.asarray(base.convert("L"), dtype=np.uint16) * 257
    images = [base.convert(m) for m in ("1", "L", "P", "RGB", "CMYK", "YCbCr", "HSV", "I", "F")]
    images += [Image.fromarray(grey16), Image.fromarray(grey16).convert("I;16B"),
               Image.merge("LAB", [base.convert("L")] * 3), rgba.convert("P").convert("PA")]
    for im in images:
        est = estimate_enlargement(im)
        assert est is not None and (est.native_width, est.native_height) == (120, 100), im.mode
        assert transparent_share(im) == 0.0 or im.mode == "PA", im.mode
    for mode in ("RGBA", "RGBa", "LA", "La"):
        im = rgba.convert(mode) if mode != "La" else rgba.convert("LA").convert("La")
        assert transparent_share(im) == pytest.approx(0.25), mode
