"""Colour and tone facts of one picture, for curation: computed once, on a small image.

Every fact is computed from the small (draft-size) picture the hash is made from, never from a
second full decode, and sampled down to at most ``MAX_SAMPLES`` pixels where a fact only needs
a distribution. Sources of each formula:

- sRGB to CIELAB: IEC 61966-2-1:1999 (the sRGB transfer function and its RGB-to-XYZ matrix,
  D65 white) and CIE 15:2004 (CIELAB from XYZ, with the reference white D65 X=0.95047,
  Y=1.0, Z=1.08883). Worked values: sRGB white -> L*=100, a*=b*=0; sRGB red (255, 0, 0) ->
  L*=53.24, a*=80.09, b*=67.20 (the values published with these formulas, from memory).
- Dominant colours: k-means (scipy.cluster.vq.kmeans2, k-means++ start, a fixed seed) on a
  sample of the CIELAB values; every pixel is then given to its nearest centre
  (scipy.cluster.vq.vq) for the shares; each cluster with its sRGB colour and HSV hue in
  degrees (Python's colorsys).
- Chroma C*ab = sqrt(a*^2 + b*^2) (CIE 15:2004); a picture is ``greyscale`` when 95 % of its
  pixels have C*ab below ``GREY_CHROMA`` (common practice, no source).
- Brightness: mean L*; contrast: the standard deviation of L* (RMS contrast on L*).
- Colourfulness: Hasler and Süsstrunk, "Measuring colourfulness in natural images", Proc.
  SPIE 5007, 2003: rg = R - G, yb = (R + G)/2 - B, M = sqrt(sd_rg^2 + sd_yb^2) + 0.3 *
  sqrt(mean_rg^2 + mean_yb^2) on 0-255 values; their scale: 0 not colourful, ~15 slightly,
  ~33 moderately, ~45 averagely, ~59 quite, ~82 highly, ~109 extremely colourful.
- Sharpness: the variance of the Laplacian of the grey image (common practice, no source),
  on the picture reduced to ``WORK_SIDE`` px: it tells a blurred or empty picture from a
  detailed one, not fine focus.
- Background share: the share of the picture covered by its largest connected region of
  near-flat pixels (L* gradient below ``FLAT_GRADIENT``; common practice, no source) - a
  "mostly empty" scan scores near 1.
"""

from __future__ import annotations

import colorsys
from dataclasses import asdict, dataclass
from typing import Any

import numpy as np
from PIL import Image

__all__ = ["ColourFacts", "DominantColour", "colour_facts", "srgb_to_lab"]

MAX_SAMPLES = 1024  # pixels sampled for k-means (a distribution, not every pixel)
WORK_SIDE = 96  # the facts are computed on a picture this small (longest side, px)
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

    def as_json(self) -> dict[str, Any]:
        """Plain data for the ledger (rounded: these are estimates)."""
        out = asdict(self)
        out["colours"] = [{"lab": [round(v, 2) for v in c.lab], "share": round(c.share, 4),
                           "hex": c.hex, "hue": round(c.hue, 1)} for c in self.colours]
        for key in ("brightness", "contrast", "colourfulness", "sharpness", "background_share"):
            out[key] = round(float(out[key]), 4)
        return out


def _linear(c: np.ndarray) -> np.ndarray:
    """The sRGB transfer function undone (IEC 61966-2-1:1999), values 0-1."""
    return np.where(c <= 0.04045, c / 12.92, ((c + 0.055) / 1.055) ** 2.4)


_LINEAR_8BIT = _linear(np.arange(256) / 255.0)  # exact for 8-bit input, looked up


def srgb_to_lab(rgb: np.ndarray) -> np.ndarray:
    """CIELAB (D65) of sRGB values in 0-255, shape (..., 3) -> (..., 3)."""
    values = np.asarray(rgb)
    linear = (_LINEAR_8BIT[values] if values.dtype == np.uint8
              else _linear(values.astype(np.float64) / 255.0))
    xyz = linear @ _RGB_TO_XYZ.T / _WHITE
    eps, kappa = 216 / 24389, 24389 / 27  # CIE 15:2004 exact ratios
    f = np.where(xyz > eps, np.cbrt(xyz), (kappa * xyz + 16) / 116)
    return np.stack([116 * f[..., 1] - 16, 500 * (f[..., 0] - f[..., 1]),
                     200 * (f[..., 1] - f[..., 2])], axis=-1)


def _lab_to_hex(lab: np.ndarray) -> str:
    """The sRGB colour of one CIELAB value (inverse of srgb_to_lab, clipped to the gamut)."""
    fy = (lab[0] + 16) / 116
    f = np.array([fy + lab[1] / 500, fy, fy - lab[2] / 200])
    eps, kappa = 216 / 24389, 24389 / 27
    xyz = np.where(f ** 3 > eps, f ** 3, (116 * f - 16) / kappa) * _WHITE
    linear = np.linalg.solve(_RGB_TO_XYZ, xyz).clip(0, 1)
    c = np.where(linear <= 0.0031308, 12.92 * linear, 1.055 * linear ** (1 / 2.4) - 0.055)
    r, g, b = (round(float(v) * 255) for v in c.clip(0, 1))
    return f"#{r:02x}{g:02x}{b:02x}"


def _dominant(lab: np.ndarray, k: int) -> tuple[DominantColour, ...]:
    from scipy.cluster.vq import kmeans2, vq  # imported when facts are computed (ingest)

    every = lab.reshape(-1, 3)
    pixels = every
    if len(pixels) > MAX_SAMPLES:
        pick = np.random.default_rng(0).choice(len(pixels), MAX_SAMPLES, replace=False)
        pixels = pixels[pick]
    q = np.round(pixels).astype(np.int64) + 256  # whole CIELAB units, all positive
    distinct = np.unique((q[:, 0] << 20) | (q[:, 1] << 10) | q[:, 2]).size
    k = max(1, min(k, distinct))  # never more clusters than distinct colours
    centres, _ = kmeans2(pixels, k, minit="++", seed=0)
    labels, _ = vq(every, centres)  # shares over every pixel, not just the sample
    counts = np.bincount(labels, minlength=k)
    out = []
    for i in np.argsort(-counts):
        if counts[i] == 0:
            continue
        hex_colour = _lab_to_hex(centres[i])
        rgb = [int(hex_colour[j:j + 2], 16) / 255 for j in (1, 3, 5)]
        hue = colorsys.rgb_to_hsv(*rgb)[0] * 360
        out.append(DominantColour(tuple(float(v) for v in centres[i]),  # type: ignore[arg-type]
                                  float(counts[i] / counts.sum()), hex_colour, hue))
    return tuple(out)


def _colourfulness(rgb: np.ndarray) -> float:
    r, g, b = (rgb[..., i].astype(np.float64) for i in range(3))
    rg, yb = r - g, 0.5 * (r + g) - b
    return float(np.hypot(rg.std(), yb.std()) + 0.3 * np.hypot(rg.mean(), yb.mean()))


def _sharpness(grey: np.ndarray) -> float:
    from scipy import ndimage

    return float(ndimage.laplace(grey.astype(np.float64)).var())


def _background_share(lightness: np.ndarray) -> float:
    from scipy import ndimage

    gy, gx = np.gradient(lightness)
    flat = np.hypot(gx, gy) < FLAT_GRADIENT
    labels, count = ndimage.label(flat)
    if count == 0:
        return 0.0
    sizes = np.bincount(labels.ravel())[1:]
    return float(sizes.max() / lightness.size)


def colour_facts(image: Image.Image, *, colours: int = 5) -> ColourFacts:
    """The facts of a small picture (any mode; converted to sRGB, transparency ignored),
    reduced first to at most ``WORK_SIDE`` pixels on its longest side."""
    image = image.convert("RGB")
    if max(image.size) > WORK_SIDE:
        image = image.copy()
        image.thumbnail((WORK_SIDE, WORK_SIDE), Image.Resampling.BOX)
    rgb = np.asarray(image)
    lab = srgb_to_lab(rgb)
    chroma = np.hypot(lab[..., 1], lab[..., 2])
    grey = np.asarray(image.convert("L"))
    return ColourFacts(
        colours=_dominant(lab, colours),
        greyscale=bool(np.percentile(chroma, 95) < GREY_CHROMA),
        brightness=float(lab[..., 0].mean()), contrast=float(lab[..., 0].std()),
        colourfulness=_colourfulness(rgb), sharpness=_sharpness(grey),
        background_share=_background_share(lab[..., 0]))
