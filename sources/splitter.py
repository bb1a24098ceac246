"""Scanner-bed splitting: find the separate items on a scan and crop each one.

The bed is detected first (``detect_bed``: the colour of the scan's outer frame, light or dark;
or the recipe states it): on a light bed items are darker than the bed, on a dark backing sheet
lighter; on either, pixels whose colour differs from the bed's (after smoothing away sensor
noise, whatever the lighting) count as item too, which finds pale paper and white margins that
brightness alone misses, while neutral drop shadows do not count.

Pure computation on numpy arrays and Pillow images (no file I/O): Otsu threshold, morphology and
connected components with scipy.ndimage, convex hull with scipy.spatial, a minimum-area
rectangle by rotating calipers for deskewing. Big scans are analysed on a downscaled copy and the
boxes mapped back, so memory stays bounded.

scipy is imported by the functions that use it, so importing this module (the registry of
source kinds imports every module of the package) stays cheap for recipes that never split.
"""

from __future__ import annotations

import io
import math
from dataclasses import dataclass

import numpy as np
from PIL import Image, ImageFilter

DEFAULT_MIN_AREA = 2000  # px in the full-size scan (common practice, no source)
DEFAULT_MIN_SOLIDITY = 0.85  # below this a component is probably several touching items
DEFAULT_MIN_CONTRAST = 25.0  # grey levels between the two Otsu classes; less = blank bed
DEFAULT_MAX_SIDE = 2000  # px; larger scans are analysed on a reduced copy
AREA_OUTLIER = 1.5  # x the median item area, with >= 3 items: probably two items merged
MIN_DESKEW_DEGREES = 0.3
MIN_CHROMA = 6.0  # smoothed colour difference from the bed, in RGB levels (common practice)
SMOOTH = 5  # px box filter on the analysed copy before colour differences (noise / 5)
FRAME = 0.02  # the outer frame, as a share of the shorter side, read as the bed's colour
LUMA = np.array([0.299, 0.587, 0.114], dtype=np.float32)  # ITU-R BT.601 weights, as Pillow's L


@dataclass(frozen=True)
class SplitItem:
    """One item found on a scan, in full-size scan pixel coordinates."""

    box: tuple[int, int, int, int]  # x, y, w, h (tight, without padding)
    angle: float  # degrees; rotating the crop by this (Pillow, counter-clockwise) levels it
    rect_size: tuple[float, float]  # width, height of the minimum-area rectangle
    rect_center: tuple[float, float]  # its centre x, y
    area: int  # px of the filled component
    solidity: float  # area / convex hull area
    touching: bool  # probably several items touching each other


@dataclass(frozen=True)
class SplitResult:
    """Outcome of analysing one scan."""

    items: list[SplitItem]
    threshold: int  # grey level; pixels at or below it count as items
    contrast: float  # distance between the Otsu class means
    scale: int  # reduction factor used for the analysis
    blank: bool
    background: str = "light"  # "light #rrggbb" / "dark #rrggbb": the bed as detected or stated
    sure: bool = True  # False: the bed's frame did not agree; state it in the recipe


def otsu_threshold(hist: np.ndarray) -> tuple[int, float]:
    """Otsu's threshold for a 256-bin histogram and the distance between the two class means.

    Otsu, N. (1979), "A threshold selection method from gray-level histograms", IEEE Trans. SMC
    9(1): maximise the between-class variance w0*w1*(mu0-mu1)^2 (from memory).
    """
    p = hist.astype(np.float64) / max(1.0, float(hist.sum()))
    levels = np.arange(p.size, dtype=np.float64)
    omega = np.cumsum(p)
    mu = np.cumsum(p * levels)
    mu_t = mu[-1]
    denom = omega * (1.0 - omega)
    with np.errstate(divide="ignore", invalid="ignore"):
        between = np.where(denom > 0, (mu_t * omega - mu) ** 2 / denom, 0.0)
    t = int(np.argmax(between))
    if omega[t] <= 0 or omega[t] >= 1:
        return t, 0.0
    mu0 = mu[t] / omega[t]
    mu1 = (mu_t - mu[t]) / (1.0 - omega[t])
    return t, float(mu1 - mu0)


def min_area_rect(points: np.ndarray) -> tuple[float, float, float, tuple[float, float]]:
    """Minimum-area enclosing rectangle of 2-D points (x, y) by rotating calipers over the hull.

    Returns (angle in degrees within (-45, 45], width along that angle, height, centre). The
    minimal rectangle has a side collinear with a hull edge (Freeman & Shapira 1975, from memory).
    """
    from scipy.spatial import ConvexHull, QhullError
    try:
        hull = points[ConvexHull(points).vertices]
    except (QhullError, ValueError):
        hull = points
    best: tuple[float, float, float, tuple[float, float]] | None = None
    best_area = math.inf
    edges = np.roll(hull, -1, axis=0) - hull
    for theta in np.unique(np.arctan2(edges[:, 1], edges[:, 0]) % (math.pi / 2)):
        c, s = math.cos(theta), math.sin(theta)
        u = hull[:, 0] * c + hull[:, 1] * s  # along the edge
        v = -hull[:, 0] * s + hull[:, 1] * c  # across it
        w, h = float(u.max() - u.min()), float(v.max() - v.min())
        if w * h < best_area:
            best_area = w * h
            cu, cv = (u.max() + u.min()) / 2, (v.max() + v.min()) / 2
            center = (float(cu * c - cv * s), float(cu * s + cv * c))
            best = (math.degrees(theta), w, h, center)
    assert best is not None
    angle, w, h, center = best
    if angle > 45.0:  # a 90-degree turn of the same rectangle, with sides swapped
        angle, w, h = angle - 90.0, h, w
    return angle, w, h, center


def _pixel_corners(mask: np.ndarray) -> np.ndarray:
    """Corner points of the boundary pixels of a boolean mask, as (x, y) floats."""
    from scipy import ndimage
    edge = mask & ~ndimage.binary_erosion(mask)
    ys, xs = np.nonzero(edge)
    pts = np.concatenate([
        np.stack([xs, ys], 1), np.stack([xs + 1, ys], 1),
        np.stack([xs, ys + 1], 1), np.stack([xs + 1, ys + 1], 1),
    ]).astype(np.float64)
    return np.unique(pts, axis=0)


def chroma_threshold(chroma: np.ndarray, background: np.ndarray) -> float:
    """Colour difference above which a pixel is item, not bed: 6 x the lower quartile of the
    differences where brightness found no item (pale items there may be half of them, so a
    low percentile measures the noise), at least MIN_CHROMA. For a Rayleigh-distributed noise
    magnitude the lower quartile is 0.76 sigma, so this is about 4.5 sigma (common practice,
    no source)."""
    sample = chroma[background]
    if sample.size > 200_000:  # a strided sample is plenty for a percentile
        sample = sample[:: sample.size // 200_000]
    noise = float(np.percentile(sample, 25)) if sample.size else 0.0
    return max(MIN_CHROMA, 6.0 * noise)


@dataclass(frozen=True)
class BedGuess:
    """The scanner bed: its colour (at the frame's lighting), light or dark, and whether the
    four sides of the scan's frame agreed on it."""

    colour: tuple[int, int, int]
    dark: bool
    sure: bool
    sides: tuple[tuple[int, int, int], ...] = ()

    def describe(self) -> str:
        """``light #rrggbb`` or ``dark #rrggbb``."""
        r, g, b = self.colour
        return f"{'dark' if self.dark else 'light'} #{r:02x}{g:02x}{b:02x}"


def detect_bed(arr: np.ndarray) -> BedGuess:
    """The bed as the scan's outer frame shows it: the median colour of each side's strip
    (FRAME of the shorter side wide). Sure when all four sides are light or all dark and
    their brightness differs by at most 64 levels (uneven lighting, not an item lying on an
    edge); otherwise the majority decides and the recipe should state it."""
    rgb = arr if arr.ndim == 3 else arr[..., None]
    band = max(2, round(min(rgb.shape[:2]) * FRAME))
    strips = (rgb[:band], rgb[-band:], rgb[:, :band], rgb[:, -band:])
    medians = np.array([np.median(s.reshape(-1, s.shape[-1]), axis=0) for s in strips])
    if medians.shape[1] == 1:
        medians = medians.repeat(3, axis=1)
    lumas = medians @ LUMA
    dark = float(np.median(lumas)) < 128
    sure = bool(np.all((lumas < 128) == dark)) and float(np.ptp(lumas)) <= 64
    sides = tuple(_rgb(m) for m in medians)
    return BedGuess(_rgb(np.median(medians, axis=0)), dark, sure, sides)


def _rgb(values: np.ndarray) -> tuple[int, int, int]:
    r, g, b = (round(float(v)) for v in values[:3])
    return r, g, b


def stated_bed(text: str, guess: BedGuess) -> BedGuess:
    """The bed as the recipe states it: "light", "dark" (the colour from the frame's sides of
    that kind, else white or near-black) or "#rrggbb"."""
    if text.startswith("#"):
        colour = (int(text[1:3], 16), int(text[3:5], 16), int(text[5:7], 16))
        return BedGuess(colour, float(np.dot(colour, LUMA)) < 128, True, guess.sides)
    dark = text == "dark"
    fitting = [c for c in guess.sides if (float(np.dot(c, LUMA)) < 128) == dark]
    if fitting:
        colour = _rgb(np.median(np.array(fitting, dtype=np.float32), axis=0))
    else:
        colour = (24, 24, 24) if dark else (245, 245, 245)
    return BedGuess(colour, dark, True, guess.sides)


def colour_difference(smooth: np.ndarray, bed: tuple[int, int, int]) -> np.ndarray:
    """How far each pixel's colour is from the bed's, brightness left aside, on an RGB image
    already smoothed (``smoothed``: sensor noise shrinks about SMOOTH times): the bed colour
    is scaled to each pixel's brightness (uneven lighting and neutral shadows keep the bed's
    colour) and the neutral (grey) part of the difference is removed. Element-wise numpy
    only, which runs without holding the GIL."""
    r, g, b = (smooth[..., i].astype(np.float32) for i in range(3))
    bed_r, bed_g, bed_b = (float(c) for c in bed)
    luma = r * LUMA[0] + g * LUMA[1] + b * LUMA[2]
    gain = np.clip(luma / max(1.0, bed_r * 0.299 + bed_g * 0.587 + bed_b * 0.114), 0.05, 20.0)
    r -= gain * bed_r
    g -= gain * bed_g
    b -= gain * bed_b
    grey = (r + g + b) / 3.0
    r -= grey
    g -= grey
    b -= grey
    return np.sqrt(r * r + g * g + b * b)


def smoothed(im: Image.Image) -> np.ndarray:
    """The RGB image after a SMOOTH x SMOOTH box blur (Pillow's, which releases the GIL while
    it works, so a split does not hold up the run's other threads)."""
    return np.asarray(im.filter(ImageFilter.BoxBlur(SMOOTH // 2)), dtype=np.uint8)


def find_items(gray: np.ndarray, *, chroma: np.ndarray | None = None, scale: int = 1,
               min_area: int = DEFAULT_MIN_AREA, threshold: int | None = None,
               min_solidity: float = DEFAULT_MIN_SOLIDITY,
               min_contrast: float = DEFAULT_MIN_CONTRAST,
               full_size: tuple[int, int] | None = None,
               bed: BedGuess | None = None) -> SplitResult:
    """Items on a greyscale scan (uint8 array, already reduced by `scale`), boxes in full size.

    Items are darker than a light bed (lighter than a dark one: ``bed.dark``), or differ from
    the bed in colour (``chroma``: ``colour_difference``, if given). Steps: threshold (Otsu
    unless given; on a dark bed the grey levels are turned over and ``threshold`` and the
    result's threshold mean "at or above"), drop specks (opening), bridge small gaps (closing,
    scaled to the image), fill holes, label 8-connected components, keep the ones of at least
    min_area full-size pixels, and flag probable touching items.
    """
    from scipy import ndimage
    bed = bed or BedGuess((245, 245, 245), False, True)
    if bed.dark:
        gray = 255 - gray
        threshold = None if threshold is None else 255 - int(threshold)
    hist = np.bincount(gray.ravel(), minlength=256)[:256]
    t, contrast = otsu_threshold(hist)
    shown = 255 - t if bed.dark else t
    if threshold is not None:
        t = int(threshold)
        shown = 255 - t if bed.dark else t
    elif contrast < min_contrast:
        return SplitResult([], shown, contrast, scale, True, bed.describe(), bed.sure)
    raw, mask, reach = _item_mask(gray, chroma, t)
    labels, count = ndimage.label(mask, structure=np.ones((3, 3), dtype=bool))
    areas = np.bincount(labels.ravel(), minlength=count + 1)
    full = full_size or (gray.shape[1] * scale, gray.shape[0] * scale)
    found: list[SplitItem] = []
    for index, sl in enumerate(ndimage.find_objects(labels), start=1):
        if sl is None or areas[index] * scale * scale < min_area:
            continue
        found.append(_measure(labels, index, sl, int(areas[index]), raw, reach, scale, full,
                              min_solidity))
    found = _flag_area_outliers(found)
    return SplitResult(reading_order(found), shown, contrast, scale, not found,
                       bed.describe(), bed.sure)


def _item_mask(gray: np.ndarray, chroma: np.ndarray | None,
               t: int) -> tuple[np.ndarray, np.ndarray, int]:
    """(raw, cleaned, reach): the thresholded mask as is, and after opening, closing with the
    returned reach and hole filling."""
    from scipy import ndimage
    mask = gray <= t
    if chroma is not None:
        coloured = chroma >= chroma_threshold(chroma, ~mask)
        # The colour difference comes from a SMOOTH-wide box blur, which spreads an item's
        # colour half that far onto the bed: take it back, so boxes end where items end.
        coloured = ndimage.binary_erosion(coloured, iterations=SMOOTH // 2)
        mask |= coloured
    raw = mask
    st = np.ones((3, 3), dtype=bool)
    mask = ndimage.binary_opening(mask, structure=st)
    # Bridge gaps of up to ~0.6% of the longer side (about 9 px at 1500 px): perforated or
    # broken outlines close, so fill_holes can fill the item (common practice, no source).
    reach = max(2, round(max(gray.shape) / 330))
    pad = reach + 2  # closing near the border would otherwise erode items that touch it
    mask = np.pad(mask, pad)
    mask = ndimage.binary_closing(mask, structure=st, iterations=reach)[pad:-pad, pad:-pad]
    mask = ndimage.binary_fill_holes(mask)
    mask = ndimage.binary_opening(mask, structure=st, iterations=2)
    return raw, mask, reach


def _measure(labels: np.ndarray, index: int, sl: tuple[slice, slice], area: int,
             raw: np.ndarray, reach: int, scale: int, full: tuple[int, int],
             min_solidity: float) -> SplitItem:
    """Box, solidity and minimum-area rectangle of one component of ``area`` pixels, in
    full-size pixels; touching when the solidity is under min_solidity."""
    from scipy.spatial import ConvexHull, QhullError
    sub = labels[sl] == index
    y0, x0 = sl[0].start, sl[1].start
    pts = _pixel_corners(sub)
    try:
        hull_area = float(ConvexHull(pts).volume)  # in 2-D, "volume" is the area
    except (QhullError, ValueError):
        hull_area = float(area)
    solidity = min(1.0, float(area) / hull_area) if hull_area > 0 else 1.0
    angle, rw, rh, (cx, cy) = min_area_rect(pts)
    bx0, by0, bx1, by1 = _raw_extent(raw, labels, index, sl, reach + 2)
    full_w, full_h = full
    box = (bx0 * scale, by0 * scale,
           min(full_w, bx1 * scale) - bx0 * scale, min(full_h, by1 * scale) - by0 * scale)
    return SplitItem(
        box=box, angle=angle, rect_size=(rw * scale, rh * scale),
        rect_center=((cx + x0) * scale, (cy + y0) * scale),
        area=area * scale * scale, solidity=solidity, touching=solidity < min_solidity)


def _raw_extent(raw: np.ndarray, labels: np.ndarray, index: int, sl: tuple[slice, slice],
                margin: int) -> tuple[int, int, int, int]:
    """Extent (x0, y0, x1, y1) of the unsmoothed mask near one component.

    Opening shaves thin parts (leaf tips, stalks); the raw threshold mask within a few pixels of
    the cleaned component gives them back without picking up distant specks.
    """
    from scipy import ndimage
    y0, x0 = max(0, sl[0].start - margin), max(0, sl[1].start - margin)
    y1, x1 = min(raw.shape[0], sl[0].stop + margin), min(raw.shape[1], sl[1].stop + margin)
    near = ndimage.binary_dilation(labels[y0:y1, x0:x1] == index, iterations=margin)
    ys, xs = np.nonzero(raw[y0:y1, x0:x1] & near)
    if ys.size == 0:
        return sl[1].start, sl[0].start, sl[1].stop, sl[0].stop
    return x0 + int(xs.min()), y0 + int(ys.min()), x0 + int(xs.max()) + 1, y0 + int(ys.max()) + 1


def _flag_area_outliers(items: list[SplitItem]) -> list[SplitItem]:
    if len(items) < 3:
        return items
    median = float(np.median([i.area for i in items]))
    out = []
    for item in items:
        if item.area > AREA_OUTLIER * median and not item.touching:
            item = SplitItem(item.box, item.angle, item.rect_size, item.rect_center, item.area,
                             item.solidity, True)
        out.append(item)
    return out


def reading_order(items: list[SplitItem]) -> list[SplitItem]:
    """Items top-to-bottom in rows, left-to-right within a row (deterministic).

    An item joins the current row when its top lies above the middle of the row's first item.
    """
    rest = sorted(items, key=lambda i: (i.box[1], i.box[0]))
    ordered: list[SplitItem] = []
    while rest:
        first = rest[0]
        middle = first.box[1] + first.box[3] / 2
        row = [i for i in rest if i.box[1] < middle]
        rest = [i for i in rest if i.box[1] >= middle]
        ordered += sorted(row, key=lambda i: (i.box[0], i.box[1]))
    return ordered


def analyse_scan(im: Image.Image, *, min_area: int = DEFAULT_MIN_AREA,
                 threshold: int | None = None, min_solidity: float = DEFAULT_MIN_SOLIDITY,
                 max_side: int = DEFAULT_MAX_SIDE, background: str | None = None,
                 ) -> SplitResult:
    """Find the items on a scan; analyses a reduced greyscale copy when the scan is large.

    ``background``: "light", "dark" or "#rrggbb" states the bed; None detects it."""
    scale = max(1, math.ceil(max(im.size) / max_side))
    small = im.reduce(scale) if scale > 1 else im
    gray = np.asarray(_to_grey(small), dtype=np.uint8)
    rgb = None
    if small.mode in ("RGB", "RGBA", "P", "CMYK", "YCbCr", "LAB", "HSV"):
        rgb = smoothed(_to_rgb(small))
    bed = detect_bed(rgb if rgb is not None else gray)
    if background:
        bed = stated_bed(background, bed)
    chroma = colour_difference(rgb, bed.colour) if rgb is not None else None
    del rgb
    return find_items(gray, chroma=chroma, scale=scale, min_area=min_area, threshold=threshold,
                      min_solidity=min_solidity, full_size=im.size, bed=bed)


def _to_rgb(im: Image.Image) -> Image.Image:
    if im.mode in ("RGBA", "LA", "PA") or (im.mode == "P" and "transparency" in im.info):
        bg = Image.new("RGBA", im.size, (255, 255, 255, 255))
        return Image.alpha_composite(bg, im.convert("RGBA")).convert("RGB")
    return im.convert("RGB")


def _to_grey(im: Image.Image) -> Image.Image:
    if im.mode in ("I;16", "I;16B", "I;16L", "I"):
        return Image.fromarray((np.asarray(im, dtype=np.float64) / 257.0).clip(0, 255)
                               .astype(np.uint8))
    if im.mode in ("RGBA", "LA", "PA") or (im.mode == "P" and "transparency" in im.info):
        bg = Image.new("RGBA", im.size, (255, 255, 255, 255))
        return Image.alpha_composite(bg, im.convert("RGBA")).convert("L")
    return im.convert("L")


def _white(mode: str) -> int | tuple[int, ...]:
    white: dict[str, int | tuple[int, ...]] = {"L": 255, "RGB": (255, 255, 255),
                                                "RGBA": (255, 255, 255, 255)}
    return white[mode]


def crop_item(im: Image.Image, item: SplitItem, *, padding: int = 0, deskew: bool = False,
              ) -> tuple[Image.Image, tuple[int, int, int, int]]:
    """The crop of one item (optionally levelled) and its padded box (x, y, w, h) in the scan."""
    if im.mode not in ("L", "RGB", "RGBA"):
        im = im.convert("RGBA" if "A" in im.getbands() else "RGB")
    x, y, w, h = item.box
    x0, y0 = max(0, x - padding), max(0, y - padding)
    x1, y1 = min(im.width, x + w + padding), min(im.height, y + h + padding)
    crop = im.crop((x0, y0, x1, y1))
    box = (x0, y0, x1 - x0, y1 - y0)
    if not deskew or abs(item.angle) < MIN_DESKEW_DEGREES:
        return crop, box
    rotated = crop.rotate(item.angle, resample=Image.Resampling.BICUBIC, expand=True,
                          fillcolor=_white(crop.mode))
    # Where the rectangle's centre lands: Pillow turns counter-clockwise on screen, which in
    # y-down pixel coordinates maps an offset (dx, dy) from the centre to
    # (dx cos a + dy sin a, -dx sin a + dy cos a).
    a = math.radians(item.angle)
    dx = item.rect_center[0] - (x0 + crop.width / 2)
    dy = item.rect_center[1] - (y0 + crop.height / 2)
    cx = rotated.width / 2 + dx * math.cos(a) + dy * math.sin(a)
    cy = rotated.height / 2 - dx * math.sin(a) + dy * math.cos(a)
    half_w, half_h = item.rect_size[0] / 2 + padding, item.rect_size[1] / 2 + padding
    trim = (max(0, round(cx - half_w)), max(0, round(cy - half_h)),
            min(rotated.width, round(cx + half_w)), min(rotated.height, round(cy + half_h)))
    return rotated.crop(trim), box


def png_bytes(im: Image.Image, icc_profile: bytes | None = None) -> bytes:
    """The image encoded as PNG (lossless), keeping an ICC profile when there is one."""
    buf = io.BytesIO()
    if icc_profile:
        im.save(buf, format="PNG", icc_profile=icc_profile)
    else:
        im.save(buf, format="PNG")
    return buf.getvalue()
