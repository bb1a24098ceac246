"""Release copies of transparent images flattened onto a background colour.

Pixels that are not fully opaque train as whatever a loader fills them with (often black). The
release export can instead composite such an image onto the colour the recipe names
(``[images] release_background``) and write the result as a new PNG, a derived file named
``<release name of the original>-flat.png``; provenance.csv names the stored original it
came from. The store keeps the original bytes unchanged. Transparency as Pillow reads it
(Pillow documentation, "Concepts > Modes" and "Image file formats > PNG > transparency");
only the first frame is used.
"""

from __future__ import annotations

import hashlib
import io
import os
from dataclasses import dataclass
from pathlib import Path

from PIL import Image

from collector.checks.pixel_facts import transparent_share
from collector.storage.safe_paths import new_temp_file

__all__ = ["Flattened", "flatten_release_copy", "parse_colour"]


@dataclass(frozen=True)
class Flattened:
    """The derived file written into the release folder."""

    file_name: str
    sha256: str
    size: int
    width: int
    height: int


def parse_colour(text: str) -> tuple[int, int, int]:
    """(r, g, b) of a "#rrggbb" colour (the recipe checked the form)."""
    return int(text[1:3], 16), int(text[3:5], 16), int(text[5:7], 16)


def flattened_png(im: Image.Image, colour: tuple[int, int, int]) -> bytes:
    """The image composited onto ``colour`` (alpha over an opaque ground), as RGB PNG bytes."""
    ground = Image.new("RGBA", im.size, (*colour, 255))
    flat = Image.alpha_composite(ground, im.convert("RGBA")).convert("RGB")
    buf = io.BytesIO()
    flat.save(buf, "PNG")
    return buf.getvalue()


def flatten_release_copy(src: Path, folder: Path, stem: str, colour: str) -> Flattened | None:
    """Write ``<stem>-flat.png`` into ``folder`` when the stored file ``src`` has pixels that are
    not fully opaque; None (nothing written) for an opaque image."""
    with Image.open(src) as im:
        if "A" not in im.getbands() and "transparency" not in im.info:
            return None
        im.load()
        if transparent_share(im) == 0.0:
            return None
        data = flattened_png(im, parse_colour(colour))
        width, height = im.size
    name = f"{stem}-flat.png"
    fd, tmp = new_temp_file(folder, f".{name}.", ".part")
    try:
        with os.fdopen(fd, "wb") as fh:
            fh.write(data)
        os.replace(tmp, folder / name)  # replaces a link at the name; never writes through it
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise
    return Flattened(name, hashlib.sha256(data).hexdigest(), len(data), width, height)
