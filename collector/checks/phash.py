"""64-bit DCT perceptual hash (same bits as ``imagehash.phash``) plus the mirror-image hash.

Algorithm (imagehash 4.3 ``phash``, hash_size 8, highfreq_factor 4): greyscale, resize to 32x32
with LANCZOS, 2-D DCT-II (unnormalised, axis 0 then axis 1), keep the top-left 8x8 block, and
set each bit where the coefficient is greater than the median of that block. Bits are read
row-major with the first bit as the most significant, so the integer equals
``int(str(imagehash.phash(im)), 16)`` (libraries.md section 2).

The DCT is ``scipy.fft.dct``: a DCT written as a numpy matrix product gave the same hash on
structured images but differed on flat fills and pure gradients, where many coefficients tie at
the median and rounding noise decides the bit. scipy matches imagehash there too.

Mirror hash: flipping an image left-right multiplies DCT column k by (-1)^k, so the hash of the
mirrored image comes from the same coefficients with odd columns negated (libraries.md section 2).

Pipeline (recorded as ``HASH_ALGO`` with every stored hash, because draft and full decodes differ
by up to 2 bits, libraries.md section 2):
1. JPEG only: ``draft('L', (64, 64))`` so libjpeg decodes luma at 1/2..1/8 scale.
2. Greyscale, then the EXIF orientation is applied (standards.md section 6.1 table), so a
   rotated file and an upright copy of the same picture hash alike.
3. 32x32 LANCZOS, DCT, 8x8 block, median threshold.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
from PIL import Image

from collector.checks.pixels import hash_ready, is_blank

__all__ = [
    "HASH_ALGO",
    "TURNS",
    "dct_block",
    "featureless",
    "hamming",
    "hash_image_file",
    "phash_and_blank",
    "phash_from_image",
    "phash_prepared",
    "prepare_for_hash",
    "to_signed64",
    "to_unsigned64",
    "turned_hashes",
]

# v2: 16-bit, float and transparent pictures hashed through pixels.hash_ready (scaled, on
# white) instead of a clipping convert("L"); 8-bit pictures without transparency hash as in v1.
HASH_ALGO = "dct-phash-64/draft-v2"

_HASH_SIZE = 8
_IMG_SIZE = _HASH_SIZE * 4  # highfreq_factor 4, as imagehash
_DRAFT_SIZE = (64, 64)
_MASK64 = (1 << 64) - 1
_ODD_COLUMNS = (np.arange(_HASH_SIZE) % 2 == 1)[None, :]

# EXIF Orientation -> Pillow transpose that displays the image upright
# (standards.md section 6.1, "Orientation values"; 6 = rotate 90 degrees clockwise).
ORIENTATION_TRANSPOSE: dict[int, Image.Transpose] = {
    2: Image.Transpose.FLIP_LEFT_RIGHT,
    3: Image.Transpose.ROTATE_180,
    4: Image.Transpose.FLIP_TOP_BOTTOM,
    5: Image.Transpose.TRANSPOSE,
    6: Image.Transpose.ROTATE_270,
    7: Image.Transpose.TRANSVERSE,
    8: Image.Transpose.ROTATE_90,
}


def _bits_to_int(bits: np.ndarray) -> int:
    """Row-major bits, first bit most significant."""
    return int.from_bytes(np.packbits(bits.astype(np.uint8).ravel()).tobytes(), "big")


def _hash_block(block: np.ndarray) -> int:
    return _bits_to_int(block > np.median(block))


def dct_block(im: Image.Image) -> np.ndarray:
    """The 8x8 low-frequency DCT block of an image (any mode, through ``hash_ready``)."""
    import scipy.fft  # imported lazily: the first import costs 0.1-0.25 s

    grey = hash_ready(im).resize((_IMG_SIZE, _IMG_SIZE), Image.Resampling.LANCZOS)
    pixels = np.asarray(grey)
    dct = scipy.fft.dct(scipy.fft.dct(pixels, axis=0), axis=1)
    return np.asarray(dct[:_HASH_SIZE, :_HASH_SIZE])


def phash_from_image(im: Image.Image) -> tuple[int, int]:
    """(pHash, mirror pHash) of an image as given: no draft, no orientation applied.

    8-bit modes without transparency are greyscaled with ``convert("L")`` as imagehash does;
    16-bit, float and transparent images through :func:`collector.checks.pixels.hash_ready`.
    """
    block = dct_block(im)
    mirrored = np.where(_ODD_COLUMNS, -block, block)
    return _hash_block(block), _hash_block(mirrored)


# The eight ways to turn or flip a picture (the dihedral group of the square), as the DCT
# block sees them: a left-right flip negates odd columns, a top-bottom flip odd rows, and a
# transpose (a flip about the diagonal) transposes the block. For a 32x32 grid these are exact
# identities of the DCT-II, so the hash of a turned copy comes from the query's own block.
# Name -> (transpose first?, negate odd rows?, negate odd columns?), where the name says what
# was done to the ORIGINAL to make the copy (Pillow's ``Transpose.ROTATE_90`` turns
# counter-clockwise; "+mirror": then flipped left-right). tests/test_phash.py checks each.
TURNS: dict[str, tuple[bool, bool, bool]] = {
    "same": (False, False, False),
    "mirror": (False, False, True),
    "rotate180": (False, True, True),
    "rotate180+mirror": (False, True, False),
    "rotate90": (True, True, False),
    "rotate270": (True, False, True),
    "rotate90+mirror": (True, True, True),
    "rotate270+mirror": (True, False, False),
}


def turned_hashes(block: np.ndarray) -> dict[str, int]:
    """The hash the original would have if it were turned back from each of the 8 turns.

    A query that is a copy turned by ``name`` has, after undoing ``name``, the original's
    hash; undoing is applying the inverse turn to the query's block."""
    out: dict[str, int] = {}
    for name, (transpose, odd_rows, odd_cols) in TURNS.items():
        b = block
        if odd_rows:
            b = np.where(_ODD_COLUMNS.T, -b, b)
        if odd_cols:
            b = np.where(_ODD_COLUMNS, -b, b)
        if transpose:
            b = b.T
        out[name] = _hash_block(b)
    return out


def prepare_for_hash(im: Image.Image, orientation: int = 1) -> Image.Image:
    """Greyscale, upright image ready for ``phash_from_image`` (call draft() before, for JPEG)."""
    grey = hash_ready(im)
    method = ORIENTATION_TRANSPOSE.get(orientation)
    return grey.transpose(method) if method is not None else grey


def phash_prepared(im: Image.Image, orientation: int = 1) -> tuple[int, int]:
    """(pHash, mirror) of an opened image following the HASH_ALGO pipeline.

    For JPEG the caller must not have loaded the image yet, so that draft() can take effect.
    """
    if im.format == "JPEG":
        im.draft("L", _DRAFT_SIZE)
    return phash_from_image(prepare_for_hash(im, orientation))


def phash_and_blank(im: Image.Image, orientation: int = 1) -> tuple[int, int, bool]:
    """(pHash, mirror, blank) of an opened image following the HASH_ALGO pipeline; ``blank``
    as :func:`collector.checks.pixels.is_blank` (a flat picture, never compared by look)."""
    if im.format == "JPEG":
        im.draft("L", _DRAFT_SIZE)
    grey = prepare_for_hash(im, orientation)
    phash, mirror = phash_from_image(grey)
    return phash, mirror, is_blank(grey)


def hash_image_file(path: Path | str) -> tuple[int, int]:
    """(pHash, mirror) of an image file following the HASH_ALGO pipeline."""
    with Image.open(path) as im:
        orientation = int(im.getexif().get(0x0112, 1) or 1)
        return phash_prepared(im, orientation)


# The median threshold sets 31 or 32 of the 64 bits whenever the low-frequency coefficients
# differ (a bit is set where a coefficient is above the median of the block). Fewer set bits
# mean that most coefficients tie at the median: a flat fill (only the DC bit, 0x8000...) or a
# plain gradient, whose hash says nothing about what the picture shows; every flat fill hashes
# alike, whatever its colour. Our own rule (common practice, no source): below this many set
# bits a hash is not compared by look.
FEATURELESS_BELOW_BITS = 8


def featureless(phash: int) -> bool:
    """Whether a hash is too plain to compare by look (see FEATURELESS_BELOW_BITS)."""
    return (phash & _MASK64).bit_count() < FEATURELESS_BELOW_BITS


def hamming(a: int, b: int) -> int:
    """Number of differing bits between two 64-bit hashes (signed or unsigned)."""
    return ((a ^ b) & _MASK64).bit_count()


def to_signed64(u: int) -> int:
    """Unsigned 64-bit hash -> signed value that fits an SQLite INTEGER."""
    u &= _MASK64
    return u - (1 << 64) if u >= (1 << 63) else u


def to_unsigned64(s: int) -> int:
    """Signed SQLite INTEGER -> the unsigned 64-bit hash."""
    return s & _MASK64
