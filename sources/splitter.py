"""Scanner-bed splitting: find the separate items on a near-white scan and crop each one.

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
from PIL import Image

DEFAULT_MIN_AREA = 2000  # px in the full-size scan (common practice, no source)
DEFAULT_MIN_SOLIDITY = 0.85  # below this a component is probably several touching items
DEFAULT_MIN_CONTRAST = 25.0  # grey levels between the two Otsu classes; less = blank bed
DEFAULT_MAX_SIDE = 2000  # px; larger scans are analysed on a reduced copy
AREA_OUTLIER = 1.5  # x the median item area, with >= 3 items: probably two items merged
MIN_DESKEW_DEGREES = 0.3


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


def chroma_threshold(chroma: np.ndarray, background: np.ndarray) -> int:
    """Chroma above which a pixel is item, not bed: twice the bed's own colour noise, >= 24."""
    sample = chroma[background]
    if sample.size > 200_000:  # a strided sample is plenty for a percentile
        sample = sample[:: sample.size // 200_000]
    noise = float(np.percentile(sample, 99.9)) if sample.size else 0.0
    return max(24, round(2 * noise))


def find_items(gray: np.ndarray, *, chroma: np.ndarray | None = None, scale: int = 1,
               min_area: int = DEFAULT_MIN_AREA, threshold: int | None = None,
               min_solidity: float = DEFAULT_MIN_SOLIDITY,
               min_contrast: float = DEFAULT_MIN_CONTRAST,
               full_size: tuple[int, int] | None = None) -> SplitResult:
    """Items on a greyscale scan (uint8 array, already reduced by `scale`), boxes in full size.

    Items are darker than the near-white bed, or coloured where the bed and the shadows on it
    are neutral grey (chroma = max - min of R, G, B, if given). Steps: threshold (Otsu unless
    given), drop specks (opening), bridge small gaps (closing, scaled to the image), fill
    holes, label 8-connected components, keep the ones of at least min_area full-size pixels,
    and flag probable touching items.
    """
    from scipy import ndimage
    hist = np.bincount(gray.ravel(), minlength=256)[:256]
    t, contrast = otsu_threshold(hist)
    if threshold is not None:
        t = int(threshold)
    elif contrast < min_contrast:
        return SplitResult([], t, contrast, scale, True)
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
    return SplitResult(reading_order(found), t, contrast, scale, not found)


def _item_mask(gray: np.ndarray, chroma: np.ndarray | None,
               t: int) -> tuple[np.ndarray, np.ndarray, int]:
    """(raw, cleaned, reach): the thresholded mask as is, and after opening, closing with the
    returned reach and hole filling."""
    from scipy import ndimage
    mask = gray <= t
    if chroma is not None:
        mask |= chroma >= chroma_threshold(chroma, ~mask)
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
                 max_side: int = DEFAULT_MAX_SIDE) -> SplitResult:
    """Find the items on a scan; analyses a reduced greyscale copy when the scan is large."""
    scale = max(1, math.ceil(max(im.size) / max_side))
    small = im.reduce(scale) if scale > 1 else im
    gray = np.asarray(_to_grey(small), dtype=np.uint8)
    chroma = None
    if small.mode in ("RGB", "RGBA", "P", "CMYK", "YCbCr", "LAB", "HSV"):
        rgb = np.asarray(small.convert("RGB"), dtype=np.int16)
        chroma = (rgb.max(axis=2) - rgb.min(axis=2)).astype(np.uint8)
        del rgb
    return find_items(gray, chroma=chroma, scale=scale, min_area=min_area, threshold=threshold,
                      min_solidity=min_solidity, full_size=im.size)


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
