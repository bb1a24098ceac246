"""Generated scanner beds as people scan them, with the true box of every item.

Four kinds (an invented Fernhollow Field Society volunteer's scans): ``photos`` (prints on the
white bed), ``paper`` (pale, white-margined paper with a printed centre on the white bed),
``leaves`` (pressed leaves throwing soft drop shadows on the white bed) and ``dark`` (pale and
white-bordered items on a dark backing sheet). Every bed has uneven lighting (a brightness
gradient and a darker corner) and sensor noise; 3-8 items, each rotated up to 4 degrees.

A4 at 300 dpi is 2480 x 3508 pixels (ISO 216: 210 x 297 mm); ``dpi`` scales everything, so tests
use small beds and the bench full-size ones. Needs only numpy and Pillow.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from PIL import Image, ImageDraw, ImageFilter

__all__ = ["BED_KINDS", "Bed", "make_bed"]

BED_KINDS = ("photos", "paper", "leaves", "dark")
A4_MM = (210.0, 297.0)

Box = tuple[int, int, int, int]


@dataclass
class Bed:
    """A generated scan and the true axis-aligned boxes (x, y, w, h) of its items."""

    kind: str
    image: Image.Image
    boxes: list[Box]


def _photo(rng: np.random.Generator, w: int, h: int, border: bool) -> Image.Image:
    """A print: coloured fields and strokes; with ``border`` a white margin around it."""
    base = tuple(int(c) for c in rng.integers(30, 200, 3))
    im = Image.new("RGBA", (w, h), (*base, 255))
    draw = ImageDraw.Draw(im)
    for _ in range(14):
        x0, y0 = int(rng.integers(0, w)), int(rng.integers(0, h))
        x1, y1 = int(rng.integers(0, w)), int(rng.integers(0, h))
        shade = tuple(int(c) for c in rng.integers(10, 230, 3))
        draw.line((x0, y0, x1, y1), fill=(*shade, 255), width=max(2, w // 40))
    if border:
        margin = max(4, min(w, h) // 12)
        framed = Image.new("RGBA", (w, h), (246, 245, 240, 255))
        framed.paste(im.resize((w - 2 * margin, h - 2 * margin)), (margin, margin))
        return framed
    return im


def _paper(rng: np.random.Generator, w: int, h: int) -> Image.Image:
    """Pale, slightly warm paper with a wide near-white margin and a small printed centre."""
    tone = (int(rng.integers(238, 247)), int(rng.integers(232, 240)), int(rng.integers(214, 226)))
    im = Image.new("RGBA", (w, h), (*tone, 255))
    margin_x, margin_y = int(w * rng.uniform(0.18, 0.28)), int(h * rng.uniform(0.18, 0.28))
    centre = _photo(rng, w - 2 * margin_x, h - 2 * margin_y, border=False)
    im.paste(centre, (margin_x, margin_y))
    return im


def _leaf(rng: np.random.Generator, w: int, h: int) -> Image.Image:
    """A pressed leaf: a pointed oval in greens or browns with a darker midrib."""
    im = Image.new("RGBA", (w, h), (0, 0, 0, 0))
    draw = ImageDraw.Draw(im)
    colour = (int(rng.integers(60, 150)), int(rng.integers(90, 170)), int(rng.integers(20, 70)))
    pts = []
    for t in np.linspace(0, 2 * math.pi, 90, endpoint=False):
        r = 1.0 - 0.15 * abs(math.sin(t)) ** 3
        pts.append((w / 2 + (w / 2 - 2) * r * math.cos(t),
                    h / 2 + (h / 2 - 2) * math.sin(t) * (abs(math.cos(t)) ** 0.25 if t else 1)))
    draw.polygon(pts, fill=(*colour, 255))
    dark = tuple(max(0, c - 40) for c in colour)
    draw.line((2, h / 2, w - 2, h / 2), fill=(*dark, 255), width=max(2, h // 40))
    return im


def _place(bed: Image.Image, item: Image.Image, x: int, y: int, angle: float,
           shadow: float, dpi: float) -> Box:
    """Paste ``item`` rotated by ``angle`` at (x, y), darkening the bed down-right by up to
    ``shadow`` (a lid's light) first; return the item's true box."""
    rotated = item.rotate(angle, resample=Image.Resampling.BICUBIC, expand=True)
    alpha = rotated.getchannel("A")
    if shadow:
        off = max(2, round(dpi / 50))
        blur = alpha.filter(ImageFilter.GaussianBlur(max(1.0, dpi / 60)))
        blur = blur.point(lambda a: int(a * shadow))
        region = bed.crop((x + off, y + off, x + off + rotated.width, y + off + rotated.height))
        shade = Image.new("RGB", rotated.size, (0, 0, 0))
        bed.paste(Image.composite(shade, region, blur), (x + off, y + off))
    bed.paste(rotated.convert("RGB"), (x, y), alpha)
    bbox = alpha.point(lambda a: 255 if a > 127 else 0).getbbox()
    if bbox is None:
        raise ValueError("an item without opaque pixels")
    left, top, right, bottom = bbox
    return (x + left, y + top, right - left, bottom - top)


def _lighting(im: Image.Image, rng: np.random.Generator, sigma: float) -> Image.Image:
    """Uneven lighting (a gradient of +-6 % and a corner 8 % darker) and sensor noise."""
    arr = np.asarray(im, dtype=np.float32)
    h, w = arr.shape[:2]
    yy, xx = np.mgrid[0:h, 0:w].astype(np.float32)
    angle = float(rng.uniform(0, 2 * math.pi))
    ramp = ((xx / w - 0.5) * math.cos(angle) + (yy / h - 0.5) * math.sin(angle)) * 0.12
    corner = 0.08 * np.exp(-((xx / w) ** 2 + (yy / h) ** 2) / 0.08)
    gain = (1.0 + ramp - corner)[..., None]
    arr = arr * gain + rng.normal(0, sigma, arr.shape).astype(np.float32)
    return Image.fromarray(arr.clip(0, 255).astype(np.uint8))


def _item_for(kind: str, rng: np.random.Generator, w: int, h: int) -> Image.Image:
    if kind == "photos":
        return _photo(rng, w, h, border=False)
    if kind == "paper":
        return _paper(rng, w, h)
    if kind == "leaves":
        return _leaf(rng, w, h)
    # dark backing: what people put on black felt are pale things, often white-bordered
    return _paper(rng, w, h) if rng.random() < 0.5 else _photo(rng, w, h, border=True)


BED_COLOURS = {"photos": (246, 246, 244), "paper": (247, 247, 246), "leaves": (245, 245, 243),
               "dark": (24, 24, 30)}
SHADOWS = {"photos": 0.06, "paper": 0.05, "leaves": 0.14, "dark": 0.0}


def make_bed(kind: str, seed: int, count: int, *, dpi: float = 300.0,
             max_angle: float = 4.0, noise: float = 4.0) -> Bed:
    """A bed of ``kind`` with ``count`` items (1-9) in a grid, in reading order."""
    if kind not in BED_KINDS:
        raise ValueError(f"kind must be one of {BED_KINDS}, got {kind!r}")
    rng = np.random.default_rng(seed)
    size = (round(A4_MM[0] / 25.4 * dpi), round(A4_MM[1] / 25.4 * dpi))
    bed = Image.new("RGB", size, BED_COLOURS[kind])
    cols = 2 if count <= 4 else 3
    rows = math.ceil(count / cols)
    cell_w, cell_h = size[0] // cols, size[1] // rows
    gap = round(dpi / 10)
    boxes = []
    for i in range(count):
        r, c = divmod(i, cols)
        w = int(rng.integers(int(cell_w * 0.5), int(cell_w * 0.72)))
        h = int(rng.integers(int(cell_h * 0.45), int(cell_h * 0.62)))
        x = c * cell_w + int(rng.integers(gap, max(gap + 1, cell_w - w - 2 * gap)))
        y = r * cell_h + int(rng.integers(gap, max(gap + 1, min(cell_h - h - 2 * gap,
                                                                 gap + h // 4))))
        angle = float(rng.uniform(-max_angle, max_angle))
        boxes.append(_place(bed, _item_for(kind, rng, w, h), x, y, angle, SHADOWS[kind], dpi))
    return Bed(kind, _lighting(bed, rng, noise), boxes)


def iou(a: Box, b: Box) -> float:
    """Intersection over union of two (x, y, w, h) boxes."""
    ix = max(0, min(a[0] + a[2], b[0] + b[2]) - max(a[0], b[0]))
    iy = max(0, min(a[1] + a[3], b[1] + b[3]) - max(a[1], b[1]))
    inter = ix * iy
    return inter / (a[2] * a[3] + b[2] * b[3] - inter)
