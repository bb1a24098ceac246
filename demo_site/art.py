"""Generated pictures for the fictional Fernhollow Field Society archive.

Everything here is drawn from a seed: gradients, soft blobs and a motif (leaf, feather,
stone, beetle, lichen). The large-scale layout is random per seed so that unrelated
pictures get unrelated perceptual hashes; scanner-bed pages are composed from small
textured cards, stamps and leaves with shadows, rotation and sensor noise.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from PIL import Image, ImageDraw, ImageFilter

MOTIFS = ("leaf", "feather", "stone", "beetle", "lichen")


def _rng(seed: int) -> np.random.Generator:
    return np.random.default_rng(seed)


def _colour(rng: np.random.Generator, lo: int = 20, hi: int = 235) -> tuple[int, int, int]:
    r, g, b = rng.integers(lo, hi, 3)
    return int(r), int(g), int(b)


def _rotate(points: list[tuple[float, float]], angle: float, cx: float, cy: float
            ) -> list[tuple[float, float]]:
    c, s = math.cos(angle), math.sin(angle)
    return [(cx + x * c - y * s, cy + x * s + y * c) for x, y in points]


def _background(rng: np.random.Generator, width: int, height: int) -> np.ndarray:
    """A linear gradient at a random angle, five soft blobs and a slow wave.

    Computed on a grid four times coarser and scaled up: the field is smooth, and this
    keeps generation of the whole archive well inside its time budget.
    """
    small_w, small_h = max(2, width // 4), max(2, height // 4)
    small = _smooth_field(rng, small_w, small_h)
    im = Image.fromarray(np.clip(small, 0, 255).astype(np.uint8), "RGB")
    return np.asarray(im.resize((width, height), Image.Resampling.BILINEAR), dtype=np.float32)


def _smooth_field(rng: np.random.Generator, width: int, height: int) -> np.ndarray:
    yy, xx = np.mgrid[0:height, 0:width].astype(np.float32)
    angle = rng.uniform(0, 2 * math.pi)
    t = xx * math.cos(angle) + yy * math.sin(angle)
    t = (t - t.min()) / max(float(np.ptp(t)), 1.0)
    c0 = np.array(_colour(rng), dtype=np.float32)
    c1 = np.array(_colour(rng), dtype=np.float32)
    img = c0 + (c1 - c0) * t[..., None]
    for _ in range(5):
        cx, cy = rng.uniform(0, width), rng.uniform(0, height)
        sigma = rng.uniform(0.1, 0.3) * max(width, height)
        amp = rng.uniform(60, 130) * rng.choice((-1.0, 1.0))
        blob = np.exp(-((xx - cx) ** 2 + (yy - cy) ** 2) / (2 * sigma * sigma))
        tint = rng.uniform(0.5, 1.0, 3).astype(np.float32)
        img += amp * blob[..., None] * tint
    # a low-frequency wave (1-3 cycles across): spreads the perceptual hashes apart
    fx, fy = rng.uniform(0.5, 3.0, 2) * 2 * math.pi
    wave = np.cos(fx * xx / width + fy * yy / height + rng.uniform(0, 2 * math.pi))
    img += (rng.uniform(25, 50) * wave)[..., None]
    return img


def _leaf(draw: ImageDraw.ImageDraw, rng: np.random.Generator, w: int, h: int, *,
          veins: bool = True) -> None:
    length = rng.uniform(0.45, 0.8) * min(w, h)
    half = length * rng.uniform(0.18, 0.35)
    ang = rng.uniform(0, 2 * math.pi)
    cx, cy = rng.uniform(0.3, 0.7) * w, rng.uniform(0.3, 0.7) * h
    n = 24
    top = [(length * (i / n - 0.5), -half * math.sin(math.pi * i / n)) for i in range(n + 1)]
    bottom = [(x, -y) for x, y in reversed(top)]
    colour = (int(rng.integers(30, 120)), int(rng.integers(100, 200)), int(rng.integers(20, 90)))
    draw.polygon(_rotate(top + bottom, ang, cx, cy), fill=colour)
    if not veins:
        return  # the veins draw no random numbers, so the generator ends in the same state
    vein = tuple(min(255, c + 70) for c in colour)
    draw.line(_rotate([(-length / 2, 0), (length / 2, 0)], ang, cx, cy), fill=vein, width=3)
    for i in range(1, 7):
        x = length * (i / 7 - 0.5)
        span = half * math.sin(math.pi * i / 7) * 0.9
        for sign in (-1, 1):
            pts = _rotate([(x, 0), (x + span * 0.6, sign * span)], ang, cx, cy)
            draw.line(pts, fill=vein, width=2)


def _feather(draw: ImageDraw.ImageDraw, rng: np.random.Generator, w: int, h: int) -> None:
    length = rng.uniform(0.55, 0.9) * min(w, h)
    ang = rng.uniform(0, 2 * math.pi)
    cx, cy = rng.uniform(0.35, 0.65) * w, rng.uniform(0.35, 0.65) * h
    colour = _colour(rng, 40, 220)
    for i in range(60):
        x = length * (i / 60 - 0.5)
        span = length * 0.16 * math.sin(math.pi * (i + 3) / 66)
        for sign in (-1, 1):
            pts = _rotate([(x, 0), (x + span * 0.8, sign * span)], ang, cx, cy)
            draw.line(pts, fill=colour, width=2)
    draw.line(_rotate([(-length / 2 - 20, 0), (length / 2, 0)], ang, cx, cy),
              fill=(235, 230, 215), width=3)


def _stone(draw: ImageDraw.ImageDraw, rng: np.random.Generator, w: int, h: int) -> None:
    r = rng.uniform(0.2, 0.38) * min(w, h)
    cx, cy = rng.uniform(0.3, 0.7) * w, rng.uniform(0.3, 0.7) * h
    n = 40
    radii = r * (1 + 0.15 * np.sin(np.arange(n) * 2 * math.pi / n * rng.integers(2, 5)
                                   + rng.uniform(0, 6)))
    pts = [(cx + radii[i] * math.cos(2 * math.pi * i / n),
            cy + 0.75 * radii[i] * math.sin(2 * math.pi * i / n)) for i in range(n)]
    grey = int(rng.integers(70, 190))
    draw.polygon(pts, fill=(grey, grey - 10, max(0, grey - 25)))
    for _ in range(70):
        a, d = rng.uniform(0, 2 * math.pi), rng.uniform(0, 0.9) * r
        x, y = cx + d * math.cos(a), cy + 0.7 * d * math.sin(a)
        s = rng.uniform(1, 4)
        draw.ellipse((x - s, y - s, x + s, y + s), fill=_colour(rng, 60, 230))


def _beetle(draw: ImageDraw.ImageDraw, rng: np.random.Generator, w: int, h: int) -> None:
    bl = rng.uniform(0.3, 0.5) * min(w, h)
    bw = bl * rng.uniform(0.5, 0.7)
    cx, cy = rng.uniform(0.35, 0.65) * w, rng.uniform(0.35, 0.65) * h
    shell = _colour(rng, 10, 160)
    for i in range(3):
        y = cy - bl / 2 + i * bl / 3 + bl / 6
        for sign in (-1, 1):
            draw.line([(cx, y), (cx + sign * bw, y + rng.uniform(-20, 30))],
                      fill=(20, 20, 20), width=3)
    draw.ellipse((cx - bw / 2, cy - bl / 2, cx + bw / 2, cy + bl / 2), fill=shell)
    head = bw * 0.3
    draw.ellipse((cx - head, cy - bl / 2 - head * 1.5, cx + head, cy - bl / 2 + head * 0.3),
                 fill=(25, 25, 25))
    draw.line([(cx, cy - bl / 2 + 5), (cx, cy + bl / 2)], fill=(15, 15, 15), width=2)
    for _ in range(int(rng.integers(2, 6))):
        x, y = cx + rng.uniform(-0.3, 0.3) * bw, cy + rng.uniform(-0.3, 0.35) * bl
        s = rng.uniform(4, 10)
        draw.ellipse((x - s, y - s, x + s, y + s), fill=_colour(rng, 150, 255))


def _lichen(draw: ImageDraw.ImageDraw, rng: np.random.Generator, w: int, h: int) -> None:
    for _ in range(int(rng.integers(3, 6))):
        cx, cy = rng.uniform(0.15, 0.85) * w, rng.uniform(0.15, 0.85) * h
        spread = rng.uniform(0.06, 0.16) * min(w, h)
        colour = (int(rng.integers(150, 230)), int(rng.integers(170, 240)),
                  int(rng.integers(60, 150)))
        for _ in range(40):
            x, y = cx + rng.normal(0, spread), cy + rng.normal(0, spread)
            s = rng.uniform(3, 12)
            draw.ellipse((x - s, y - s, x + s, y + s), fill=colour,
                         outline=(90, 100, 50))


_MOTIF_DRAW = {"leaf": _leaf, "feather": _feather, "stone": _stone, "beetle": _beetle,
               "lichen": _lichen}


def specimen(seed: int, width: int, height: int, motif: str | None = None) -> Image.Image:
    """Draw one RGB specimen picture; the same seed and size always give the same pixels."""
    rng = _rng(seed)
    motif = motif or MOTIFS[int(rng.integers(0, len(MOTIFS)))]
    arr = _background(rng, width, height)
    im = Image.fromarray(np.clip(arr, 0, 255).astype(np.uint8), "RGB")
    draw = ImageDraw.Draw(im)
    _MOTIF_DRAW[motif](draw, rng, width, height)
    noise = rng.standard_normal((height, width, 3), dtype=np.float32) * 3.0
    out = np.clip(np.asarray(im, dtype=np.float32) + noise, 0, 255).astype(np.uint8)
    return Image.fromarray(out, "RGB")


def noise_picture(seed: int, width: int, height: int) -> Image.Image:
    """Uniform random pixels: compresses badly, so it makes a large file cheaply."""
    rng = _rng(seed)
    return Image.fromarray(rng.integers(0, 256, (height, width, 3), dtype=np.uint8), "RGB")


# --- scanner beds ---------------------------------------------------------------------

@dataclass(frozen=True)
class PlacedItem:
    """One object on a scanner bed with its ground-truth box (x, y, w, h) in the scan."""

    kind: str
    box: tuple[int, int, int, int]
    angle: float


def _scan_object(rng: np.random.Generator, kind: str, w: int, h: int) -> Image.Image:
    """An RGBA card, stamp or leaf with its own texture (so crops hash apart)."""
    im = Image.new("RGBA", (w, h), (0, 0, 0, 0))
    if kind == "leaf":
        body = Image.new("RGB", (w, h), (0, 0, 0))
        blade = Image.new("RGB", (w, h), (0, 0, 0))
        state = rng.bit_generator.state
        _leaf(ImageDraw.Draw(body), rng, w, h)
        rng.bit_generator.state = state
        _leaf(ImageDraw.Draw(blade), rng, w, h, veins=False)
        # The mask is the blade alone: vein tips poking past its edge would be thin specks on
        # the scan that no item-finder should count, and would widen the ground-truth box.
        mask = Image.fromarray((np.asarray(blade).max(axis=2) > 0).astype(np.uint8) * 255, "L")
        im.paste(body, (0, 0), mask)
        return im
    base = _background(rng, w, h)
    yy, xx = np.mgrid[0:h, 0:w].astype(np.float32)
    angle = rng.uniform(0, math.pi)
    period = rng.uniform(12, 60)
    stripes = np.sin((xx * math.cos(angle) + yy * math.sin(angle)) * 2 * math.pi / period)
    base += (stripes * rng.uniform(10, 40))[..., None]
    rgb = Image.fromarray(np.clip(base, 0, 255).astype(np.uint8), "RGB")
    d = ImageDraw.Draw(rgb)
    border = int(rng.integers(4, 12))
    d.rectangle((0, 0, w - 1, h - 1), outline=_colour(rng, 0, 120), width=border)
    if kind == "stamp":
        d.ellipse((w * 0.25, h * 0.25, w * 0.75, h * 0.75), outline=_colour(rng), width=5)
    mask = Image.new("L", (w, h), 255)
    if kind == "stamp":
        md = ImageDraw.Draw(mask)
        step = 14
        for x in range(0, w, step):
            md.ellipse((x - 4, -4, x + 4, 4), fill=0)
            md.ellipse((x - 4, h - 5, x + 4, h + 3), fill=0)
        for y in range(0, h, step):
            md.ellipse((-4, y - 4, 4, y + 4), fill=0)
            md.ellipse((w - 5, y - 4, w + 3, y + 4), fill=0)
    im.paste(rgb, (0, 0), mask)
    return im


def scan_bed(seed: int, n_items: int, *, width: int = 1100, height: int = 1500,
             touching: bool = False) -> tuple[Image.Image, list[PlacedItem]]:
    """Compose a scanner-bed page: near-white ground, items rotated ±5°, shadows, noise.

    With ``touching`` the first two items are placed so that their outlines meet.
    Returns the page (RGB) and the ground-truth placements.
    """
    rng = _rng(seed)
    ys, xs = np.mgrid[0:height, 0:width].astype(np.float32)
    # slight vignetting: the lid light falls off toward the edges
    ground = 248 - 6 * (((xs / width - 0.5) ** 2 + (ys / height - 0.5) ** 2) * 2)
    page = Image.fromarray(np.repeat(ground[..., None], 3, axis=2).astype(np.uint8), "RGB")
    cols, rows = 3, 3
    cell_w, cell_h = width // cols, height // rows
    cells = [(c, r) for r in range(rows) for c in range(cols)]
    order = rng.permutation(len(cells))[:n_items]
    if touching:
        order = np.array([0, 1, *[i for i in order if i not in (0, 1)]][:n_items])
    kinds = ("card", "stamp", "leaf")
    placed: list[PlacedItem] = []
    prev_right = None
    for slot, idx in enumerate(order):
        c, r = cells[int(idx)]
        kind = kinds[int(rng.integers(0, 3))] if not (touching and slot < 2) else "card"
        w = int(rng.uniform(0.5, 0.72) * cell_w)
        h = int(rng.uniform(0.45, 0.7) * cell_h)
        obj = _scan_object(rng, kind, w, h)
        angle = float(rng.uniform(-5, 5))
        rot = obj.rotate(angle, resample=Image.Resampling.BICUBIC, expand=True)
        alpha = rot.getchannel("A")
        bbox = alpha.point(lambda v: 255 if v > 40 else 0).getbbox()
        if bbox is None:
            continue
        x = c * cell_w + int(rng.integers(20, max(21, cell_w - rot.width - 20)))
        y = r * cell_h + int(rng.integers(20, max(21, cell_h - rot.height - 20)))
        if touching and slot == 0:
            y = r * cell_h + 20  # leaves room below for the taller of the touching pair
        if touching and slot == 1 and prev_right is not None:
            # put the second card flush against the first one's right edge, same row
            first = placed[0].box
            x = prev_right - bbox[0] - 1
            y = first[1] - bbox[1] + 10
        shadow = Image.new("RGBA", rot.size, (0, 0, 0, 0))
        shadow.putalpha(alpha.point(lambda v: v * 0.35).filter(ImageFilter.GaussianBlur(5)))
        page.paste(shadow, (x + 5, y + 6), shadow)
        page.paste(rot, (x, y), rot)
        box = (x + bbox[0], y + bbox[1], bbox[2] - bbox[0], bbox[3] - bbox[1])
        placed.append(PlacedItem(kind=kind, box=box, angle=round(angle, 3)))
        if touching and slot == 0:
            prev_right = x + bbox[2]
    noise = rng.standard_normal((height, width, 3), dtype=np.float32) * 2.0
    out = np.clip(np.asarray(page, dtype=np.float32) + noise, 0, 255).astype(np.uint8)
    return Image.fromarray(out, "RGB"), placed
