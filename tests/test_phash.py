"""pHash checked against the reference library imagehash 4.3 (libraries.md section 2)."""

from __future__ import annotations

import itertools
import sqlite3
from pathlib import Path

import imagehash
import numpy as np
import pytest
from PIL import Image, ImageDraw, ImageFilter

from collector.checks.phash import (
    HASH_ALGO,
    hamming,
    hash_image_file,
    phash_from_image,
    to_signed64,
    to_unsigned64,
)

# libraries.md section 2: threshold 8 separated resized/re-encoded copies from unrelated images.
NEAR = 8


def picture(seed: int, size: tuple[int, int] = (320, 240)) -> Image.Image:
    """A structured synthetic picture: a background field plus shapes, sometimes noisy/blurred."""
    rng = np.random.default_rng(seed)
    w, h = size
    y, x = np.mgrid[0:h, 0:w] / max(w, h)
    kind = seed % 4
    if kind == 0:  # linear gradient at a random angle
        a = rng.uniform(0, np.pi)
        field = np.cos(a) * x + np.sin(a) * y
    elif kind == 1:  # radial
        cx, cy = rng.uniform(0.2, 0.8, 2)
        field = np.hypot(x - cx, y - cy)
    elif kind == 2:  # sinusoid
        fx, fy = rng.uniform(2, 9, 2)
        field = np.sin(fx * x * 6.28) * np.cos(fy * y * 6.28)
    else:  # low-pass noise
        small = rng.random((6, 8))
        field = np.asarray(Image.fromarray((small * 255).astype(np.uint8)).resize((w, h), 3))
    field = (field - field.min()) / (np.ptp(field) or 1.0)
    base = np.stack([field * rng.uniform(80, 255) for _ in range(3)], axis=-1)
    im = Image.fromarray(base.astype(np.uint8), "RGB")
    draw = ImageDraw.Draw(im)
    for _ in range(int(rng.integers(2, 9))):
        x0, x1 = sorted(rng.integers(0, w, 2))
        y0, y1 = sorted(rng.integers(0, h, 2))
        colour = tuple(int(c) for c in rng.integers(0, 256, 3))
        if rng.random() < 0.5:
            draw.rectangle([x0, y0, x1 + 4, y1 + 4], fill=colour)
        else:
            draw.ellipse([x0, y0, x1 + 4, y1 + 4], fill=colour)
    if seed % 3 == 0:
        noise = rng.normal(0, 12, (h, w, 3))
        im = Image.fromarray(np.clip(np.asarray(im) + noise, 0, 255).astype(np.uint8))
    if seed % 5 == 0:
        im = im.filter(ImageFilter.GaussianBlur(2))
    return im


SIZES = [(320, 240), (240, 320), (257, 199), (512, 512), (100, 60), (33, 33)]
MODES = ["RGB", "L", "RGBA", "P", "CMYK", "I;16"]


def varied_images() -> list[Image.Image]:
    """36 images: 6 sizes x 6 modes, each from a different seed."""
    out = []
    for i, (size, mode) in enumerate(itertools.product(SIZES, MODES)):
        im = picture(i, size)
        if mode == "I;16":
            im = Image.fromarray(np.asarray(im.convert("L")).astype(np.uint16) * 257)
        else:
            im = im.convert(mode)
        out.append(im)
    return out


def ref_hash(im: Image.Image) -> int:
    """The reference value: imagehash's hex string read as an integer (first bit = MSB)."""
    return int(str(imagehash.phash(im)), 16)


def test_full_decode_hash_is_bit_identical_to_imagehash_on_30_images():
    """phash_from_image equals imagehash.phash on every 8-bit image, mode and size."""
    eight_bit = [im for im in varied_images() if im.mode != "I;16"]
    assert len(eight_bit) == 30
    mismatches = [i for i, im in enumerate(eight_bit) if phash_from_image(im)[0] != ref_hash(im)]
    assert mismatches == []


def test_16_bit_images_hash_as_their_scaled_8_bit_version():
    """imagehash clips 16-bit values (convert("L")), so its bits are not the reference there:
    a 16-bit image hashes within 2 bits of imagehash's hash of the same picture scaled to 8
    bits by the full 16-bit range (value / 257, Pillow handbook "Modes": I;16 is 0..65535)."""
    sixteen = [im for im in varied_images() if im.mode == "I;16"]
    assert len(sixteen) == 6
    for im in sixteen:
        scaled = Image.fromarray((np.asarray(im).astype(np.float64) / 257).round()
                                 .astype(np.uint8))
        assert hamming(phash_from_image(im)[0], ref_hash(scaled)) <= 2
        clipped = ref_hash(im)  # what imagehash says: (nearly) a blank page
        assert hamming(phash_from_image(im)[0], clipped) > NEAR


def test_flat_and_gradient_images_still_match_imagehash():
    """Images where DCT coefficients tie at the median still give imagehash's bits."""
    grad = Image.fromarray(np.tile(np.arange(256, dtype=np.uint8), (64, 1)))
    for im in [Image.new("RGB", (50, 40), (90, 120, 30)), Image.new("L", (7, 7), 0), grad]:
        assert phash_from_image(im)[0] == ref_hash(im)


def test_draft_pipeline_on_jpeg_is_within_two_bits_of_full_decode(tmp_path: Path):
    """JPEG hashed via draft() differs from imagehash on the full decode by at most 2 bits."""
    distances = []
    for seed in range(30):
        path = tmp_path / f"{seed}.jpg"
        picture(seed, (800, 600)).save(path, quality=90)
        with Image.open(path) as im:
            full = ref_hash(im)
        distances.append(hamming(hash_image_file(path)[0], full))
    assert max(distances) <= 2, distances  # libraries.md section 2: 0/0/2 bits


def test_mirror_hash_matches_the_hash_of_the_flipped_image():
    """The mirror hash is within 2 bits of the flipped image's hash (libraries.md section 2)."""
    distances = []
    for seed in range(30):
        im = picture(seed, (320, 240))
        flipped = im.transpose(Image.Transpose.FLIP_LEFT_RIGHT)
        distances.append(hamming(phash_from_image(im)[1], ref_hash(flipped)))
    assert max(distances) <= 2, distances


def test_flip_without_mirror_hash_looks_unrelated():
    """A plain flip moves the hash far away, which is why the mirror hash exists."""
    im = picture(7, (320, 240))
    flipped = im.transpose(Image.Transpose.FLIP_LEFT_RIGHT)
    assert hamming(phash_from_image(im)[0], phash_from_image(flipped)[0]) > NEAR


def test_resized_and_reencoded_copies_stay_within_the_near_threshold(tmp_path: Path):
    """50% resize + JPEG q70 re-encode stays within 8 bits (libraries.md section 2)."""
    distances = []
    for seed in range(30):
        im = picture(seed, (800, 600))
        original, copy = tmp_path / f"o{seed}.jpg", tmp_path / f"c{seed}.jpg"
        im.save(original, quality=95)
        im.resize((400, 300), Image.Resampling.LANCZOS).save(copy, quality=70)
        distances.append(hamming(hash_image_file(original)[0], hash_image_file(copy)[0]))
    assert max(distances) <= NEAR, distances


def test_unrelated_images_are_mostly_beyond_the_near_threshold():
    """Pairs of different pictures are more than 8 bits apart in nearly all cases."""
    hashes = [phash_from_image(picture(seed, (320, 240)))[0] for seed in range(40)]
    distances = [hamming(a, b) for a, b in itertools.combinations(hashes, 2)]
    close = sum(d <= NEAR for d in distances)
    # libraries.md section 2 found 0 of 19,900 unrelated pairs at <= 8; allow 1% on this small set.
    assert close <= len(distances) // 100, sorted(distances)[:10]
    assert np.median(distances) >= 20  # unrelated hashes sit near 32 bits apart


def test_rotated_file_with_orientation_tag_hashes_like_the_upright_copy(tmp_path: Path):
    """Orientation 6 stored sideways hashes like the upright image (hash after orientation)."""
    im = picture(11, (640, 480))
    upright = tmp_path / "upright.jpg"
    im.save(upright, quality=95)
    # Orientation 6: display by rotating 90 degrees clockwise (standards.md section 6.1), so
    # store the pixels rotated 90 degrees counter-clockwise.
    exif = Image.Exif()
    exif[0x0112] = 6
    sideways = tmp_path / "sideways.jpg"
    im.transpose(Image.Transpose.ROTATE_90).save(sideways, quality=95, exif=exif)
    assert hamming(hash_image_file(upright)[0], hash_image_file(sideways)[0]) <= 2


def test_hamming_agrees_with_imagehash_subtraction():
    """hamming(a, b) equals imagehash's ImageHash difference for the same images."""
    a, b = picture(1), picture(2)
    assert hamming(ref_hash(a), ref_hash(b)) == imagehash.phash(a) - imagehash.phash(b)


@pytest.mark.parametrize("value", [0, 1, 2**63 - 1, 2**63, 2**64 - 1, 0xF0F0F0F0F0F0F0F0])
def test_signed_conversion_round_trips_through_sqlite(value: int):
    """A hash stored as signed 64-bit in SQLite reads back to the same unsigned value."""
    db = sqlite3.connect(":memory:")
    db.execute("create table h (v integer)")
    db.execute("insert into h values (?)", (to_signed64(value),))
    (stored,) = db.execute("select v from h").fetchone()
    assert to_unsigned64(stored) == value
    assert hamming(stored, value) == 0


def test_sqlite_cannot_hold_the_unsigned_top_half():
    """Why the signed form exists: sqlite3 refuses integers >= 2**63."""
    db = sqlite3.connect(":memory:")
    with pytest.raises(OverflowError):
        db.execute("select ?", (2**63,))


def test_hash_algo_names_the_draft_pipeline():
    """The stored algorithm tag names the 64-bit DCT draft pipeline."""
    assert HASH_ALGO == "dct-phash-64/draft-v2"


def test_flat_fills_and_plain_gradients_are_featureless() -> None:
    """Every flat fill hashes to the DC bit alone (0x8000..., 0 for black) whatever its
    colour, as imagehash.phash does too; such hashes, and a plain gradient's, are not compared
    by look. Structured pictures set about half the bits (median threshold) and are compared."""
    import imagehash

    from collector.checks.phash import featureless, phash_from_image

    for colour in [(0, 0, 0), (255, 255, 255), (200, 30, 30), (30, 200, 30), (12, 99, 240)]:
        im = Image.new("RGB", (300, 200), colour)
        phash, _ = phash_from_image(im)
        assert phash == int(str(imagehash.phash(im)), 16)  # imagehash 4.3 agrees
        assert featureless(phash), colour
    ramp = Image.fromarray(np.tile(np.linspace(0, 255, 256).astype(np.uint8), (100, 1)))
    assert featureless(phash_from_image(ramp)[0])
    for seed in range(5):
        im = Image.effect_mandelbrot((256, 192), (-2 + seed * 0.2, -1.2, 1, 1.2), 60)
        assert not featureless(phash_from_image(im)[0]), seed


def float_images() -> list[Image.Image]:
    """16-bit, 32-bit integer and float pictures of gradients with grain (the modes that
    hash_ready scales; Pillow handbook "Modes")."""
    rng = np.random.default_rng(11)
    out = []
    for n in range(12):
        h, w = int(rng.integers(40, 200)), int(rng.integers(40, 200))
        field = np.linspace(0, 1, w)[None, :] * np.linspace(0.2, 1, h)[:, None]
        field = np.clip(field + rng.normal(0, 0.05, (h, w)) * (n % 3), 0, 1)
        out += [Image.fromarray((field * 30000).astype(np.uint16)),
                Image.fromarray((field * 0.8).astype(np.float32), "F"),
                Image.fromarray((field * 200).astype(np.int32), "I")]
    return out


def test_ingest_hashes_are_the_hash_pipelines_bits_in_every_mode():
    """One HASH_ALGO pipeline (collector.checks.phash module docstring; libraries.md section
    2: fix one pipeline and record it): the pHash, mirror and turns ingest stores
    (hash_facts) are the bits phash_and_blank gives, for 8-bit, 16-bit, I and F pictures."""
    from collector.checks.phash import hash_facts, phash_and_blank

    for im in [*varied_images(), *float_images()]:
        facts = hash_facts(im.copy())
        phash, mirror, blank = phash_and_blank(im.copy())
        assert (facts.phash, facts.mirror, facts.blank) == (phash, mirror, blank), im.mode
        assert (facts.turns["same"], facts.turns["mirror"]) == (phash, mirror), im.mode


def test_turned_hashes_threshold_at_numpys_median_in_the_blocks_own_type():
    """A float picture's DCT block is float32 (scipy.fft keeps the type); each bit is set where
    a coefficient is above the block's median as np.median computes it (the mean of the two
    middle values, in float32 there). Blocks whose two middle values are neighbouring floats
    tell a float32 median from a float64 one."""
    from collector.checks.phash import turned_hashes

    rng = np.random.default_rng(5)
    for _ in range(200):
        base = np.float32(rng.normal(0, 100))
        block = (base + np.arange(64, dtype=np.float32) * np.spacing(base)).astype(np.float32)
        rng.shuffle(block)
        block = block.reshape(8, 8)
        bits = np.packbits((block > np.median(block)).ravel())
        assert turned_hashes(block)["same"] == int.from_bytes(bits.tobytes(), "big")


def test_the_dct_block_is_the_two_one_dimensional_dcts_bit_for_bit():
    """dct_block transforms both axes in one scipy.fft.dctn call; its coefficients are those of
    scipy.fft.dct along axis 0 then axis 1 (what imagehash computes, with scipy.fftpack) bit
    for bit, in the picture's own type, on the pictures where rounding decides bits: flat
    fills and plain gradients (8-bit and float), and on structured ones."""
    import scipy.fft

    from collector.checks.phash import dct_block
    from collector.checks.pixels import hash_ready

    pictures = [*varied_images(), *float_images(),
                *(Image.new(mode, (40, 30), value) for mode, value in
                  (("L", 0), ("L", 128), ("L", 255), ("F", 0.25), ("F", 0.7)))]
    pictures += [Image.fromarray(np.tile(np.linspace(lo, hi, 64), (48, 1)).astype(dtype))
                 for lo, hi, dtype in ((0, 255, np.uint8), (30, 90, np.uint8),
                                       (0.1, 0.9, np.float32))]
    for im in pictures:
        ready = hash_ready(im)  # what dct_block transforms: mode L, or F on a 0..255 scale
        pixels = np.asarray(ready.resize((32, 32), Image.Resampling.LANCZOS))
        two = scipy.fft.dct(scipy.fft.dct(pixels, axis=0), axis=1)[:8, :8]
        block = dct_block(im)
        assert block.dtype == two.dtype and np.array_equal(block, two), im.mode
