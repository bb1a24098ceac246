"""Enlarged-image detection (collector.checks.pixel_facts) on generated images.

Makes N originals of varied content (fractal "1/f" textures, hard-edged shapes, smooth fields
with sensor noise, line drawings), each rendered at twice the size and reduced with Lanczos so it
holds detail up to its Nyquist limit. Each original is then downscaled by 1.5, 2, 3 and 4 and
re-enlarged to the same size (bilinear, bicubic or Lanczos in turn). Every image is checked as
PNG and as JPEG quality 90. Prints, per factor, recall (enlarged images found) and the median
estimated factor, then precision over all and the false-positive rate on untouched images, and
the time per image. Run: .venv/bin/python bench/enlarged.py [N]
"""

from __future__ import annotations

import io
import statistics
import sys
import time

import numpy as np
from PIL import Image, ImageDraw

from collector.checks.pixel_facts import estimate_enlargement

SIZE = (800, 600)
FACTORS = (1.5, 2.0, 3.0, 4.0)
FILTERS = (Image.Resampling.BILINEAR, Image.Resampling.BICUBIC, Image.Resampling.LANCZOS)


def fractal(rng: np.random.Generator, w: int, h: int, beta: float) -> np.ndarray:
    """A 1/f^beta random field scaled to 0..255, per colour channel."""
    fy = np.fft.fftfreq(h)[:, None]
    fx = np.fft.rfftfreq(w)[None, :]
    radius = np.sqrt(fx * fx + fy * fy)
    radius[0, 0] = 1.0
    out = []
    for _ in range(3):
        spec = (rng.normal(size=radius.shape) + 1j * rng.normal(size=radius.shape))
        field = np.fft.irfft2(spec / radius ** (beta / 2), s=(h, w))
        field = (field - field.min()) / (np.ptp(field) or 1.0)
        out.append(field * 255)
    return np.stack(out, axis=2)


def shapes(rng: np.random.Generator, w: int, h: int, lines_only: bool) -> np.ndarray:
    """Hard-edged ellipses, rectangles, polygons and lines on a plain or fractal ground."""
    ground = tuple(int(c) for c in rng.integers(0, 256, 3))
    im = Image.new("RGB", (w, h), ground)
    draw = ImageDraw.Draw(im)
    for _ in range(int(rng.integers(15, 60))):
        colour = tuple(int(c) for c in rng.integers(0, 256, 3))
        x0, y0 = int(rng.integers(-50, w)), int(rng.integers(-50, h))
        x1, y1 = x0 + int(rng.integers(10, w // 2)), y0 + int(rng.integers(10, h // 2))
        kind = int(rng.integers(0, 4)) if not lines_only else 3
        if kind == 0:
            draw.ellipse((x0, y0, x1, y1), fill=colour)
        elif kind == 1:
            draw.rectangle((x0, y0, x1, y1), fill=colour)
        elif kind == 2:
            pts = [(int(rng.integers(0, w)), int(rng.integers(0, h))) for _ in range(5)]
            draw.polygon(pts, fill=colour)
        else:
            draw.line((x0, y0, x1, y1), fill=colour, width=int(rng.integers(1, 8)))
    return np.asarray(im, dtype=np.float64)


def original(rng: np.random.Generator, n: int) -> Image.Image:
    """One original of kind n % 4, SIZE, detail up to its Nyquist limit."""
    w, h = SIZE[0] * 2, SIZE[1] * 2
    kind = n % 4
    if kind == 0:
        arr = fractal(rng, w, h, float(rng.uniform(1.6, 2.4)))
    elif kind == 1:
        arr = shapes(rng, w, h, lines_only=False)
    elif kind == 2:  # a soft photo-like field with hard shapes and grain
        arr = 0.6 * fractal(rng, w, h, 2.6) + 0.4 * shapes(rng, w, h, lines_only=False)
    else:
        arr = shapes(rng, w, h, lines_only=True)
    big = Image.fromarray(np.clip(arr, 0, 255).astype(np.uint8))
    small = np.asarray(big.resize(SIZE, Image.Resampling.LANCZOS), dtype=np.float64)
    grain = rng.normal(0, float(rng.uniform(0.5, 3.0)), small.shape)
    return Image.fromarray(np.clip(small + grain, 0, 255).astype(np.uint8))


def enlarge(im: Image.Image, factor: float, method: Image.Resampling) -> Image.Image:
    """Downscale by ``factor`` (Lanczos), then enlarge back to the same size with ``method``."""
    small = im.resize((round(im.width / factor), round(im.height / factor)),
                      Image.Resampling.LANCZOS)
    return small.resize(im.size, method)


def as_jpeg(im: Image.Image) -> Image.Image:
    """The image after a JPEG quality 90 round trip."""
    buf = io.BytesIO()
    im.save(buf, "JPEG", quality=90)
    buf.seek(0)
    return Image.open(buf)


def main() -> None:
    count = int(sys.argv[1]) if len(sys.argv) > 1 else 80
    rng = np.random.default_rng(14)
    found: dict[tuple[str, float], list[bool]] = {}
    ratios: dict[tuple[str, float], list[float]] = {}
    seconds, checks = 0.0, 0
    for n in range(count):
        orig = original(rng, n)
        cases = [(1.0, orig)] + [(f, enlarge(orig, f, FILTERS[(n + i) % 3]))
                                 for i, f in enumerate(FACTORS)]
        for factor, im in cases:
            for label, version in (("png", im), ("jpeg90", as_jpeg(im))):
                start = time.perf_counter()
                est = estimate_enlargement(version)
                seconds += time.perf_counter() - start
                checks += 1
                assert est is not None
                found.setdefault((label, factor), []).append(est.enlarged)
                ratios.setdefault((label, factor), []).append(
                    version.width / max(1, est.native_width))
    print(f"{count} originals, {SIZE[0]}x{SIZE[1]}; each enlarged by {FACTORS}")
    print(f"{'format':<8} {'factor':>6} {'images':>7} {'flagged':>8} {'rate':>7} "
          f"{'median est.':>12}")
    for (label, factor), hits in sorted(found.items()):
        rate = sum(hits) / len(hits)
        med = statistics.median(ratios[(label, factor)])
        name = "recall" if factor > 1 else "false+"
        print(f"{label:<8} {factor:>6.1f} {len(hits):>7} {sum(hits):>8} {rate:>6.1%} "
              f"{med:>11.2f}x  ({name})")
    for label in ("png", "jpeg90"):
        tp = sum(sum(found[(label, f)]) for f in FACTORS)
        fn = sum(len(found[(label, f)]) - sum(found[(label, f)]) for f in FACTORS)
        fp = sum(found[(label, 1.0)])
        precision = tp / (tp + fp) if tp + fp else 1.0
        recall = tp / (tp + fn) if tp + fn else 0.0
        print(f"{label:<8} precision {precision:.1%}  recall {recall:.1%} (all factors)")
    print(f"time per estimate: {seconds / checks * 1000:.2f} ms")


if __name__ == "__main__":
    main()
