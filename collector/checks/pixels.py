"""Any pixel format Pillow opens, made into one greyscale picture for comparing by look.

Pillow's modes (Pillow handbook, "Concepts: Modes"): ``1``, ``L``, ``P``, ``RGB``, ``RGBA``,
``CMYK``, ``YCbCr``, ``LAB``, ``HSV``, ``I`` (32-bit signed), ``F`` (32-bit float), ``LA``,
``PA``, ``RGBa``/``La`` (premultiplied), ``I;16``/``I;16B``/``I;16L``/``I;16N`` (16-bit).
``Image.convert("L")`` is right for the 8-bit colour modes, but it clips the others: a 16-bit
value of 40,000 becomes 255, so every 16-bit picture used to turn (nearly) white and hash like a
blank page. Here:

- 8-bit modes without transparency: ``convert("L")`` exactly as before (ITU-R 601-2 luma,
  Pillow handbook ``Image.convert``), so the pHash of an 8-bit RGB image stays imagehash's bits;
- transparency (an alpha band, or a palette/``transparency`` entry): composited onto white
  first, so the picture compared is the one a viewer shows on a page (common practice, no
  source); a fully opaque alpha band changes nothing;
- ``LAB``: its ``L`` band (lightness, 0..255 in Pillow);
- 16-bit, ``I`` and ``F``: scaled to 0..255 by the full range of their type (16-bit: 0..65535;
  ``F``: 0..1), or by the image's own range where values fall outside it; kept as floats (mode
  ``F``) so nothing is quantised before the hash;
- several frames: the first (Pillow opens a file on frame 0; the count is a recorded fact).

A picture whose grey levels hardly vary is ``blank``: it has no shape to compare, so it never
counts as a copy of anything (:func:`is_blank`).
"""

from __future__ import annotations

import numpy as np
from PIL import Image

__all__ = ["BLANK_SPREAD", "colour_ready", "has_transparency", "hash_ready", "is_blank"]

_EIGHT_BIT = frozenset({"1", "L", "P", "RGB", "RGBX", "CMYK", "YCbCr", "HSV"})
_WHITE = 255
# Below this spread of grey levels (0..255 scale, max - min of a 16x16 box-averaged thumbnail,
# so JPEG noise and the dither of a flat colour saved as 1-bit or palette are averaged away) a
# picture is blank: a flat fill, a blank page, a white scan bed. Common practice, no source:
# 3 levels is under what a viewer can tell apart on screen.
BLANK_SPREAD = 3.0


def has_transparency(im: Image.Image) -> bool:
    """Whether the image has an alpha band or a transparent palette/colour entry."""
    return im.mode in ("RGBA", "LA", "PA", "RGBa", "La") or "transparency" in im.info


def _flatten_on_white(im: Image.Image) -> Image.Image:
    """Transparent pixels shown on white, then greyscale (L)."""
    rgba = im.convert("RGBA")
    page = Image.new("RGBA", rgba.size, (_WHITE, _WHITE, _WHITE, 255))
    return Image.alpha_composite(page, rgba).convert("L")


def _scaled_float(im: Image.Image) -> Image.Image:
    """A 16-bit, ``I`` or ``F`` image scaled to 0..255 by its type's full range (mode F)."""
    values = np.asarray(im, dtype=np.float64)
    if values.size == 0:
        return Image.new("F", im.size, 0.0)
    lo, hi = float(np.nanmin(values)), float(np.nanmax(values))
    if im.mode == "F":
        nominal = (0.0, 1.0)
    elif im.mode == "I" and hi <= 255:  # 8-bit data in a 32-bit container (fromarray)
        nominal = (0.0, 255.0)
    else:  # I;16*, and I holding 16-bit data (PNG and TIFF readers give either)
        nominal = (0.0, 65535.0)
    lo, hi = min(lo, nominal[0]), max(hi, nominal[1])  # outside the type's range: its own
    scaled = (np.nan_to_num(values, nan=lo) - lo) * (255.0 / (hi - lo))
    return Image.fromarray(scaled.astype(np.float32), "F")


def hash_ready(im: Image.Image) -> Image.Image:
    """The greyscale picture to hash and compare: mode ``L``, or ``F`` on a 0..255 scale."""
    mode = im.mode
    if mode in _EIGHT_BIT and not has_transparency(im):
        return im.convert("L")
    if has_transparency(im):
        return _flatten_on_white(im)
    if mode == "LAB":
        return im.getchannel("L")
    if mode.startswith("I;16") or mode in ("I", "F"):
        return _scaled_float(im)
    return im.convert("RGB").convert("L")  # any other mode Pillow can turn into RGB


_REDUCIBLE = frozenset({"L", "LA", "RGB", "RGBA", "RGBX", "CMYK"})


def colour_ready(im: Image.Image, side: int) -> Image.Image:
    """A small sRGB picture (mode ``RGB``, longest side about ``side`` px or a little more)
    for colour facts, made by the same rules as :func:`hash_ready`: transparency shown on
    white, 16-bit/``I``/``F`` scaled by their full range (grey), ``LAB`` by its lightness (grey:
    Pillow has no LAB-to-RGB conversion without a colour profile). Reduced by a whole factor
    first (``Image.reduce``, a box filter) where the mode allows, so a large picture is
    never converted at full size."""
    factor = max(1, max(im.size) // side)
    if im.mode in _REDUCIBLE and factor > 1:
        im = im.reduce(factor)
    if has_transparency(im):
        rgba = im.convert("RGBA")
        page = Image.new("RGBA", rgba.size, (_WHITE, _WHITE, _WHITE, 255))
        return Image.alpha_composite(page, rgba).convert("RGB")
    if im.mode in _EIGHT_BIT:
        return im.convert("RGB")
    if im.mode == "LAB" or im.mode.startswith("I;16") or im.mode in ("I", "F"):
        return hash_ready(im).convert("L").convert("RGB")
    return im.convert("RGB")


def is_blank(grey: Image.Image) -> bool:
    """Whether a :func:`hash_ready` picture is flat (see BLANK_SPREAD)."""
    small = np.asarray(grey.resize((16, 16), Image.Resampling.BOX))
    if small.size == 0:
        return True
    if small.dtype == np.uint8:  # whole grey levels: their spread is exact as it is
        return int(small.max()) - int(small.min()) < BLANK_SPREAD
    small = small.astype(np.float64)
    return float(small.max() - small.min()) < BLANK_SPREAD
