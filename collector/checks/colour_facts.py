"""Colour and tone facts of one picture, for curation: computed once, on a small image.

Every fact is computed from the small (draft-size) picture the hash is made from, never from a
second full decode, and sampled down to at most ``MAX_SAMPLES`` pixels where a fact only needs
a distribution. Sources of each formula:

- sRGB to CIELAB: IEC 61966-2-1:1999 (the sRGB transfer function and its RGB-to-XYZ matrix,
  D65 white) and CIE 15:2004 (CIELAB from XYZ, with the reference white D65 X=0.95047,
  Y=1.0, Z=1.08883). Worked values: sRGB white -> L*=100, a*=b*=0; sRGB red (255, 0, 0) ->
  L*=53.24, a*=80.09, b*=67.20 (the values published with these formulas, from memory).
- Dominant colours: k-means on the CIELAB values: Lloyd's algorithm (S. P. Lloyd, "Least
  squares quantization in PCM", IEEE Trans. Inf. Theory 28(2), 1982) from a k-means++ start
  (D. Arthur and S. Vassilvitskii, "k-means++: the advantages of careful seeding", SODA
  2007) with a fixed seed, in numpy (scipy's kmeans2 and vq took 1.2 ms a picture, this
  about 0.2 ms with the shares, and scipy.cluster's import cost 0.3 s a run): the seeds and
  at most ``KMEANS_ROUNDS`` rounds on a sample of ``MAX_SAMPLES`` pixels, then one last
  round over every pixel, which gives the shares (every pixel counted at its nearest
  centre) and the colours (the mean of the pixels so counted); each cluster with its sRGB
  colour and HSV hue in degrees (Python's colorsys). Starting on a random sample is the
  usual way to run k-means for colour quantisation (common practice, no source): a few
  hundred pixels place the centres of a picture's main colours within a unit or two of
  where all of them would (tests/test_colour_facts.py checks it against scipy's kmeans2
  over every pixel of a larger picture), at a fraction of the cost. The sample is drawn
  from a generator seeded with 0, so the same picture always gets the same colours.
- Chroma C*ab = sqrt(a*^2 + b*^2) (CIE 15:2004); a picture is ``greyscale`` when 95 % of its
  pixels have C*ab below ``GREY_CHROMA`` (common practice, no source; counted, not read off an
  interpolated percentile).
- Brightness: mean L*; contrast: the standard deviation of L* (RMS contrast on L*).
- Colourfulness: Hasler and Süsstrunk, "Measuring colourfulness in natural images", Proc.
  SPIE 5007, 2003: rg = R - G, yb = (R + G)/2 - B, M = sqrt(sd_rg^2 + sd_yb^2) + 0.3 *
  sqrt(mean_rg^2 + mean_yb^2) on 0-255 values; their scale: 0 not colourful, ~15 slightly,
  ~33 moderately, ~45 averagely, ~59 quite, ~82 highly, ~109 extremely colourful.
- Sharpness: the variance of the Laplacian of the grey image (common practice, no source; the
  5-point stencil with mirrored edges, as scipy.ndimage.laplace), on the picture reduced to
  ``WORK_SIDE`` px: it tells a blurred or empty picture from a
  detailed one, not fine focus. The grey image is ITU-R BT.601 luma (Pillow's
  ``convert("L")``; a JPEG draft's own Y band, the same weights, JFIF).
- Background share: the share of the picture covered by its largest connected region of
  near-flat pixels (L* gradient below ``FLAT_GRADIENT``; common practice, no source) - a
  "mostly empty" scan scores near 1.
"""

from __future__ import annotations

import colorsys
import math
import threading
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import numpy as np
from PIL import Image

from collector.checks.hash_versions import COLOUR_ALGO

__all__ = ["COLOUR_ALGO", "ColourFacts", "DominantColour", "colour_facts", "srgb_to_lab"]

# COLOUR_ALGO (collector.checks.hash_versions, named in __all__): the way these facts are made,
# recorded beside them (``files.colour_algo``) so that ``collector remeasure`` can tell facts an
# older collector made and compute them again.
MAX_SAMPLES = 256  # pixels sampled for k-means (a distribution, not every pixel)
KMEANS_ROUNDS = 2  # Lloyd rounds at most on the sample, before the last one over every
# pixel (common practice, no source; see _kmeans)
# A round that moves no centre by this much (CIELAB units: half a just-noticeable difference
# of about 1 unit, common practice, no source) ends the k-means.
KMEANS_SETTLED = 0.5
WORK_SIDE = 64  # the facts are computed on a picture this small (longest side, px)
GREY_CHROMA = 6.0  # C*ab below this counts as grey (common practice, no source)
FLAT_GRADIENT = 2.0  # L* units per pixel below this counts as flat (common practice, no source)
_WHITE = np.array([0.95047, 1.0, 1.08883])  # D65 tristimulus values, CIE 15:2004


def _rgb_to_xyz_matrix() -> np.ndarray:
    """The sRGB-to-XYZ matrix derived from the sRGB primaries' chromaticities (IEC
    61966-2-1:1999: R 0.64/0.33, G 0.30/0.60, B 0.15/0.06) scaled so that RGB white maps to
    the D65 white above; its rounded form is the matrix printed in the standard."""
    xy = np.array([[0.64, 0.33], [0.30, 0.60], [0.15, 0.06]])
    primaries = np.column_stack([xy[:, 0] / xy[:, 1], np.ones(3),
                                 (1 - xy[:, 0] - xy[:, 1]) / xy[:, 1]]).T
    return primaries * np.linalg.solve(primaries, _WHITE)


_RGB_TO_XYZ = _rgb_to_xyz_matrix()


@dataclass(frozen=True)
class DominantColour:
    """One k-means cluster: its CIELAB centre, share of pixels, sRGB hex and HSV hue."""

    lab: tuple[float, float, float]
    share: float
    hex: str
    hue: float  # degrees, 0-360 (HSV hue of the sRGB colour)


_MEASURES = ("brightness", "contrast", "colourfulness", "sharpness", "background_share")


@dataclass(frozen=True)
class ColourFacts:
    """The colour and tone facts of one picture (see the module's sources)."""

    colours: tuple[DominantColour, ...]
    greyscale: bool
    brightness: float  # mean L*, 0-100
    contrast: float  # standard deviation of L*
    colourfulness: float  # Hasler and Süsstrunk's M
    sharpness: float  # variance of the Laplacian of the grey image (0-255 scale)
    background_share: float  # largest flat connected region, 0-1

    def columns(self) -> dict[str, Any]:
        """The ledger ``files`` columns these facts fill (schema 10), with the way they were
        computed (``colour_algo``)."""
        data = self.as_json()
        return {"greyscale": int(self.greyscale), "colours": data["colours"],
                **{key: data[key] for key in _MEASURES}, "colour_algo": COLOUR_ALGO}

    def as_json(self) -> dict[str, Any]:
        """Plain data for the ledger (rounded: these are estimates)."""
        # Built field by field: dataclasses.asdict deep-copies every value (0.1 ms a file).
        return {"colours": [{"lab": [round(v, 2) for v in c.lab], "share": round(c.share, 4),
                             "hex": c.hex, "hue": round(c.hue, 1)} for c in self.colours],
                "greyscale": self.greyscale,
                **{key: round(float(getattr(self, key)), 4) for key in _MEASURES}}


def _linear(c: np.ndarray) -> np.ndarray:
    """The sRGB transfer function undone (IEC 61966-2-1:1999), values 0-1."""
    return np.where(c <= 0.04045, c / 12.92, ((c + 0.055) / 1.055) ** 2.4)


_LINEAR_8BIT = _linear(np.arange(256) / 255.0)  # exact for 8-bit input, looked up
# For 8-bit pictures: the table and the matrix (divided by the white) in float32, which keeps
# L*, a*, b* to about 1e-4 and halves the work (float64 for any other input).
_LINEAR_8BIT_32 = _LINEAR_8BIT.astype(np.float32)
_TO_RELATIVE_XYZ_32 = (_RGB_TO_XYZ / _WHITE[:, None]).T.astype(np.float32)


_F_TO_LAB = np.array([[0.0, 500.0, 0.0], [116.0, -500.0, 200.0], [0.0, 0.0, -200.0]])
_F_TO_LAB_32 = _F_TO_LAB.astype(np.float32)


def srgb_to_lab(rgb: np.ndarray) -> np.ndarray:
    """CIELAB (D65) of sRGB values in 0-255, shape (..., 3) -> (..., 3)."""
    values = np.asarray(rgb)
    if values.dtype == np.uint8:
        xyz = np.take(_LINEAR_8BIT_32, values) @ _TO_RELATIVE_XYZ_32
    else:
        xyz = _linear(values.astype(np.float64) / 255.0) @ _RGB_TO_XYZ.T / _WHITE
    eps, kappa = 216 / 24389, 24389 / 27  # CIE 15:2004 exact ratios
    f = np.cbrt(xyz)  # above eps; the linear part only where it applies (dark values)
    dark = xyz <= eps
    if dark.any():
        f[dark] = (kappa * xyz[dark] + 16) / 116
    # L* = 116 fy - 16, a* = 500 (fx - fy), b* = 200 (fy - fz): one product for all three
    lab = f @ (_F_TO_LAB_32 if f.dtype == np.float32 else _F_TO_LAB)
    lab[..., 0] -= 16
    return lab


_XYZ_TO_RGB = np.linalg.inv(_RGB_TO_XYZ)


_XYZ_TO_RGB_ROWS = _XYZ_TO_RGB.tolist()
_WHITE_VALUES = _WHITE.tolist()


def _lab_to_srgb8(lab: list[float]) -> list[int]:
    """The 8-bit sRGB colour of one CIELAB value (the inverse of srgb_to_lab, clipped to the
    gamut), in plain Python floats: it runs for the handful of dominant colours of a picture,
    where numpy's calls cost more than the arithmetic."""
    eps, kappa = 216 / 24389, 24389 / 27  # CIE 15:2004 exact ratios
    fy = (lab[0] + 16) / 116
    xyz = [(f ** 3 if f ** 3 > eps else (116 * f - 16) / kappa) * white
           for f, white in zip((fy + lab[1] / 500, fy, fy - lab[2] / 200), _WHITE_VALUES,
                               strict=True)]
    out = []
    for r, g, b in _XYZ_TO_RGB_ROWS:
        linear = min(max(r * xyz[0] + g * xyz[1] + b * xyz[2], 0.0), 1.0)
        c = 12.92 * linear if linear <= 0.0031308 else 1.055 * linear ** (1 / 2.4) - 0.055
        out.append(round(min(max(c, 0.0), 1.0) * 255))  # round() halves to even
    return out


# |p - c|^2 = |p|^2 - 2 p.c + |c|^2, and |p|^2 is the same for every centre of a point: the
# nearest centre is the one with the least |c|^2 - 2 p.c (sums by np.add.reduce: the
# arithmetic of ndarray.sum without its Python layer)
_SUM = np.add.reduce


def _squared_distances(columns: np.ndarray, centre: np.ndarray) -> np.ndarray:
    """Squared distance of each point (``columns``: one row per coordinate) to ``centre``,
    the coordinates' squares added in order, as ``((p - c) ** 2).sum(axis=1)`` does."""
    diff = columns - centre[:, None]
    diff *= diff
    out = diff[0] + diff[1]
    out += diff[2]
    return out


def _seeds(points: np.ndarray, k: int, rng: np.random.Generator) -> np.ndarray:
    """k-means++ seeding: the first centre drawn uniformly, each next one with probability
    proportional to its squared distance from the nearest centre chosen so far (Arthur and
    Vassilvitskii, 2007); the k uniform draws taken at once. ``points`` (n, 3) in float64."""
    n = len(points)
    draws = rng.random(k).tolist()
    columns = np.ascontiguousarray(points.T)
    centres = np.empty((k, points.shape[1]))
    centres[0] = points[min(int(draws[0] * n), n - 1)]
    d2 = _squared_distances(columns, centres[0])
    for i in range(1, k):
        cumulative = np.add.accumulate(d2)
        total = float(cumulative[-1])
        pick = (int(cumulative.searchsorted(draws[i] * total, side="right"))
                if total > 0 else int(draws[i] * n))
        centres[i] = points[min(pick, n - 1)]
        if i + 1 < k:  # the last centre's distances are not needed
            np.minimum(d2, _squared_distances(columns, centres[i]), out=d2)
    return centres


_XYZ = np.arange(3)


def _lloyd_step(points: np.ndarray, flat: np.ndarray, twice: np.ndarray,
                centres: np.ndarray) -> np.ndarray:
    """One round of Lloyd's algorithm: each point (``points`` (n, 3); ``flat`` the same
    values raveled, ``twice`` doubled, both float64) given to its nearest centre, then each
    centre moved to the mean of its points (:func:`_means`). Returns the centres moved."""
    k = len(centres)
    label = (_SUM(centres * centres, 1) - twice @ centres.T).argmin(1)
    counts = np.bincount(label, minlength=k)
    # each cluster's coordinate sums in one count: bin 3 * cluster + coordinate adds its
    # points in turn, as a count per coordinate does
    sums = np.bincount((3 * label[:, None] + _XYZ).ravel(), flat,
                       minlength=3 * k).reshape(k, 3)
    return _means(sums, counts, centres)


def _means(sums: np.ndarray, counts: np.ndarray, centres: np.ndarray) -> np.ndarray:
    """Each cluster's mean (its coordinate ``sums`` over its point ``counts``); an emptied
    cluster keeps its centre."""
    if counts.all():
        return sums / counts[:, None]
    return np.where(counts[:, None] > 0, sums / np.maximum(counts, 1)[:, None], centres)


def _kmeans(sample: np.ndarray, every: np.ndarray, k: int,
            rng: np.random.Generator) -> tuple[np.ndarray, np.ndarray]:
    """Lloyd's algorithm from k-means++ seeds: at most ``KMEANS_ROUNDS`` rounds on the
    ``sample`` (n, 3), then one last round over ``every`` point (m, 3, float32). Returns (how
    many points each centre has in that round, the centres: the means of those points, an
    emptied cluster keeping its centre; float64)."""
    wide = sample.astype(np.float64)  # exact; what the mixed-type arithmetic used anyway
    twice = 2.0 * wide
    centres = _seeds(wide, k, rng)
    flat = wide.ravel()
    for _ in range(KMEANS_ROUNDS):
        moved = _lloyd_step(wide, flat, twice, centres)
        settled = float(np.abs(moved - centres).max()) < KMEANS_SETTLED
        centres = moved
        if settled:
            break
    # the last round over every point: distances in float32 (the points' own type), sums in
    # float64 by one product with the clusters' indicator rows
    label = (every @ (-2.0 * centres.T).astype(np.float32)
             + _SUM(centres * centres, 1).astype(np.float32)).argmin(1)
    members = (label == _CLUSTERS[:k, None]).astype(np.float64)
    counts = _SUM(members, 1)
    return counts, _means(members @ every.astype(np.float64), counts, centres)


_CLUSTERS = np.arange(64)  # cluster numbers (k is at most 16: collector.config.recipe)


_SEEDED = np.random.default_rng(0).bit_generator.state  # the generator of seed 0, as made
_GENERATORS = threading.local()


def _seeded_generator() -> np.random.Generator:
    """``np.random.default_rng(0)`` as new: this thread's generator reset to that state (the
    same draws; seeding a new one each time cost more than the k-means rounds)."""
    rng = getattr(_GENERATORS, "rng", None)
    if rng is None:
        rng = _GENERATORS.rng = np.random.default_rng(0)
    else:
        rng.bit_generator.state = _SEEDED
    return rng


def _dominant(lab: np.ndarray, k: int) -> tuple[DominantColour, ...]:
    every = lab.reshape(-1, 3)
    pixels = every
    rng = _seeded_generator()
    if len(pixels) > MAX_SAMPLES:  # drawn with replacement: as good a sample, far cheaper
        pixels = pixels[rng.integers(0, len(pixels), MAX_SAMPLES)]
    # A picture with fewer distinct colours than k: k-means++ seeds the rest on colours
    # already taken, those clusters stay empty and are left out below.
    k = max(1, k)
    counts, centres = _kmeans(pixels, every, k, rng)  # counted over every pixel
    total = len(every)
    labs = centres.tolist()
    out = []
    for count, i in sorted(zip((-counts).tolist(), range(k), strict=True)):  # largest first
        if count == 0:
            continue
        red, green, blue = _lab_to_srgb8(labs[i])
        hue = colorsys.rgb_to_hsv(red / 255, green / 255, blue / 255)[0] * 360
        out.append(DominantColour((labs[i][0], labs[i][1], labs[i][2]), -count / total,
                                  f"#{red:02x}{green:02x}{blue:02x}", hue))
    return tuple(out)


def _mean_var(values: np.ndarray) -> tuple[Any, Any]:
    """Mean and variance (population) of an array as numpy scalars of its type: the
    arithmetic of ``np.mean`` and ``np.var`` (sum, divide; deviations squared, sum, divide)
    without their Python layers."""
    n = values.size
    mean = values.sum() / n
    dev = values - mean
    return mean, (dev * dev).sum() / n


def _colourfulness(rgb: np.ndarray) -> float:
    """Hasler and Suesstrunk's M from the sums and the sums of products of R, G and B (one
    product of the pixels with themselves): rg = R - G and yb = (R + G) / 2 - B are linear
    in R, G, B, so their means and variances follow from those nine numbers. The sums of
    8-bit values are whole numbers held exactly in float64 (up to 2**53), so a grey picture
    (R = G = B) has exactly M = 0."""
    wide = rgb.reshape(-1, 3).astype(np.float64)
    n = len(wide)
    columns = np.ascontiguousarray(wide.T)  # (3, n): the product and sums run along rows
    (rr, rg, rb), (_, gg, gb), (_, _, bb) = (columns @ wide).tolist()
    r, g, b = _SUM(columns, 1).tolist()
    mean_rg, mean_yb = (r - g) / n, (0.5 * (r + g) - b) / n
    var_rg = max((rr - 2 * rg + gg) / n - mean_rg * mean_rg, 0.0)
    var_yb = max((0.25 * (rr + gg) + 0.5 * rg + bb - rb - gb) / n - mean_yb * mean_yb, 0.0)
    return math.hypot(math.sqrt(var_rg), math.sqrt(var_yb)) + 0.3 * math.hypot(mean_rg, mean_yb)


def _sharpness(grey: np.ndarray) -> float:
    """Variance of the 5-point Laplacian, edges mirrored (scipy.ndimage.laplace's "reflect")."""
    h, w = grey.shape
    p = np.empty((h + 2, w + 2))  # the picture with each edge repeated outside it (mirrored)
    p[1:-1, 1:-1] = grey
    p[0, 1:-1], p[-1, 1:-1] = grey[0], grey[-1]
    p[1:-1, 0], p[1:-1, -1] = grey[:, 0], grey[:, -1]
    centre = p[1:-1, 1:-1]
    return float(_mean_var(p[:-2, 1:-1] + p[2:, 1:-1] + p[1:-1, :-2] + p[1:-1, 2:]
                           - 4 * centre)[1])


def _gradient(values: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """``np.gradient`` of a 2-D array with unit spacing (central differences inside, one-sided
    at the edges; the same arithmetic and type), without its general machinery."""
    if min(values.shape) < 2:
        raise ValueError("a side under 2 px has no gradient")  # as np.gradient refuses it
    gy, gx = np.empty_like(values), np.empty_like(values)
    gy[1:-1] = (values[2:] - values[:-2]) / 2.0
    gy[0], gy[-1] = values[1] - values[0], values[-1] - values[-2]
    gx[:, 1:-1] = (values[:, 2:] - values[:, :-2]) / 2.0
    gx[:, 0], gx[:, -1] = values[:, 1] - values[:, 0], values[:, -1] - values[:, -2]
    return gy, gx


_CROSS = np.array([[0, 1, 0], [1, 1, 1], [0, 1, 0]], dtype=bool)  # ndimage.label's default


def _background_share(lightness: np.ndarray) -> float:
    from scipy import ndimage

    gy, gx = _gradient(lightness)
    flat = gx * gx + gy * gy < FLAT_GRADIENT * FLAT_GRADIENT  # |gradient| < FLAT_GRADIENT
    labels, count = ndimage.label(flat, _CROSS)
    if count == 0:
        return 0.0
    sizes = np.bincount(labels.ravel())[1:]
    return float(sizes.max() / lightness.size)


def _thumbnail_size(size: tuple[int, int]) -> tuple[int, int]:
    """The size ``Image.thumbnail((WORK_SIDE, WORK_SIDE))`` gives a picture of ``size`` whose
    longest side is above WORK_SIDE: the aspect kept, each side rounded (down or up) to the
    whole number whose aspect is nearest (Pillow 11-13, ``Image.thumbnail``)."""
    width, height = size
    aspect = width / height
    if aspect <= 1:  # the height is the longest side
        return _nearest_side(WORK_SIDE * aspect, lambda n: abs(aspect - n / WORK_SIDE)), \
            WORK_SIDE
    return WORK_SIDE, _nearest_side(WORK_SIDE / aspect,
                                    lambda n: 0 if n == 0 else abs(aspect - WORK_SIDE / n))


def _nearest_side(number: float, key: Callable[[int], float]) -> int:
    return max(min(math.floor(number), math.ceil(number), key=key), 1)


def _work_picture(image: Image.Image) -> tuple[np.ndarray, np.ndarray]:
    """The facts' picture: sRGB values (h, w, 3) and grey levels (h, w), uint8, of the
    picture reduced to the size ``Image.thumbnail((WORK_SIDE, WORK_SIDE))`` gives. A
    ``YCbCr`` picture (a JPEG's draft) is reduced in YCbCr and only then converted, and its
    grey is its Y band, the luma ``convert("L")`` computes from RGB (ITU-R BT.601 weights;
    JFIF); any other mode is converted to RGB first."""
    if image.mode not in ("RGB", "YCbCr"):
        image = image.convert("RGB")
    if max(image.size) > WORK_SIDE:  # what Image.thumbnail does, into a new image
        image = image.resize(_thumbnail_size(image.size), Image.Resampling.BOX,
                             reducing_gap=2.0)
    if min(image.size) < 2:  # a line of pixels (a thin banner, or one reduced to a line):
        # repeated to two, so the missing direction has no gradient and no Laplacian, and the
        # shares stay those of the line itself
        image = image.resize((max(image.width, 2), max(image.height, 2)),
                             Image.Resampling.NEAREST)
    if image.mode == "YCbCr":
        return np.asarray(image.convert("RGB")), np.asarray(image)[..., 0]
    return np.asarray(image), np.asarray(image.convert("L"))


def colour_facts(image: Image.Image, *, colours: int = 5) -> ColourFacts:
    """The facts of a small picture (any mode; converted to sRGB, transparency ignored),
    reduced first to at most ``WORK_SIDE`` pixels on its longest side."""
    rgb, grey = _work_picture(image)
    lab = srgb_to_lab(rgb)
    lightness, a, b = lab[..., 0], lab[..., 1], lab[..., 2]
    grey_chroma = np.count_nonzero(a * a + b * b < GREY_CHROMA * GREY_CHROMA)  # C*ab < limit
    brightness, spread = _mean_var(lightness)  # np.mean and np.std's arithmetic
    return ColourFacts(
        colours=_dominant(lab, colours),
        greyscale=bool(grey_chroma >= 0.95 * lightness.size),
        brightness=float(brightness), contrast=float(np.sqrt(spread)),
        colourfulness=_colourfulness(rgb), sharpness=_sharpness(grey),
        background_share=_background_share(lightness))
