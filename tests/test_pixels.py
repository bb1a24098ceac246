"""Every pixel format Pillow opens, hashed and compared correctly; turned and cropped copies.

Modes as the Pillow handbook ("Concepts: Modes") defines them; the pHash construction as
imagehash 4.3 ``phash`` (libraries.md section 2), the reference for 8-bit pictures.
"""

from __future__ import annotations

import io
from pathlib import Path

import imagehash
import numpy as np
import pytest
from PIL import Image, ImageDraw

from collector.checks.images import inspect_image
from collector.checks.likeness import (
    CONFIRM_MIN,
    confirm,
    crop_score,
    look_at,
    look_at_file,
    second_look,
)
from collector.checks.phash import TURNS, dct_block, hamming, phash_from_image, turned_hashes
from collector.checks.pixels import hash_ready, is_blank
from collector.storage.hashindex import HashIndex

T = Image.Transpose
NEAR = 8  # collector.exports.trace.DEFAULT_NEAR_DISTANCE (libraries.md section 2)


def scene(seed: int, size: tuple[int, int] = (320, 240)) -> Image.Image:
    """A structured RGB picture: smooth noise light plus shapes."""
    rng = np.random.default_rng(seed)
    w, h = size
    small = rng.random((6, 8, 3))
    field = np.asarray(Image.fromarray((small * 255).astype(np.uint8)).resize(
        (w, h), Image.Resampling.BICUBIC))
    im = Image.fromarray(field, "RGB")
    draw = ImageDraw.Draw(im)
    for _ in range(5):
        x0, x1 = sorted(rng.integers(0, w, 2).tolist())
        y0, y1 = sorted(rng.integers(0, h, 2).tolist())
        draw.ellipse([x0, y0, x1 + 8, y1 + 8], fill=tuple(rng.integers(0, 256, 3).tolist()))
    return im


def sixteen_bit(seed: int) -> Image.Image:
    """A 16-bit greyscale gradient picture using most of 0..65535."""
    grey = np.asarray(scene(seed).convert("L"), dtype=np.float64)
    ramp = np.linspace(0, 1, grey.shape[1])[None, :]
    values = (grey / 255 * 0.6 + ramp * 0.4) * 65000
    return Image.fromarray(values.astype(np.uint16))


def test_16_bit_gradient_hashes_within_2_bits_of_its_scaled_8_bit_version() -> None:
    """A 16-bit picture (I;16, and the same in big-endian I;16B and in I) and its 8-bit
    version scaled by the full range (value / 257) hash within 2 bits (issue 14 acceptance)."""
    for seed in range(4):
        im = sixteen_bit(seed)
        scaled = Image.fromarray((np.asarray(im) / 257).round().astype(np.uint8))
        reference = int(str(imagehash.phash(scaled)), 16)  # imagehash on the 8-bit version
        big_endian = Image.frombytes("I;16B", im.size, np.asarray(im).astype(">u2").tobytes())
        for variant in (im, big_endian, im.convert("I")):
            assert hamming(phash_from_image(variant)[0], reference) <= 2, variant.mode


def test_float_images_are_scaled_by_their_full_range() -> None:
    """Mode F holding 0..1 (Pillow's float convention) hashes like the 8-bit picture."""
    grey = scene(5).convert("L")
    as_float = Image.fromarray(np.asarray(grey, dtype=np.float32) / 255, "F")
    assert hamming(phash_from_image(as_float)[0], phash_from_image(grey)[0]) <= 2


def test_8_bit_rgb_hash_equals_imagehash_bit_for_bit() -> None:
    """8-bit RGB (and the other 8-bit modes without transparency) keep imagehash's bits."""
    for seed in range(6):
        im = scene(seed, (300 + seed * 7, 200 + seed * 5))
        for mode in ("RGB", "L", "P", "CMYK", "1"):
            converted = im.convert(mode)
            assert phash_from_image(converted)[0] == int(
                str(imagehash.phash(converted)), 16), mode


@pytest.mark.parametrize("mode,value", [
    ("1", 1), ("L", 200), ("LA", (200, 255)), ("LA", (10, 0)), ("P", 7), ("RGB", (20, 90, 200)),
    ("RGBA", (250, 250, 250, 255)), ("RGBA", (0, 0, 0, 0)), ("CMYK", (0, 0, 0, 0)),
    ("YCbCr", (128, 100, 140)), ("LAB", (60, 130, 120)), ("I", 70_000), ("I", 3),
    ("F", 0.5), ("F", 1234.5), ("I;16", 40_000), ("I;16B", 4000),
])
def test_a_flat_image_of_any_mode_is_blank_and_never_matches(mode: str, value: object) -> None:
    """A flat fill is blank in every mode, is not comparable, and confirms as a copy of
    nothing, not even of another flat fill (Pillow handbook modes; issue 14 acceptance)."""
    flat = Image.new(mode, (120, 90), value)  # type: ignore[arg-type]
    assert is_blank(hash_ready(flat))
    look = look_at(flat)
    assert not look.comparable
    other = look_at(Image.new("L", (120, 90), 255))
    assert confirm(look, [("x", 0, "same")], lambda _k: other) == []


def test_flat_white_jpeg_is_flagged_blank_and_a_picture_is_not(tmp_path: Path) -> None:
    """inspect_image flags a plain white JPEG ``blank`` (JPEG noise averaged away); a picture
    of a 16-bit scan is not blank (it used to clip to white)."""
    Image.new("RGB", (200, 150), "white").save(tmp_path / "white.jpg", quality=75)
    assert "blank" in inspect_image(tmp_path / "white.jpg").flags
    sixteen_bit(1).save(tmp_path / "scan.tif")
    facts = inspect_image(tmp_path / "scan.tif")
    assert facts.mode == "I;16" and facts.bit_depth == 16 and "blank" not in facts.flags


def test_transparent_pictures_are_compared_as_shown_on_white() -> None:
    """RGBA, LA and palette transparency are composited on white: a transparent picture and
    the same picture flattened on white hash alike; a fully opaque alpha changes nothing."""
    im = Image.new("RGBA", (200, 160), (0, 0, 0, 0))
    ImageDraw.Draw(im).ellipse([30, 20, 150, 140], fill=(200, 40, 40, 255))
    ImageDraw.Draw(im).rectangle([120, 90, 190, 150], fill=(20, 40, 160, 255))
    on_white = Image.alpha_composite(Image.new("RGBA", im.size, "white"), im).convert("RGB")
    assert hamming(phash_from_image(im)[0], phash_from_image(on_white)[0]) <= 2
    palette = im.convert("P")
    palette.info["transparency"] = palette.getpixel((0, 0))
    assert hamming(phash_from_image(palette)[0], phash_from_image(on_white)[0]) <= 4
    la = im.convert("LA")
    assert hamming(phash_from_image(la)[0], phash_from_image(on_white)[0]) <= 2
    opaque = scene(3).convert("RGBA")
    assert phash_from_image(opaque)[0] == phash_from_image(scene(3))[0]


def test_cmyk_jpeg_and_animated_gif(tmp_path: Path) -> None:
    """An Adobe CMYK JPEG (Pillow writes and reads the inverted Adobe convention) hashes like
    its RGB picture; an animated GIF is hashed on its first frame and its frames counted."""
    im = scene(8)
    im.convert("CMYK").save(tmp_path / "c.jpg", quality=92)
    with Image.open(tmp_path / "c.jpg") as opened:
        assert opened.mode == "CMYK" and "adobe" in opened.info
    facts = inspect_image(tmp_path / "c.jpg")
    assert hamming(facts.phash, phash_from_image(im)[0]) <= 4
    frames = [scene(9).convert("P"), scene(10).convert("P"), scene(11).convert("P")]
    frames[0].save(tmp_path / "a.gif", save_all=True, append_images=frames[1:])
    facts = inspect_image(tmp_path / "a.gif")
    assert facts.frames == 3 and facts.animated
    assert hamming(facts.phash, phash_from_image(frames[0])[0]) <= 2


def test_turned_hashes_undo_every_turn_exactly() -> None:
    """For each of the 8 turns of the square, the turned-back hash of the copy equals the
    original's hash (DCT-II identities: a flip negates odd coefficients, a transpose
    transposes the block)."""
    make = {"same": (), "mirror": (T.FLIP_LEFT_RIGHT,), "rotate90": (T.ROTATE_90,),
            "rotate180": (T.ROTATE_180,), "rotate270": (T.ROTATE_270,),
            "rotate90+mirror": (T.ROTATE_90, T.FLIP_LEFT_RIGHT),
            "rotate180+mirror": (T.ROTATE_180, T.FLIP_LEFT_RIGHT),
            "rotate270+mirror": (T.ROTATE_270, T.FLIP_LEFT_RIGHT)}
    assert set(make) == set(TURNS)
    for seed in range(3):
        im = scene(seed)
        original = phash_from_image(im)[0]
        for name, steps in make.items():
            copy = im
            for step in steps:
                copy = copy.transpose(step)
            assert hamming(turned_hashes(dct_block(copy))[name], original) <= 2, (seed, name)


def _stored(seeds: range) -> tuple[HashIndex, dict[str, object]]:
    index, looks = HashIndex(), {}
    for seed in seeds:
        im = scene(seed)
        index.add(str(seed), phash_from_image(im)[0])
        looks[str(seed)] = look_at(im)
    return index, looks


def _jpeg(im: Image.Image) -> Image.Image:
    buf = io.BytesIO()
    im.save(buf, "JPEG", quality=60)
    return Image.open(io.BytesIO(buf.getvalue()))


def test_rotated_and_cropped_copies_are_found_and_confirmed() -> None:
    """Rotated (with and without mirror) and cropped (90 % per side) JPEG copies are found
    through the index and confirmed by the second look as the right kind; unrelated
    pictures are not confirmed as anything."""
    index, looks = _stored(range(20))
    for seed in range(0, 20, 4):
        im = scene(seed)
        w, h = im.size
        copies = {"rotate90": im.transpose(T.ROTATE_90), "rotate180": im.transpose(T.ROTATE_180),
                  "rotate270+mirror": im.transpose(T.ROTATE_270).transpose(T.FLIP_LEFT_RIGHT),
                  "crop": im.crop((int(w * 0.06), int(h * 0.03), int(w * 0.96),
                                   int(h * 0.93)))}
        for kind, copy in copies.items():
            query = look_at(_jpeg(copy))
            found = confirm(query, index.candidates(query.turns, NEAR), looks.get)  # type: ignore[arg-type]
            assert found and found[0].key == str(seed) and found[0].kind == kind, (seed, kind)
    for seed in range(100, 110):
        query = look_at(scene(seed))
        assert confirm(query, index.candidates(query.turns, NEAR), looks.get) == []  # type: ignore[arg-type]


def test_second_look_separates_a_copy_from_a_different_picture(tmp_path: Path) -> None:
    """The thumbnail correlation of a re-encoded copy is near 1, of a different picture far
    below the threshold; the crop search finds the box a crop was cut from."""
    im = scene(42)
    im.save(tmp_path / "o.png")
    original = look_at_file(tmp_path / "o.png")
    assert second_look(look_at(_jpeg(im.resize((160, 120)))), original, "same") > 0.97
    assert second_look(look_at(scene(43)), original, "same") < CONFIRM_MIN
    score, box = crop_score(look_at(im.crop((32, 24, 320, 240))), original)
    assert score > 0.95
    assert box[0] == pytest.approx(0.1, abs=0.04) and box[1] == pytest.approx(0.1, abs=0.04)
