"""Thumbnails of stored files for the review sheet, made once and reused.

Each thumbnail is a WebP picture (Pillow's encoder, quality 75) whose longest side is at most
``side`` pixels, upright as a viewer shows the picture (the stored EXIF orientation applied:
CIPA DC-008 (Exif 2.32), 4.6.5, tag 274), transparency shown on white and 16-bit pictures
scaled by their full range (:func:`collector.checks.pixels.colour_ready`, the rules the colour
facts use). A JPEG is decoded at 1/2 to 1/8 of its size where that is enough (``draft``).

The name is ``<sha256>-<side>.webp``: a stored file never changes (its name is its digest), so
a thumbnail that is present is current and is reused; a changed size makes new names. Each is
written through a temp file and ``os.replace``, so a present one is whole. Thumbnails of files
no longer shown (withdrawn since) are deleted, so a withdrawal for personal data leaves no
picture behind in the sheet's folder; nothing else in the folder is touched.
"""

from __future__ import annotations

import io
import os
import re
import struct
import warnings
from collections.abc import Iterable
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass
from pathlib import Path
from typing import NamedTuple

from collector.storage.safe_paths import own_file_exists, remove_own_file, replace_file

THUMBS_DIR = "thumbs"
THUMB_SIDE = 160
QUALITY = 75  # WebP quality: small files, fine at thumbnail size (common practice, no source)
_OURS = re.compile(r"^\.?[0-9a-f]{64}-\d+\.webp(\..*)?$")  # a thumbnail, or its temp file
# What Pillow raises on damaged files (as collector.checks.images, libraries.md section 7).
_DECODE_ERRORS = (OSError, SyntaxError, ValueError, EOFError, IndexError, TypeError,
                  struct.error)


class Wanted(NamedTuple):
    """A thumbnail to have: the stored file (None when its bytes are missing), its digest,
    its size (as stored) and EXIF orientation."""

    src: Path | None
    sha256: str
    width: int | None
    height: int | None
    orientation: int | None


@dataclass(frozen=True)
class Thumb:
    """A thumbnail on disk (``name`` inside the thumbnails folder) or why there is none."""

    name: str | None
    width: int
    height: int
    note: str = ""


@dataclass
class ThumbCounts:
    made: int = 0
    reused: int = 0
    failed: int = 0
    removed: int = 0


def turned(orientation: int | None) -> bool:
    """Whether the orientation swaps width and height (values 5 to 8)."""
    return orientation in (5, 6, 7, 8)


def thumb_size(width: int | None, height: int | None, orientation: int | None,
               side: int) -> tuple[int, int]:
    """The upright thumbnail's size: the longest side ``side`` at most, never enlarged."""
    w, h = (width or side), (height or side)
    if turned(orientation):
        w, h = h, w
    scale = min(1.0, side / max(w, h, 1))
    return max(1, round(w * scale)), max(1, round(h * scale))


def thumb_name(sha256: str, side: int) -> str:
    return f"{sha256}-{side}.webp"


def render_thumbnail(src: Path, size: tuple[int, int], orientation: int | None) -> bytes:
    """The WebP bytes of the upright thumbnail of ``src`` at exactly ``size``."""
    from PIL import Image

    from collector.checks.pixels import colour_ready

    # The Exif orientation values as Pillow's transposes (as PIL.ImageOps.exif_transpose).
    transposes = {2: Image.Transpose.FLIP_LEFT_RIGHT, 3: Image.Transpose.ROTATE_180,
                  4: Image.Transpose.FLIP_TOP_BOTTOM, 5: Image.Transpose.TRANSPOSE,
                  6: Image.Transpose.ROTATE_270, 7: Image.Transpose.TRANSVERSE,
                  8: Image.Transpose.ROTATE_90}
    stored = (size[1], size[0]) if turned(orientation) else size
    with warnings.catch_warnings():
        # The file passed the recipe's pixel limit when it was stored; Pillow's own limit
        # (twice its warning size) still raises DecompressionBombError.
        warnings.simplefilter("ignore", Image.DecompressionBombWarning)
        with Image.open(src) as im:
            if im.format == "JPEG":
                im.draft("RGB", stored)
            small = colour_ready(im, max(stored))
    if orientation in transposes:
        small = small.transpose(transposes[orientation])
    small = small.resize(size, Image.Resampling.LANCZOS)
    out = io.BytesIO()
    small.save(out, "WEBP", quality=QUALITY)
    return out.getvalue()


def _one(want: Wanted, folder: Path, side: int) -> tuple[str, Thumb, str]:
    """Make or reuse one thumbnail; returns (sha256, thumb, 'made'/'reused'/'failed')."""
    from PIL import Image

    size = thumb_size(want.width, want.height, want.orientation, side)
    name = thumb_name(want.sha256, side)
    if want.src is None:
        return want.sha256, Thumb(None, *size, "the stored file is missing"), "failed"
    if own_file_exists(folder / name):
        return want.sha256, Thumb(name, *size), "reused"
    try:
        data = render_thumbnail(want.src, size, want.orientation)
    except (*_DECODE_ERRORS, Image.DecompressionBombError) as exc:
        return (want.sha256, Thumb(None, *size, f"no thumbnail: the stored file cannot be "
                                   f"read as a picture ({type(exc).__name__})"), "failed")
    replace_file(folder / name, data)
    return want.sha256, Thumb(name, *size), "made"


def ensure_thumbnails(wanted: Iterable[Wanted], folder: Path, *, side: int = THUMB_SIDE,
                      workers: int | None = None) -> tuple[dict[str, Thumb], ThumbCounts]:
    """Every wanted thumbnail in ``folder`` (made where missing, in a few threads: Pillow
    releases the GIL while decoding and encoding); stale thumbnails of ours removed."""
    wanted = list(wanted)
    counts = ThumbCounts()
    thumbs: dict[str, Thumb] = {}
    workers = workers or min(4, os.cpu_count() or 1)
    with ThreadPoolExecutor(max_workers=workers) as pool:
        for sha, thumb, how in pool.map(lambda w: _one(w, folder, side), wanted):
            thumbs[sha] = thumb
            setattr(counts, how, getattr(counts, how) + 1)
    keep = {t.name for t in thumbs.values() if t.name}
    for entry in os.scandir(folder):
        if _OURS.match(entry.name) and entry.name not in keep:
            remove_own_file(folder / entry.name)
            counts.removed += 1
    return thumbs, counts
