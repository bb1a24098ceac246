"""Scanner-bed splitter: synthetic beds with known item boxes (rotation, shadows, noise)."""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
import pytest
from PIL import Image, ImageDraw, ImageFilter

from collector.sources import splitter

Box = tuple[int, int, int, int]


@dataclass
class Bed:
    """A synthetic scan and the true axis-aligned boxes (x, y, w, h) of its items, row-major."""

    image: Image.Image
    boxes: list[Box]


def _item(rng: np.random.Generator, w: int, h: int) -> Image.Image:
    """An opaque item (a card or pressed leaf sheet) with some texture."""
    colour = tuple(int(c) for c in rng.integers(40, 170, 3))
    im = Image.new("RGBA", (w, h), (*colour, 255))
    draw = ImageDraw.Draw(im)
    for _ in range(12):  # darker and lighter strokes, staying well below the bed's brightness
        x0, y0 = int(rng.integers(0, w)), int(rng.integers(0, h))
        x1, y1 = int(rng.integers(0, w)), int(rng.integers(0, h))
        shade = tuple(int(min(185, max(0, c + rng.integers(-40, 30)))) for c in colour)
        draw.line((x0, y0, x1, y1), fill=(*shade, 255), width=int(rng.integers(2, 9)))
    return im


def place(bed: Image.Image, item: Image.Image, x: int, y: int, angle: float,
          shadow: bool = True) -> Box:
    """Paste item rotated by angle at (x, y) with a soft drop shadow; return its true box."""
    rotated = item.rotate(angle, resample=Image.Resampling.BICUBIC, expand=True)
    alpha = rotated.getchannel("A")
    if shadow:
        # A soft shadow down-right: darkens the bed by up to ~12%, as a lid's light does.
        blur = alpha.filter(ImageFilter.GaussianBlur(4)).point(lambda a: int(a * 0.12))
        shade = Image.new("RGB", rotated.size, (0, 0, 0))
        region = bed.crop((x + 6, y + 6, x + 6 + rotated.width, y + 6 + rotated.height))
        bed.paste(Image.composite(shade, region, blur), (x + 6, y + 6))
    bed.paste(rotated.convert("RGB"), (x, y), alpha)
    left, top, right, bottom = alpha.point(lambda a: 255 if a > 127 else 0).getbbox()
    return (x + left, y + top, right - left, bottom - top)


def add_noise(im: Image.Image, rng: np.random.Generator, sigma: float = 5.0) -> Image.Image:
    """Gaussian sensor noise plus a gentle brightness gradient across the bed."""
    arr = np.asarray(im, dtype=np.float32)
    w = arr.shape[1]
    gradient = np.linspace(-5, 5, w, dtype=np.float32)[None, :]
    if arr.ndim == 3:
        gradient = gradient[..., None]
    arr = arr + gradient + rng.normal(0, sigma, arr.shape).astype(np.float32)
    return Image.fromarray(arr.clip(0, 255).astype(np.uint8), mode=im.mode)


def make_bed(seed: int, count: int, size: tuple[int, int] = (1500, 1150),
             max_angle: float = 5.0) -> Bed:
    """A bed with count items in a 3-column grid, each rotated within ±max_angle degrees."""
    rng = np.random.default_rng(seed)
    bed = Image.new("RGB", size, (244, 244, 242))
    cols = 3
    rows = math.ceil(count / cols)
    cell_w, cell_h = size[0] // cols, size[1] // rows
    boxes = []
    for i in range(count):
        r, c = divmod(i, cols)
        w = int(rng.integers(int(cell_w * 0.55), int(cell_w * 0.7)))
        h = int(rng.integers(int(cell_h * 0.5), int(cell_h * 0.65)))
        x = c * cell_w + int(rng.integers(20, cell_w - w - 40))
        # Vertical jitter below a third of the item height keeps rows recognisable as rows.
        y = r * cell_h + int(rng.integers(20, max(21, min(cell_h - h - 60, 20 + h // 3))))
        angle = float(rng.uniform(-max_angle, max_angle))
        boxes.append(place(bed, _item(rng, w, h), x, y, angle))
    return Bed(add_noise(bed, rng), boxes)


def iou(a: Box, b: Box) -> float:
    """Intersection over union of two (x, y, w, h) boxes."""
    ix = max(0, min(a[0] + a[2], b[0] + b[2]) - max(a[0], b[0]))
    iy = max(0, min(a[1] + a[3], b[1] + b[3]) - max(a[1], b[1]))
    inter = ix * iy
    return inter / (a[2] * a[3] + b[2] * b[3] - inter)


@pytest.mark.parametrize(("seed", "count"), [(1, 4), (2, 5), (3, 6), (4, 7), (5, 8), (6, 9)])
def test_every_item_on_a_noisy_bed_is_found_in_reading_order(seed: int, count: int) -> None:
    """4-9 rotated items with shadows and noise are all found, IoU >= 0.9, row by row."""
    bed = make_bed(seed, count)
    result = splitter.analyse_scan(bed.image)
    assert not result.blank
    found = [item.box for item in result.items]
    assert len(found) == count
    # The grid is filled row-major, so reading order must give the boxes in the same order.
    scores = [iou(f, t) for f, t in zip(found, bed.boxes, strict=True)]
    assert min(scores) >= 0.9, scores
    assert not any(item.touching for item in result.items)


def test_large_scan_is_analysed_reduced_and_boxes_map_back() -> None:
    """A scan over max_side is analysed on a reduced copy; boxes still match at full size."""
    bed = make_bed(11, 6, size=(3600, 2600))
    result = splitter.analyse_scan(bed.image, max_side=1000)
    assert result.scale == 4
    found = [item.box for item in result.items]
    assert len(found) == 6
    assert min(iou(f, t) for f, t in zip(found, bed.boxes, strict=True)) >= 0.9


def test_blank_bed_has_no_items() -> None:
    """A bed with only noise and a gradient is blank: no items."""
    rng = np.random.default_rng(7)
    blank = add_noise(Image.new("RGB", (1200, 900), (244, 244, 242)), rng)
    result = splitter.analyse_scan(blank)
    assert result.blank and result.items == []


def test_touching_items_are_flagged() -> None:
    """Two overlapping items form one component that is flagged as touching, not hidden."""
    rng = np.random.default_rng(8)
    bed = Image.new("RGB", (1500, 1100), (244, 244, 242))
    place(bed, _item(rng, 300, 200), 60, 60, 2)
    place(bed, _item(rng, 300, 200), 560, 60, -3)
    place(bed, _item(rng, 300, 200), 1060, 60, 1)
    # An L-shaped pair: the second card overlaps the first's corner.
    place(bed, _item(rng, 300, 220), 100, 500, 0)
    place(bed, _item(rng, 300, 220), 330, 640, 0)
    image = add_noise(bed, rng)
    result = splitter.analyse_scan(image)
    flagged = [i for i in result.items if i.touching]
    assert len(result.items) == 4
    assert len(flagged) == 1
    x, y, w, h = flagged[0].box
    assert abs(x - 100) <= 3 and abs(y - 500) <= 3 and w > 500 and h > 340
    assert flagged[0].solidity < splitter.DEFAULT_MIN_SOLIDITY


def test_aligned_touching_items_are_flagged_by_area() -> None:
    """Two cards side by side make one rectangle; its outsized area still flags it."""
    rng = np.random.default_rng(9)
    bed = Image.new("RGB", (1500, 1100), (244, 244, 242))
    for x in (60, 560, 1060):
        place(bed, _item(rng, 300, 220), x, 60, 0, shadow=False)
    place(bed, _item(rng, 300, 220), 100, 600, 0, shadow=False)
    place(bed, _item(rng, 300, 220), 400, 600, 0, shadow=False)  # touches the previous one
    result = splitter.analyse_scan(add_noise(bed, rng))
    assert len(result.items) == 4
    assert [i.touching for i in result.items] == [False, False, False, True]


@pytest.mark.parametrize("angle", [4.0, -3.5])
def test_deskew_levels_a_rotated_item(angle: float) -> None:
    """A card rotated by a few degrees is measured and levelled to its own size."""
    rng = np.random.default_rng(10)
    bed = Image.new("RGB", (900, 700), (244, 244, 242))
    card = Image.new("RGBA", (420, 260), (60, 90, 70, 255))
    place(bed, card, 200, 200, angle, shadow=False)
    image = add_noise(bed, rng, sigma=3)
    (item,) = splitter.analyse_scan(image, min_area=1000).items
    # place() turned the card counter-clockwise by angle; levelling turns it back.
    assert item.angle == pytest.approx(-angle, abs=0.5)
    crop, box = splitter.crop_item(image, item, padding=0, deskew=True)
    assert abs(crop.width - 420) <= 6 and abs(crop.height - 260) <= 6
    # Levelled: the card fills the crop, so even its corners are dark.
    grey = np.asarray(crop.convert("L"), dtype=np.float32)
    for cy, cx in ((8, 8), (8, -9), (-9, 8), (-9, -9)):
        assert grey[cy, cx] < 130, (cy, cx, grey[cy, cx])
    assert box == item.box


def test_padding_widens_the_box_within_the_scan() -> None:
    """Padding grows the crop box on every side but never past the scan's edges."""
    item = splitter.SplitItem((5, 40, 100, 50), 0.0, (100, 50), (55, 65), 5000, 1.0, False)
    im = Image.new("RGB", (200, 100), "white")
    crop, box = splitter.crop_item(im, item, padding=8)
    assert box == (0, 32, 113, 66)
    assert crop.size == (113, 66)


def test_otsu_threshold_separates_two_grey_levels() -> None:
    """Otsu's threshold lies between two populations (Otsu 1979, between-class variance)."""
    hist = np.zeros(256)
    hist[60] = 300
    hist[240] = 700
    t, contrast = splitter.otsu_threshold(hist)
    assert 60 <= t < 240
    assert contrast == pytest.approx(180)


def test_min_area_rect_recovers_rotation_of_a_rectangle() -> None:
    """The minimum-area rectangle of a rotated rectangle's corners has its angle and sides."""
    a = math.radians(12)
    corners = np.array([[0, 0], [300, 0], [300, 100], [0, 100]], dtype=float)
    rot = corners @ np.array([[math.cos(a), math.sin(a)], [-math.sin(a), math.cos(a)]])
    angle, w, h, _ = splitter.min_area_rect(rot + 50)
    assert angle == pytest.approx(12, abs=1e-3)
    assert (w, h) == (pytest.approx(300), pytest.approx(100))
