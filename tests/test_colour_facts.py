"""Colour and tone facts (collector.checks.colour_facts) against published values.

- CIELAB: IEC 61966-2-1:1999 (sRGB) and CIE 15:2004 (CIELAB, D65). Worked values as published
  with these formulas (e.g. Lindbloom's colour calculator; from memory): white -> 100/0/0,
  red -> 53.2408/80.0925/67.2032, green -> 87.7347/-86.1827/83.1793, blue ->
  32.2970/79.1875/-107.8602.
- Colourfulness: Hasler and Süsstrunk 2003: a grey picture has M = 0 (both opponent channels
  are zero everywhere).
- k-means on three flat colours in 50/30/20 % returns those colours and shares.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest
from PIL import Image

from collector.checks.colour_facts import COLOUR_ALGO, colour_facts, srgb_to_lab
from collector.checks.images import inspect_image

PUBLISHED = [
    ((255, 255, 255), (100.0, 0.0, 0.0)),
    ((255, 0, 0), (53.2408, 80.0925, 67.2032)),
    ((0, 255, 0), (87.7347, -86.1827, 83.1793)),
    ((0, 0, 255), (32.2970, 79.1875, -107.8602)),
    ((0, 0, 0), (0.0, 0.0, 0.0)),
]


@pytest.mark.parametrize(("rgb", "lab"), PUBLISHED)
def test_srgb_to_cielab_matches_published_values(rgb: tuple[int, int, int],
                                                 lab: tuple[float, float, float]) -> None:
    assert srgb_to_lab(np.array(rgb)) == pytest.approx(lab, abs=1e-3)


def three_colours() -> Image.Image:
    a = np.zeros((100, 100, 3), np.uint8)
    a[:50] = (200, 30, 30)
    a[50:80] = (30, 160, 40)
    a[80:] = (20, 40, 200)
    return Image.fromarray(a)


def test_kmeans_finds_three_flat_colours_and_their_shares() -> None:
    facts = colour_facts(three_colours(), colours=3)
    found = {c.hex: c.share for c in facts.colours}
    assert found.keys() == {"#c81e1e", "#1ea028", "#1428c8"}
    assert found["#c81e1e"] == pytest.approx(0.50, abs=0.01)
    assert found["#1ea028"] == pytest.approx(0.30, abs=0.01)
    assert found["#1428c8"] == pytest.approx(0.20, abs=0.01)
    assert not facts.greyscale
    hues = sorted(round(c.hue) for c in facts.colours)  # HSV hues (colorsys)
    assert hues == [0, 125, 233]


def test_a_grey_picture_is_greyscale_with_no_colourfulness() -> None:
    ramp = np.tile(np.linspace(0, 255, 128, dtype=np.uint8), (96, 1))
    facts = colour_facts(Image.fromarray(ramp).convert("RGB"))
    assert facts.greyscale
    assert facts.colourfulness == pytest.approx(0.0, abs=1e-9)
    assert all(abs(c.lab[1]) < 0.5 and abs(c.lab[2]) < 0.5 for c in facts.colours)


def test_a_mostly_empty_scan_has_a_large_background_and_little_sharpness() -> None:
    page = np.full((120, 160), 245, np.uint8)
    page[50:60, 70:90] = 30  # a small mark on a blank page
    empty = colour_facts(Image.fromarray(page))
    busy = colour_facts(Image.fromarray(
        np.random.default_rng(1).integers(0, 256, (120, 160), dtype=np.uint8)))
    assert empty.background_share > 0.9
    assert busy.background_share < 0.1
    assert busy.sharpness > 10 * empty.sharpness
    assert empty.brightness > 90  # L* of a near-white page


def test_facts_are_plain_data_for_the_ledger() -> None:
    data = colour_facts(three_colours(), colours=3).as_json()
    assert set(data) == {"colours", "greyscale", "brightness", "contrast", "colourfulness",
                         "sharpness", "background_share"}
    assert all(set(c) == {"lab", "share", "hex", "hue"} for c in data["colours"])


def test_every_pillow_mode_gets_colour_facts_by_the_hash_rules() -> None:
    """Pillow's modes (Pillow docs, "Concepts > Modes"): colour_ready makes each a small RGB
    picture; a 16-bit grey picture is scaled by its full range (not clipped to white), a
    transparent one is shown on white, so a half-transparent red square is half white."""
    from collector.checks.pixels import colour_ready

    base = three_colours()
    grey16 = np.asarray(base.convert("L"), dtype=np.uint16) * 257
    images = [base.convert(m) for m in ("1", "L", "P", "RGB", "CMYK", "YCbCr", "HSV", "I", "F")]
    images += [Image.fromarray(grey16), Image.merge("LAB", [base.convert("L")] * 3)]
    for im in images:
        small = colour_ready(im, 96)
        assert small.mode == "RGB" and max(small.size) >= 96, im.mode
        assert colour_facts(small).colours, im.mode
    sixteen = colour_facts(colour_ready(Image.fromarray(grey16), 96))
    eight = colour_facts(colour_ready(base.convert("L"), 96))
    assert sixteen.brightness == pytest.approx(eight.brightness, abs=1.0)  # not clipped
    red = Image.new("RGBA", (100, 100), (255, 0, 0, 255))
    red.paste((255, 0, 0, 0), (0, 0, 50, 100))
    shares = {c.hex: c.share for c in colour_facts(colour_ready(red, 96)).colours}
    assert shares == {"#ffffff": pytest.approx(0.5), "#ff0000": pytest.approx(0.5)}


def test_gather_stores_colour_facts_for_jpeg_and_png(tmp_path: Path) -> None:
    """Ingest fills the files' colour columns (schema 10) from the JPEG's 1/8-scale colour
    draft and the PNG's decoded pixels, with the way they were computed (schema 14)."""
    from collector.run.gather import gather
    from collector.storage.collection import init_collection

    col = init_collection(tmp_path / "c", contact="me@example.org")
    folder = col.root / "in"
    folder.mkdir()
    big = three_colours().resize((900, 600), Image.Resampling.NEAREST)
    big.save(folder / "flags.jpg", quality=95)
    big.convert("L").save(folder / "grey.png")
    recipe = col.recipe_path.read_text().replace("dominant_colours = 5", "dominant_colours = 3")
    col.recipe_path.write_text(recipe + (
        '\n[[sources]]\nname = "desk"\nkind = "scans"\npath = "in"\nlicence = "CC0-1.0"\n'))
    gather(col, fetcher_factory=lambda recipe, ledger: None)
    query = ("SELECT i.source_key, f.greyscale, f.colourfulness, f.colours, f.set_aside, "
             "f.colour_algo FROM items i JOIN files f ON f.sha256 = i.file_sha256")
    with col.ledger(readonly=True) as ledger:
        rows = {r["source_key"]: r for r in ledger.query(query)}
    flags, grey = rows["flags.jpg"], rows["grey.png"]
    assert flags["greyscale"] == 0 and grey["greyscale"] == 1
    assert grey["colourfulness"] == pytest.approx(0.0, abs=0.5)
    colours = json.loads(flags["colours"])
    assert len(colours) == 3 and sum(c["share"] for c in colours) == pytest.approx(1.0)
    assert [round(c["share"], 1) for c in colours] == [0.5, 0.3, 0.2]
    assert flags["set_aside"] is None
    assert flags["colour_algo"] == grey["colour_algo"] == COLOUR_ALGO  # how they were made


@pytest.mark.parametrize("size", [(50, 1), (1, 50), (1, 1), (6400, 90)])
def test_a_line_of_pixels_gets_facts_not_an_error(tmp_path: Path, size: tuple[int, int]) -> None:
    """A picture one pixel high or wide (a spacer, a thin banner; 6400x90 is reduced to a
    line of 64x1) is a valid image: its facts are those of the line (three fifths red, two
    fifths blue along its length), its missing direction adds no sharpness; ingest's
    inspection stores it instead of calling it broken (it once raised "no gradient")."""
    along = max(size)
    line = np.zeros((along, 3), dtype=np.uint8)
    line[: along * 3 // 5] = (255, 0, 0)
    line[along * 3 // 5:] = (0, 0, 255)
    picture = line.reshape((1, along, 3)) if size[1] <= size[0] else line.reshape((along, 1, 3))
    image = Image.fromarray(np.ascontiguousarray(picture)).resize(size, Image.Resampling.NEAREST)
    facts = colour_facts(image)
    shares = sorted((c.share for c in facts.colours), reverse=True)[:2]
    # the banner's reduction blends the pixels where red meets blue: a sliver of a third colour
    assert shares == pytest.approx([1.0] if size == (1, 1) else [0.6, 0.4], abs=0.03)
    assert np.isfinite(facts.sharpness) and 0.0 <= facts.background_share <= 1.0
    path = tmp_path / "line.png"
    image.save(path)
    inspected = inspect_image(path)  # the whole inspection, as ingest calls it
    main = "#0000ff" if size == (1, 1) else "#ff0000"  # a 1x1 is the line's last pixel: blue
    assert inspected.colour is not None and inspected.colour.colours[0].hex == main


def four_noisy_regions(width: int = 640, height: int = 480) -> tuple[Image.Image, np.ndarray]:
    """Four flat colours in vertical bands of 26, 19, 13 and 6 64ths of the width (about
    40/30/20/10 %; edges on whole pixels of the 64-px work picture) with Gaussian noise
    (sd 8 per channel), and the band of every pixel."""
    band = np.zeros((height, width), np.intp)
    for i, edge in enumerate((26, 45, 58)):
        band[:, edge * width // 64:] = i + 1
    colours = np.array([(190, 60, 50), (40, 150, 70), (50, 60, 180), (230, 210, 90)])
    noise = np.random.default_rng(3).normal(0, 8, (height, width, 3))
    pixels = np.clip(colours[band] + noise, 0, 255).astype(np.uint8)
    return Image.fromarray(pixels), band


def test_sampled_kmeans_agrees_with_kmeans_over_every_pixel() -> None:
    """The k-means runs on a sample of MAX_SAMPLES pixels of the work picture (shares then
    counted over all of them). On a larger noisy picture its shares lie within 2 % of a
    k-means over EVERY pixel of the full-size picture, by scipy.cluster.vq.kmeans2 (k-means++
    start, Lloyd's rounds; the reference implementation outside this project), and each of
    its colours within 3 CIELAB units of the matching reference centre."""
    from scipy.cluster.vq import kmeans2

    from collector.checks.colour_facts import MAX_SAMPLES

    image, _ = four_noisy_regions()
    facts = colour_facts(image, colours=4)
    assert MAX_SAMPLES < 64 * 48  # the work picture (64x48) is sampled, not used whole
    every = srgb_to_lab(np.asarray(image)).reshape(-1, 3).astype(np.float64)
    centres, labels = kmeans2(every, 4, minit="++", seed=np.random.default_rng(5), iter=20)
    reference = np.bincount(labels, minlength=4) / len(labels)
    assert sorted(reference, reverse=True) == pytest.approx([26 / 64, 19 / 64, 13 / 64,
                                                           6 / 64], abs=0.005)
    assert len(facts.colours) == 4
    for found in facts.colours:
        nearest = int(np.argmin(((centres - np.array(found.lab)) ** 2).sum(axis=1)))
        assert found.share == pytest.approx(reference[nearest], abs=0.02)
        assert np.linalg.norm(centres[nearest] - np.array(found.lab)) < 3.0
    assert len({int(np.argmin(((centres - np.array(c.lab)) ** 2).sum(axis=1)))
                for c in facts.colours}) == 4  # one reference cluster each


def test_colour_facts_leave_the_picture_given_untouched_and_repeat_exactly() -> None:
    """The facts reduce a copy of the picture (the caller's keeps its size and pixels), and
    the k-means's seeded draws are the same on every call, in any thread."""
    from concurrent.futures import ThreadPoolExecutor

    image, _ = four_noisy_regions(300, 200)
    before = image.tobytes()
    first = colour_facts(image)
    assert image.size == (300, 200) and image.tobytes() == before
    with ThreadPoolExecutor(2) as pool:
        others = list(pool.map(lambda _: colour_facts(image), range(4)))
    assert all(other == first for other in others)


@pytest.mark.parametrize("seed", range(4))
def test_the_work_picture_has_the_size_pillow_thumbnail_gives(seed: int) -> None:
    """The picture is reduced to the size Pillow's Image.thumbnail((64, 64)) gives (the
    aspect kept, each side rounded to the nearest aspect; Pillow handbook,
    Image.thumbnail), without changing the caller's picture in place."""
    from collector.checks.colour_facts import WORK_SIDE, _thumbnail_size

    rng = np.random.default_rng(seed)
    for width, height in rng.integers(1, 900, (200, 2)).tolist():
        if max(width, height) <= WORK_SIDE:
            continue
        made = Image.new("RGB", (width, height))
        made.thumbnail((WORK_SIDE, WORK_SIDE), Image.Resampling.BOX)
        assert _thumbnail_size((width, height)) == made.size, (width, height)


def test_the_hex_colour_is_the_srgb_colour_of_its_cielab_value() -> None:
    """The dominant colours' sRGB (hex) come from their CIELAB centres by the inverse
    formulas (CIE 15:2004 CIELAB to XYZ, IEC 61966-2-1:1999 XYZ to sRGB and its transfer
    function): every colour of a 17-step grid of 8-bit sRGB goes to CIELAB and back to
    itself."""
    from collector.checks.colour_facts import _lab_to_srgb8

    steps = [*range(0, 256, 16), 255]
    grid = np.array([(r, g, b) for r in steps for g in steps for b in steps], dtype=np.uint8)
    labs = srgb_to_lab(grid).astype(np.float64).tolist()
    back = [tuple(_lab_to_srgb8(lab)) for lab in labs]
    assert back == [tuple(c) for c in grid.tolist()]
