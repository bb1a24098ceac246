"""Two pixel facts for training data: how much of an image is see-through, and whether it was
enlarged from a smaller original (and from about what size).

Transparency (Pillow documentation, "Concepts > Modes" and "Image file formats > PNG >
transparency"): an image has an alpha band in the modes RGBA, LA, PA, RGBa and La; a P, L or RGB
image may instead carry ``info["transparency"]`` (a palette index, per-entry alpha bytes, or one
colour value), which ``convert("RGBA")`` turns into an alpha band. The share recorded is the
fraction of pixels of the first frame whose alpha is below 255 (not fully opaque).

Enlargement: an image enlarged by a factor k holds (almost) no energy above 1/(2k) cycles per
pixel, the Nyquist frequency of its original; interpolation (bilinear, bicubic, Lanczos) only
leaves an attenuated tail there (sampling theorem; common practice, no source for the
thresholds). The estimate is made per axis from the power spectrum of evenly spaced rows and
columns: the native size along an axis is the size times twice the highest frequency band
whose power stands above the tail. A sharp original keeps energy up to 0.5 cycles/pixel (edges,
texture, sensor noise); a soft original (out of focus, heavily denoised) also reads as
enlarged, which for training data is the same problem: little detail for its size.

Pure functions on Pillow images and numpy arrays; no file I/O.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from PIL import Image

__all__ = ["Enlargement", "estimate_enlargement", "transparent_share"]

_ALPHA_MODES = ("RGBA", "LA", "PA", "RGBa", "La")
# At most this many rows and columns are analysed, each at most _MAX_LINE samples long (its
# centre): enough for a stable mean spectrum, and about 1 ms on a 1 MP image.
_MAX_LINES = 48
_MAX_LINE = 1024
_MIN_LINE = 64  # shorter images are not judged (too few frequency bins)
# Frequency bands (cycles per pixel) tested as the original's Nyquist limit, highest first.
_BANDS = np.linspace(0.46, 0.08, 39)
_UPPER = 1.25  # the band above an edge: edge .. 1.25 x edge
_LOWER = (0.64, 0.8)  # the band below it, as multiples of the edge
_FLOOR_VARIANCE = 1.0 / 12.0
# The tail above an enlarged image's cut-off is this much weaker than the band just below it
# (power ratio); measured on bench/enlarged.py's images (common practice, no source).
_TAIL_RATIO = 0.12
# Enlarged means the estimated native side is under this share of the real one (a factor of
# 1.25 or more); smaller apparent factors are within the estimate's noise.
ENLARGED_BELOW = 0.8


@dataclass(frozen=True)
class Enlargement:
    """The estimated native size of an image and whether it looks enlarged."""

    native_width: int
    native_height: int
    enlarged: bool


def transparent_share(im: Image.Image) -> float:
    """Share (0..1) of the pixels of the current frame that are not fully opaque; 0.0 for an
    image without an alpha band or a transparency entry (Pillow docs, see module)."""
    if im.mode not in _ALPHA_MODES and "transparency" not in im.info:
        return 0.0
    if im.mode in ("RGBA", "LA", "RGBa", "La", "PA"):
        alpha = im.getchannel(im.getbands()[-1])  # "A", or "a" for premultiplied modes
    else:  # P / L / RGB with a transparency entry: Pillow resolves it in convert()
        try:
            alpha = im.convert("RGBA").getchannel("A")
        except ValueError:  # a mode Pillow cannot convert: nothing to measure
            return 0.0
    hist = alpha.histogram()
    total = sum(hist)
    return round((total - hist[255]) / total, 6) if total else 0.0


def _luma(im: Image.Image) -> np.ndarray | None:
    """The image as luma (uint8, or float32 for 16-bit and float modes scaled by their own
    range to 0..255, so the rounding floor below stays the same); None for a mode Pillow
    cannot turn into greyscale."""
    if im.mode in ("I;16", "I;16B", "I;16L", "I", "F"):
        arr = np.asarray(im, dtype=np.float32)
        span = float(arr.max() - arr.min())
        return (arr - float(arr.min())) * (255.0 / span) if span > 0 else arr * 0
    try:
        if im.mode == "LAB":
            im = im.getchannel("L")  # lightness; Pillow has no LAB -> L conversion
        elif im.mode != "L":
            im = im.convert("L")
    except ValueError:
        return None
    return np.asarray(im)


def _lines(arr: np.ndarray) -> np.ndarray:
    """Up to _MAX_LINES evenly spaced rows of ``arr`` (as float32), each cut to its central
    _MAX_LINE samples."""
    pick = np.linspace(0, arr.shape[0] - 1, min(_MAX_LINES, arr.shape[0])).astype(int)
    width = arr.shape[1]
    start = max(0, (width - _MAX_LINE) // 2)
    return arr[pick, start:start + _MAX_LINE].astype(np.float32)


def _spectrum(lines: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(frequencies in cycles/pixel, mean power above the 8-bit rounding floor) of the lines,
    each detrended and windowed (Hann)."""
    lines = lines - lines.mean(axis=1, keepdims=True)
    window = np.hanning(lines.shape[1]).astype(np.float32)
    power = (np.abs(np.fft.rfft(lines * window, axis=1)) ** 2).mean(axis=0)
    # Rounding to whole grey levels adds white noise of variance 1/12 (uniform error), whose
    # expected power per bin is that variance times the window's energy.
    floor = _FLOOR_VARIANCE * float((window.astype(np.float64) ** 2).sum())
    return np.fft.rfftfreq(lines.shape[1]), np.maximum(power - floor, 0.0)


def _band_means(freqs: np.ndarray, power: np.ndarray, low: np.ndarray,
                high: np.ndarray) -> np.ndarray:
    """Mean power over the bins with low < f <= high, for each pair (NaN for an empty band)."""
    total = np.concatenate([[0.0], np.cumsum(power, dtype=np.float64)])
    start = np.searchsorted(freqs, low, side="right")
    stop = np.searchsorted(freqs, high, side="right")
    count = stop - start
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(count > 0, (total[stop] - total[start]) / np.maximum(count, 1), np.nan)


def tail_ratios(freqs: np.ndarray, power: np.ndarray) -> np.ndarray:
    """For each edge of _BANDS: mean power just above it over mean power just below it (1.0
    where a band is empty or the lower one holds nothing above the rounding floor)."""
    upper = _band_means(freqs, power, _BANDS, np.minimum(0.5, _BANDS * _UPPER))
    lower = _band_means(freqs, power, _BANDS * _LOWER[0], _BANDS * _LOWER[1])
    with np.errstate(invalid="ignore", divide="ignore"):
        ratios = upper / lower
    return np.where(np.isfinite(ratios) & (lower > 0), ratios, 1.0)


def native_fraction(ratios: np.ndarray) -> float:
    """Estimated native size as a fraction of the real one (1.0 = not enlarged): twice the
    lowest band edge where the spectrum drops into a weak tail (a ratio under _TAIL_RATIO); a
    natural spectrum falls smoothly (about 1/f^2) and has no such drop. Above an enlarged
    image's cut-off every band is tail, so the lowest drop is the cut-off itself."""
    drops = np.nonzero(ratios < _TAIL_RATIO)[0]
    if drops.size == 0:
        return 1.0
    # The lowest drop lies about one band width (x _UPPER) under the cut-off (bench/enlarged.py).
    return min(1.0, 2.0 * _UPPER * float(_BANDS[int(drops.max())]))


def estimate_enlargement(im: Image.Image) -> Enlargement | None:
    """Estimated native size of the image as given (first frame, orientation as stored), or
    None when a side is under 64 px (too short for a spectrum) or the mode has no greyscale."""
    width, height = im.size
    if min(width, height) < _MIN_LINE:
        return None
    arr = _luma(im)
    if arr is None:
        return None
    rows, cols = tail_ratios(*_spectrum(_lines(arr))), tail_ratios(*_spectrum(_lines(arr.T)))
    both = native_fraction((rows + cols) / 2)  # one verdict, steadier than either axis alone
    if both >= 1.0:
        return Enlargement(width, height, False)
    fx, fy = native_fraction(rows), native_fraction(cols)
    fx, fy = (fx if fx < 1.0 else both), (fy if fy < 1.0 else both)
    native_w, native_h = round(width * fx), round(height * fy)
    enlarged = both < ENLARGED_BELOW
    return Enlargement(native_w, native_h, enlarged)


POLICIES = ("keep", "flag", "reject")


@dataclass(frozen=True)
class PixelFacts:
    """The transparency share and the native-size estimate of one image (None: not measured)."""

    transparent_share: float | None
    enlargement: Enlargement | None

    def columns(self) -> dict[str, float | int | None]:
        """The ledger ``files`` columns these facts fill."""
        est = self.enlargement
        return {"transparent_share": self.transparent_share,
                "native_width": est.native_width if est else None,
                "native_height": est.native_height if est else None}


def verdicts(facts: PixelFacts, *, transparent: str, enlarged: str,
             min_side: int) -> list[tuple[str, str, str]]:
    """What the recipe's policies say about the facts: (policy, reason, detail) for each that
    applies; policy "flag" keeps the image with the reason as a flag, "reject" refuses it.

    Transparency applies when some pixel is not fully opaque; enlargement when the image looks
    enlarged and its estimated native shortest side is under ``min_side`` (any enlarged image
    when ``min_side`` is 0)."""
    out = []
    share = facts.transparent_share or 0.0
    if transparent != "keep" and share > 0:
        out.append((transparent, "transparent",
                    f"{share:.1%} of the pixels are transparent ([images] transparent = "
                    f'"{transparent}")'))
    est = facts.enlargement
    if enlarged != "keep" and est is not None and est.enlarged:
        native = min(est.native_width, est.native_height)
        if not min_side or native < min_side:
            limit = f"under min_side {min_side}" if min_side else "enlarged"
            out.append((enlarged, "enlarged",
                        f"looks enlarged from about {est.native_width}x{est.native_height} "
                        f"(native shortest side {native}px, {limit}; [images] enlarged = "
                        f'"{enlarged}")'))
    return out
