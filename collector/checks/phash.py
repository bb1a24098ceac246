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
1. JPEG only: ``draft('L', (64, 64))`` so libjpeg decodes luma at 1/2..1/8 scale. Ingest asks
   for the same draft as ``YCbCr`` (:func:`hash_draft` with ``colour``): libjpeg decodes the Y
   band the same way whatever the output colour space and Pillow's YCbCr-to-L conversion
   copies Y, so the luma is bit for bit the same (tests/test_images.py) and one decode serves
   the hash and the colour facts; the pipeline, and ``HASH_ALGO``, are unchanged.
2. Greyscale, then the EXIF orientation is applied (standards.md section 6.1 table), so a
   rotated file and an upright copy of the same picture hash alike.
3. 32x32 LANCZOS, DCT, 8x8 block, median threshold.
"""

from __future__ import annotations

import functools
from pathlib import Path
from typing import NamedTuple

import numpy as np
from PIL import Image, ImageFile

from collector.checks.hash_versions import HASH_ALGO, WINDOW_ALGO
from collector.checks.pixels import hash_ready, is_blank

__all__ = [
    "HASH_ALGO",
    "TURNS",
    "WINDOWS",
    "WINDOW_ALGO",
    "HashFacts",
    "dct_block",
    "featureless",
    "hamming",
    "hash_draft",
    "hash_facts",
    "hash_image_file",
    "pack_windows",
    "phash_and_blank",
    "phash_from_image",
    "phash_prepared",
    "prepare_for_hash",
    "to_signed64",
    "to_unsigned64",
    "turned_hashes",
    "unpack_windows",
    "window_hashes",
    "windows_of",
]

# HASH_ALGO and WINDOW_ALGO: collector.checks.hash_versions (imported above, named in __all__).

_HASH_SIZE = 8
_IMG_SIZE = _HASH_SIZE * 4  # highfreq_factor 4, as imagehash
_DRAFT_SIZE = (64, 64)
_DRAFT_READ = 1 << 18  # bytes read from the file at a time for a draft (Pillow: 64 KiB)
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


def _median(block: np.ndarray) -> float:
    """``np.median`` of a block (the mean of the two middle values of an even count, the same
    arithmetic), without its general machinery: it ran 8 times a picture."""
    flat = np.sort(block, axis=None)
    mid = flat.size // 2
    return float(flat[mid]) if flat.size % 2 else float((flat[mid - 1] + flat[mid]) / 2)


def _hash_block(block: np.ndarray) -> int:
    return _bits_to_int(block > _median(block))


def dct_block(im: Image.Image) -> np.ndarray:
    """The 8x8 low-frequency DCT block of an image (any mode, through ``hash_ready``)."""
    return _dct_of(hash_ready(im))


def _dct_of(grey: Image.Image) -> np.ndarray:
    """:func:`dct_block` of a :func:`hash_ready` picture (not made again)."""
    import scipy.fft  # imported lazily: the first import costs 0.1-0.25 s

    pixels = np.asarray(grey.resize((_IMG_SIZE, _IMG_SIZE), Image.Resampling.LANCZOS))
    # axis 0 then axis 1 in one call: pocketfft runs the same 1-D transforms in that order,
    # so the coefficients are those of dct(dct(pixels, axis=0), axis=1) bit for bit
    # (tests/test_phash.py)
    dct = scipy.fft.dctn(pixels, axes=(0, 1))
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


def _turn_signs() -> tuple[np.ndarray, np.ndarray]:
    """For :data:`TURNS` in order: the sign of each coefficient of the block (odd rows and/or
    odd columns negated) and whether the block is then transposed."""
    odd = np.arange(_HASH_SIZE) % 2 == 1
    signs = np.ones((len(TURNS), _HASH_SIZE, _HASH_SIZE))
    for n, (_, odd_rows, odd_cols) in enumerate(TURNS.values()):
        if odd_rows:
            signs[n, odd, :] *= -1
        if odd_cols:
            signs[n, :, odd] *= -1
    return signs, np.array([transpose for transpose, _, _ in TURNS.values()])


_TURN_SIGNS, _TURN_TRANSPOSED = _turn_signs()


def turned_hashes(block: np.ndarray) -> dict[str, int]:
    """The hash the original would have if it were turned back from each of the 8 turns.

    A query that is a copy turned by ``name`` has, after undoing ``name``, the original's
    hash; undoing is applying the inverse turn to the query's block. All 8 at once: the
    signs of each turn, the transposed ones transposed, each block's median threshold (the
    arithmetic of :func:`_median`: the mean of the two middle values) and its bits read
    row-major, first bit most significant."""
    # negating is exact: the same values, in the block's own type (float32 for a float
    # picture), as np.where(.., -b, b), so the medians below round as _median's do
    blocks = _TURN_SIGNS.astype(block.dtype) * block
    blocks[_TURN_TRANSPOSED] = blocks[_TURN_TRANSPOSED].transpose(0, 2, 1)
    flat = blocks.reshape(len(TURNS), _HASH_SIZE * _HASH_SIZE)
    ordered = np.sort(flat, axis=1)
    mid = flat.shape[1] // 2
    medians = (ordered[:, mid - 1] + ordered[:, mid]) / 2
    packed = np.packbits(flat > medians[:, None], axis=1)
    return {name: int.from_bytes(row.tobytes(), "big") for name, row in zip(TURNS, packed,
                                                                            strict=True)}


def prepare_for_hash(im: Image.Image, orientation: int = 1) -> Image.Image:
    """Greyscale, upright image ready for ``phash_from_image`` (call draft() before, for JPEG)."""
    grey = hash_ready(im)
    method = ORIENTATION_TRANSPOSE.get(orientation)
    return grey.transpose(method) if method is not None else grey


def hash_draft(im: Image.Image, *, colour: bool = False) -> None:
    """Ask libjpeg for the HASH_ALGO draft of a JPEG not loaded yet (nothing for other
    formats): luma at 1/2..1/8 scale, each side at least 64 px. ``colour`` keeps the chroma
    (mode ``YCbCr``, no colour conversion; its Y band is that luma, see the module) unless
    the file says its components are RGB (Adobe APP14 transform 0, Pillow's
    ``info["adobe_transform"]``): libjpeg hands those over as RGB or grey, never as YCbCr."""
    if im.format != "JPEG" or not isinstance(im, ImageFile.ImageFile):
        return
    rgb_coded = im.info.get("adobe_transform") == 0
    im.draft("YCbCr" if colour and not rgb_coded else "L", _DRAFT_SIZE)
    # Read in blocks of _DRAFT_READ instead of Pillow's 64 KiB: a 1 MP JPEG in one or two
    # reads and decoder calls, 2 % less CPU for the draft (bench/ingest.py's pictures, the two
    # ways timed in turn in one process).
    im.decodermaxblock = _DRAFT_READ


def phash_prepared(im: Image.Image, orientation: int = 1) -> tuple[int, int]:
    """(pHash, mirror) of an opened image following the HASH_ALGO pipeline.

    For JPEG the caller must not have loaded the image yet, so that draft() can take effect.
    """
    hash_draft(im)
    return phash_from_image(prepare_for_hash(im, orientation))


def phash_and_blank(im: Image.Image, orientation: int = 1) -> tuple[int, int, bool]:
    """(pHash, mirror, blank) of an opened image following the HASH_ALGO pipeline; ``blank``
    as :func:`collector.checks.pixels.is_blank` (a flat picture, never compared by look).
    A JPEG already drafted by :func:`hash_draft` (and loaded) is taken as it is."""
    hash_draft(im)
    grey = prepare_for_hash(im, orientation)
    phash, mirror = phash_from_image(grey)
    return phash, mirror, is_blank(grey)


# --- window hashes: finding crops ----------------------------------------------------------
# A copy cropped to 80 % of each side moves the low frequencies too far for the whole
# picture's pHash (median 22 bits away on bench/trace_quality.py's pictures). So every stored
# picture also gets the pHash of 16 windows of 80 % of each side, on a 4x4 grid of offsets
# (0, 1/15, 2/15 and 3/15 of the side): a crop to 80 % at any place is at most 1/30 of a side
# from one of them, and its own pHash lies within 12 bits of that window's in 97 % of
# bench/trace_quality.py's crops (median 8; a 3x3 grid gave 65 %: the pHash moves fast with
# the offset). Our own layout (common practice, no source). The layout is recorded as
# WINDOW_ALGO beside the hashes; hashes of another layout are not compared.
_WINDOW_SIDE = 0.8
_WINDOW_STEPS = (0.0, 1 / 15, 2 / 15, 3 / 15)
WINDOWS: tuple[tuple[float, float, float, float], ...] = tuple(
    (x, y, x + _WINDOW_SIDE, y + _WINDOW_SIDE) for y in _WINDOW_STEPS for x in _WINDOW_STEPS)


# Pictures larger than this (shorter side, pixels) are first reduced by a whole factor (box
# averages, Pillow Image.reduce) before the windows are cut: a JPEG's hash decode is already
# about this small, and a full-size PNG would otherwise cost 16 full-size resamplings. Our own
# value (common practice, no source).
_WINDOW_BASE = 256
# The first 8 rows of the DCT-II matrix over 32 samples (scipy.fft.dct type 2 without its
# factor 2, which a median threshold ignores).
_DCT8 = np.cos(np.pi * np.arange(_HASH_SIZE)[:, None]
               * (2 * np.arange(_IMG_SIZE)[None, :] + 1) / (2 * _IMG_SIZE))


_STEPS = np.asarray(_WINDOW_STEPS)


@functools.lru_cache(maxsize=64)
def _window_matrices(size: int) -> np.ndarray:
    """(4, 8, size): for each of the 4 window positions along a side of ``size`` pixels, the
    first 8 DCT rows of the window resampled to 32 samples as Pillow's LANCZOS resize of the
    crop does it (Pillow's Resample.c: the a=3 Lanczos window, widened by the scale when
    shrinking, each output's weights summing to 1, no pixel outside the crop). Only the ~23
    pixels around each output's centre have a weight, so only those are evaluated."""
    starts = np.round(_STEPS * size)
    stops = np.round((_STEPS + _WINDOW_SIDE) * size)
    scale = ((stops - starts) / _IMG_SIZE)[:, None, None]
    widen = np.maximum(scale, 1.0)
    centres = starts[:, None, None] + (np.arange(_IMG_SIZE)[None, :, None] + 0.5) * scale
    reach = int(np.ceil(3 * float(widen.max()))) + 1
    index = np.floor(centres).astype(np.intp) + np.arange(-reach, reach + 1)
    x = (index + 0.5 - centres) / widen
    inside = ((index >= starts[:, None, None]) & (index < stops[:, None, None])
              & (np.abs(x) < 3))
    weights = np.where(inside, np.sinc(x) * np.sinc(x / 3), 0.0)
    weights /= weights.sum(axis=2, keepdims=True)
    # each weight at its pixel; a margin of ``reach`` on both sides takes the (zero) weights
    # that fall off the picture, so no two weights share a place
    dense = np.zeros((len(_STEPS), _IMG_SIZE, size + 2 * reach))
    np.put_along_axis(dense, index + reach, weights, axis=2)
    out = _DCT8 @ dense[:, :, reach:reach + size]
    out.flags.writeable = False
    return out


def windows_of(grey: Image.Image) -> list[int]:
    """The pHash of each of :data:`WINDOWS` (fractions of the picture: left, top, right,
    bottom; rounded to whole pixels) of a :func:`prepare_for_hash` picture, made as the whole
    picture's pHash is (the window resampled to 32x32 LANCZOS, DCT, 8x8 block, median), within
    a bit or two of imagehash's phash of ``im.crop(box)``.

    Resampling and the DCT are both linear, so each window's 8x8 block is ``A_y @ G @ A_x.T``
    with ``A = DCT8 @ lanczos_weights``: 4 row and 4 column matrices serve all 16 windows, at
    a fraction of the cost of 16 Pillow crops and resizes (no rounding to 8 bits between the
    passes, hence the odd bit pair that differs)."""
    if min(grey.size) > _WINDOW_BASE:
        grey = grey.reduce(min(grey.size) // _WINDOW_BASE)
    w, h = grey.size
    if min(w, h) < 2:
        return [0] * len(WINDOWS)
    pixels = np.asarray(grey, dtype=np.float64)
    rows, cols = _window_matrices(h), _window_matrices(w)
    # (4 tops, 8, w) then (4 tops, 4 lefts, 8, 8): window (left i, top j) is blocks[j, i]
    blocks = (rows @ pixels)[:, None] @ cols.transpose(0, 2, 1)[None]
    flat = blocks.reshape(len(WINDOWS), _HASH_SIZE * _HASH_SIZE)
    ordered = np.sort(flat, axis=1)  # np.median's arithmetic: the two middle values' mean
    mid = flat.shape[1] // 2
    bits = flat > ((ordered[:, mid - 1] + ordered[:, mid]) / 2)[:, None]
    return [int.from_bytes(row.tobytes(), "big") for row in np.packbits(bits, axis=1)]


def window_hashes(im: Image.Image, orientation: int = 1) -> list[int]:
    """The window hashes (:data:`WINDOWS`, layout :data:`WINDOW_ALGO`) of an opened image
    that is not loaded yet, through the same pipeline as its pHash (JPEG draft, greyscale,
    EXIF ``orientation`` applied): what ingest stores, for a file stored before there were
    window hashes. Store them with :func:`pack_windows` beside ``WINDOW_ALGO``."""
    if im.format == "JPEG":
        im.draft("L", _DRAFT_SIZE)
    return windows_of(prepare_for_hash(im, orientation))


def pack_windows(hashes: list[int]) -> bytes:
    """Window hashes as the ledger keeps them: unsigned 64-bit little-endian, in order."""
    return np.asarray([h & _MASK64 for h in hashes], dtype="<u8").tobytes()


def unpack_windows(raw: bytes | None) -> list[int]:
    """The window hashes of :func:`pack_windows` (none for NULL or a damaged value)."""
    if not raw or len(raw) != 8 * len(WINDOWS):
        return []
    return [int(h) for h in np.frombuffer(raw, dtype="<u8")]


class HashFacts(NamedTuple):
    """The hashes ingest records of one picture."""

    phash: int
    mirror: int
    blank: bool
    turns: dict[str, int]  # the pHash the original would have for each of TURNS
    windows: list[int]  # WINDOWS; empty for a blank picture


def hash_facts(im: Image.Image, orientation: int = 1) -> HashFacts:
    """pHash, mirror, blank, the 8 turned hashes and the window hashes of an opened image
    (HASH_ALGO pipeline; for JPEG not loaded yet, so that draft() takes effect): one decode,
    the windows cut from the same small greyscale picture."""
    hash_draft(im)  # a JPEG already drafted (and loaded) by the caller is taken as it is
    grey = prepare_for_hash(im, orientation)
    # An 8-bit picture (mode L) is hashed as it is (hash_ready would only copy it); any other
    # goes through hash_ready again, as it always has (a float picture is scaled once more).
    turns = turned_hashes(_dct_of(grey) if grey.mode == "L" else dct_block(grey))
    blank = is_blank(grey)
    return HashFacts(turns["same"], turns["mirror"], blank, turns,
                     [] if blank else windows_of(grey))


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
