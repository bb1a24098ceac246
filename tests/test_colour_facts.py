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

import numpy as np
import pytest
from PIL import Image

from collector.checks.colour_facts import colour_facts, srgb_to_lab

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
