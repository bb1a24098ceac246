"""Pixel rules (collector.checks.pixel_rules): the recipe's [[pixel_rules]] judged on the colour
and tone facts of real generated pictures.

Outside facts the checks rest on:
- HSV hue (A. R. Smith, "Color gamut transform pairs", SIGGRAPH 1978; the same hue as CSS
  Color Level 4 section 7, hsl()): pure sRGB red is 0 degrees, green 120, blue 240, yellow 60,
  cyan 180, magenta 300; the circle wraps at 360 = 0.
- Hasler and Süsstrunk, "Measuring colourfulness in natural images" (SPIE 5007, 2003): a grey
  picture has M = 0; their scale calls 15 "slightly colourful".
- The variance of the Laplacian of a flat picture is 0 (a flat picture has no edges; common
  practice, no source), and a flat picture is all background (share 1).
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import numpy as np
import pytest
from PIL import Image

from collector.checks.colour_facts import colour_facts
from collector.checks.pixel_rules import PixelRules, hue_share, in_hues
from collector.config.recipe import parse_recipe
from collector.errors import RecipeError

PRIMARIES = [((255, 0, 0), 0.0), ((255, 255, 0), 60.0), ((0, 255, 0), 120.0),
             ((0, 255, 255), 180.0), ((0, 0, 255), 240.0), ((255, 0, 255), 300.0)]


def flat(rgb: tuple[int, int, int], size: tuple[int, int] = (64, 48)) -> Image.Image:
    return Image.new("RGB", size, rgb)


def halves(left: tuple[int, int, int], right: tuple[int, int, int]) -> Image.Image:
    a = np.zeros((48, 64, 3), np.uint8)
    a[:, :32] = left
    a[:, 32:] = right
    return Image.fromarray(a)


def facts_of(im: Image.Image) -> dict[str, Any]:
    """The facts as the ledger keeps them (the ``files`` columns)."""
    return colour_facts(im).columns()


@pytest.mark.parametrize(("rgb", "hue"), PRIMARIES)
def test_the_hue_of_pure_srgb_colours_is_the_hsv_hue(rgb: tuple[int, int, int],
                                                     hue: float) -> None:
    """Red 0, yellow 60, green 120, cyan 180, blue 240, magenta 300 (Smith 1978)."""
    colours = facts_of(flat(rgb))["colours"]
    assert len(colours) == 1 and colours[0]["hue"] == pytest.approx(hue, abs=0.5)
    assert hue_share(colours, [hue - 5 if hue else 355, hue + 5]) == pytest.approx(1.0)


def test_hue_ranges_wrap_through_zero() -> None:
    """[330, 30] holds the reds on both sides of 0 = 360 and nothing at 120 or 240; [0, 360]
    holds every hue; [300, 360] holds 0 (the same red as 360)."""
    assert in_hues(0, [330, 30]) and in_hues(350, [330, 30]) and in_hues(29.9, [330, 30])
    assert not in_hues(120, [330, 30]) and not in_hues(240, [330, 30])
    assert all(in_hues(h, [0, 360]) for h in (0, 90, 359.9))
    assert in_hues(0, [300, 360]) and not in_hues(10, [300, 360])
    assert in_hues(120, [70, 170]) and not in_hues(60, [70, 170])


def test_share_of_a_hue_range_decides_a_rule() -> None:
    """"At least 30 % in hues 70-170": half green passes (0.5), all red fails and says so;
    the same rule on reds through 0 turns the verdicts round."""
    greens = PixelRules([{"name": "greens", "hues": [70, 170], "min_hue_share": 0.3}])
    half = facts_of(halves((0, 255, 0), (255, 0, 0)))
    assert hue_share(half["colours"], [70, 170]) == pytest.approx(0.5, abs=0.01)
    assert greens.verdict("s", half).rule is None
    red = greens.verdict("s", facts_of(flat((255, 0, 0))))
    assert red.rule == "greens"
    assert red.detail == ('min_hue_share = 0.3 in hues = [70, 170], but 0.00 of the picture '
                          'is in those hues')
    reds = PixelRules([{"name": "few-reds", "hues": [330, 30], "max_hue_share": 0.6}])
    assert reds.verdict("s", facts_of(flat((255, 0, 0)))).rule == "few-reds"
    assert reds.verdict("s", half).rule is None


def test_grey_colours_have_no_hue() -> None:
    """HSV gives grey the hue 0 (red's); a grey picture is in no hue range, not in the reds."""
    grey = facts_of(flat((128, 128, 128)))
    assert grey["colours"][0]["hue"] == 0.0
    assert hue_share(grey["colours"], [330, 30]) == 0.0


def test_greyscale_and_colourfulness_rules() -> None:
    """A grey ramp is greyscale with M = 0 (Hasler and Süsstrunk): set aside by greyscale =
    false and by min_colourfulness = 15; a coloured picture passes both; greyscale = true
    asks the opposite."""
    ramp = Image.fromarray(np.tile(np.linspace(0, 255, 64, dtype=np.uint8), (48, 1)))
    grey, colour = facts_of(ramp.convert("RGB")), facts_of(halves((0, 255, 0), (255, 0, 0)))
    assert grey["greyscale"] == 1 and grey["colourfulness"] == 0.0
    rules = PixelRules([{"name": "colour", "greyscale": False}])
    assert rules.verdict("s", grey) == (
        "colour", "greyscale = false, but the picture is greyscale", ())
    assert rules.verdict("s", colour).rule is None
    vivid = PixelRules([{"name": "vivid", "min_colourfulness": 15}])
    assert vivid.verdict("s", grey).detail == (
        "min_colourfulness = 15, but the colourfulness is 0")
    assert vivid.verdict("s", colour).rule is None
    mono = PixelRules([{"name": "mono", "greyscale": True}])
    assert mono.verdict("s", colour).rule == "mono" and mono.verdict("s", grey).rule is None


def test_sharpness_background_brightness_and_contrast_bounds() -> None:
    """A flat picture has no edges (sharpness 0) and is all background (share 1); a fine
    checkerboard (4 px squares) is sharp and has no large flat region."""
    board = ((np.indices((48, 64)) // 4).sum(axis=0) % 2 * 255).astype(np.uint8)
    sharp = facts_of(Image.fromarray(board).convert("RGB"))
    empty = facts_of(flat((90, 140, 60)))
    assert empty["sharpness"] == 0.0 and empty["background_share"] == 1.0
    rules = PixelRules([{"name": "sharp", "min_sharpness": 50},
                        {"name": "full", "max_background_share": 0.6}])
    assert rules.verdict("s", empty).rule == "sharp"  # the first rule it fails decides
    assert rules.verdict("s", sharp).rule is None
    tone = PixelRules([{"name": "tone", "min_brightness": 20, "max_brightness": 80,
                        "min_contrast": 10}])
    assert tone.verdict("s", sharp).rule is None  # L* mean 50, spread 50
    assert "the contrast is 0" in (tone.verdict("s", empty).detail or "")
    assert "brightness is 100" in (tone.verdict("s", facts_of(flat((255, 255, 255)))).detail
                                   or "")


def test_missing_facts_never_set_a_file_aside() -> None:
    """A file stored before the facts were kept (every column NULL) is not judged: the rule
    is named as undecided; a rule for other sources does not apply at all."""
    rules = PixelRules([{"name": "colour", "greyscale": False},
                        {"name": "greens", "sources": ["garden"], "hues": [70, 170],
                         "min_hue_share": 0.3}])
    nothing = dict.fromkeys(("greyscale", "brightness", "contrast", "colourfulness",
                             "sharpness", "background_share", "colours"))
    assert rules.verdict("museum", nothing) == (None, None, ("colour",))
    assert rules.verdict("garden", nothing) == (None, None, ("colour", "greens"))
    red = facts_of(flat((255, 0, 0)))
    assert rules.verdict("museum", red).rule is None
    assert rules.verdict("garden", red).rule == "greens"
    assert rules.verdict(None, red).rule is None  # no item yet: only rules for every source


BASE = '''contact = "c@example.org"
[[sources]]
name = "garden"
kind = "scans"
path = "in"
'''


def problems_of(text: str) -> dict[str, str]:
    with pytest.raises(RecipeError) as err:
        parse_recipe(BASE + text, Path("recipe.toml"))
    return {p.key_path: p.message for p in err.value.problems}


def test_a_valid_rule_table_is_read_in_order() -> None:
    """Two rules, in recipe order, with every key the README shows."""
    recipe = parse_recipe(BASE + '''
[[pixel_rules]]
name = "colour"
greyscale = false
[[pixel_rules]]
name = "greens"
sources = ["garden"]
hues = [70, 170]
min_hue_share = 0.3
min_sharpness = 20
max_background_share = 0.7
''', Path("recipe.toml"))
    assert [r["name"] for r in recipe.pixel_rules] == ["colour", "greens"]
    assert recipe.as_dict()["pixel_rules"][1]["hues"] == [70, 170]


@pytest.mark.parametrize(("table", "where", "says"), [
    ('name = "a"\ngreyscal = false', "pixel_rules[1].greyscal", "did you mean 'greyscale'"),
    ('name = "a"', "pixel_rules[1]", "has no requirement"),
    ('greyscale = false', "pixel_rules[1].name", "required key is missing"),
    ('name = "a"\nhues = [70]\nmin_hue_share = 0.3', "pixel_rules[1].hues", "two numbers"),
    ('name = "a"\nhues = [70, 400]\nmin_hue_share = 0.3', "pixel_rules[1].hues",
     "degrees from 0 to 360"),
    ('name = "a"\nhues = [70, 170]', "pixel_rules[1].hues", "needs min_hue_share"),
    ('name = "a"\nmin_hue_share = 0.3', "pixel_rules[1].min_hue_share", "needs hues"),
    ('name = "a"\nmin_hue_share = 30\nhues = [1, 2]', "pixel_rules[1].min_hue_share",
     "between 0 and 1"),
    ('name = "a"\nmin_brightness = 60\nmax_brightness = 40', "pixel_rules[1].max_brightness",
     "must not be smaller than min_brightness"),
    ('name = "a"\ngreyscale = "no"', "pixel_rules[1].greyscale", "must be true or false"),
    ('name = "a"\ngreyscale = false\nsources = ["gardn"]', "pixel_rules[1].sources[0]",
     "did you mean 'garden'"),
    ('name = "a"\ngreyscale = false\nsources = []', "pixel_rules[1].sources",
     "at least one source"),
    ('name = "a"\nhues = "greens"\nmin_hue_share = 0.3', "pixel_rules[1].hues", "a list"),
])
def test_rule_problems_name_their_key(table: str, where: str, says: str) -> None:
    """Each mistake is reported at its key path with what to write instead."""
    found = problems_of(f"[[pixel_rules]]\n{table}\n")
    assert where in found, found
    assert says in found[where]


def test_rule_names_are_unique_and_rules_need_colour_facts() -> None:
    """Two rules of one name are refused (the ledger records the name); dominant_colours = 0
    computes no facts, so a recipe with rules may not ask for it."""
    found = problems_of('[images]\ndominant_colours = 0\n[[pixel_rules]]\nname = "a"\n'
                        'greyscale = false\n[[pixel_rules]]\nname = "a"\nmin_sharpness = 1\n')
    assert "used by an earlier rule" in found["pixel_rules[2].name"]
    assert "[[pixel_rules]]" in found["images.dominant_colours"]
    with pytest.raises(RecipeError, match=r"pixel_rules: must be an array of tables"):
        parse_recipe('contact = "c@example.org"\npixel_rules = "grey"\n', Path("recipe.toml"))
