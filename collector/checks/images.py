"""Ingest checks for a downloaded file: is it an image, is it whole, what does it say about itself.

``inspect_image`` decides the format from magic bytes (standards.md section 9), decodes the
image fully to catch truncation and corruption, applies size limits, reads dimensions, mode, bit
depth, alpha, frames and EXIF orientation, collects embedded rights metadata (EXIF, IPTC-IIM,
XMP; standards.md section 6, read by collector.checks.embedded_metadata) and personal-data flags,
and computes the pHash pair.

Images may hold personal data (GPS position, camera serial numbers, owner names, faces): the
flags point at it; what to do with it is the user's decision.

Cost per JPEG (1 MP, one core, see bench/ingest_parts.py and bench/ingest.py): with
``full_decode`` (the default) one full decode for the integrity check, plus one header parse
and a draft (1/8 scale) decode that serves the hash and the colour facts; on the ingest path
(``full_decode=False``) the draft alone, plus a full-size luma decode when the recipe's
``enlarged`` policy needs the native-size estimate.
"""

from __future__ import annotations

import contextlib
import io
import re
import struct
import warnings
from collections.abc import Iterator
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, BinaryIO

from PIL import ExifTags, Image

from collector.checks.colour_facts import WORK_SIDE, ColourFacts, colour_facts
from collector.checks.embedded_metadata import read_exif, read_iptc, read_xmp
from collector.checks.formats import FORMATS, describe_non_image, sniff_format, type_mismatch
from collector.checks.phash import (
    HASH_ALGO,
    WINDOW_ALGO,
    HashFacts,
    hash_draft,
    hash_facts,
    pack_windows,
    to_signed64,
)
from collector.checks.pixel_facts import (
    PixelFacts,
    estimate_enlargement,
    transparent_share,
    verdicts,
)
from collector.checks.pixels import colour_ready
from collector.errors import ImageRejected

__all__ = ["RIGHTS_KEYS", "ImageFacts", "inspect_image"]

RIGHTS_KEYS = (
    "exif_artist", "exif_copyright", "exif_description",
    "iptc_byline", "iptc_copyright", "iptc_credit", "iptc_source", "iptc_caption",
    "xmp_creator", "xmp_rights", "xmp_web_statement", "xmp_usage_terms", "xmp_marked",
    "xmp_license",
)  # fmt: skip


@dataclass
class ImageFacts:
    """What inspect_image learned about one accepted image."""

    format: str
    mime: str
    ext: str
    width: int  # as stored
    height: int
    display_width: int  # after EXIF orientation (5-8 swap the sides, standards.md 6.1)
    display_height: int
    mode: str
    bit_depth: int
    alpha: bool
    frames: int
    animated: bool
    orientation: int
    icc: bool
    dpi: tuple[float, float] | None
    icc_profile: str | None  # the embedded ICC profile's description (ICC.1 'desc' tag)
    phash: int  # unsigned 64-bit
    phash_mirror: int
    hash_algo: str
    exif: dict[str, Any] = field(default_factory=dict)
    rights: dict[str, Any] = field(default_factory=dict)
    flags: list[str] = field(default_factory=list)
    type_mismatch: str | None = None
    pixel: PixelFacts = field(default_factory=lambda: PixelFacts(None, None))
    colour: ColourFacts | None = None  # None: not computed (inspect_image colours=0)
    # the pHash for each turn and of the crop windows (collector.checks.phash.hash_facts)
    turns: dict[str, int] = field(default_factory=dict)
    window_hashes: list[int] = field(default_factory=list)

    def file_columns(self) -> dict[str, Any]:
        """The ledger's ``files`` columns these facts fill (hashes as signed 64-bit integers,
        as SQLite stores them)."""
        return {
            "ext": self.ext, "format": self.format, "mime": self.mime, "width": self.width,
            "height": self.height, "mode": self.mode, "bit_depth": self.bit_depth,
            "alpha": self.alpha, "frames": self.frames, "orientation": self.orientation,
            "phash": to_signed64(self.phash), "phash_mirror": to_signed64(self.phash_mirror),
            "hash_algo": self.hash_algo, "exif": self.exif, "rights": self.rights,
            "icc_profile": self.icc_profile,
            "dpi_x": self.dpi[0] if self.dpi else None, "dpi_y": self.dpi[1] if self.dpi else None,
            **self.pixel.columns(),
            **(self.colour.columns() if self.colour else {}),
            "window_hashes": pack_windows(self.window_hashes) if self.window_hashes else None,
            "window_algo": WINDOW_ALGO,  # measured (a blank picture has no windows)
        }


# --- small helpers -----------------------------------------------------------------------------
def _bit_depth(im: Image.Image, fmt: str, head: bytes) -> int:
    if fmt == "PNG" and len(head) > 24:
        return head[24]  # IHDR bit depth at file offset 24 (standards.md section 9)
    if im.mode == "1":
        return 1
    if im.mode.startswith("I;16"):
        return 16
    if im.mode in ("I", "F"):
        return 32
    return 8


def _has_alpha(im: Image.Image) -> bool:
    return "A" in im.mode or "a" in im.mode or "transparency" in im.info


def _icc_profile_name(profile: bytes | None, flags: list[str]) -> str | None:
    """The description of an embedded ICC profile (its 'desc' tag, ICC.1 section 9.2.41, read
    by LittleCMS through Pillow's ImageCms), or None when there is no profile. A profile that
    does not parse is flagged ``icc_unreadable`` and named as such."""
    if not profile:
        return None
    try:
        from PIL import ImageCms

        name = ImageCms.getProfileDescription(ImageCms.ImageCmsProfile(io.BytesIO(profile)))
    except Exception:  # a malformed profile from an archive: a fact, not a failure
        flags.append("icc_unreadable")
        return "(unreadable profile)"
    return name.strip()[:200] or "(profile without a name)"


def _dpi(im: Image.Image) -> tuple[float, float] | None:
    dpi = im.info.get("dpi")
    if not dpi:
        return None
    try:
        return (round(float(dpi[0]), 2), round(float(dpi[1]), 2))
    except (TypeError, ValueError, IndexError):
        return None


def _orientation(im: Image.Image) -> int:
    try:
        return int(im.getexif().get(ExifTags.Base.Orientation, 1) or 1)
    except Exception:  # unreadable EXIF is reported by _read_exif
        return 1


def _hash(im: Image.Image, orientation: int, path: Path) -> HashFacts:
    """pHash, mirror, blank, turns and windows: collector.checks.phash.hash_facts."""
    try:
        return hash_facts(im, orientation)
    except _DECODE_ERRORS as exc:
        raise ImageRejected("broken_image", damage(exc)) from exc


# --- the check ---------------------------------------------------------------------------------
# What Pillow raises on damaged files: OSError ("image file is truncated"), SyntaxError (PNG
# CRC), ValueError/EOFError/struct.error from plugin parsers (libraries.md section 7).
_DECODE_ERRORS = (OSError, SyntaxError, ValueError, EOFError, IndexError, TypeError, struct.error)


def _open(path: Path | BinaryIO, max_pixels: int) -> Image.Image:
    """Image.open with Pillow's bomb warning raised as an error here only (libraries.md 7);
    ``path`` may be the file already open (Pillow reads it from its start, never closes it)."""
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("error", Image.DecompressionBombWarning)
            im = Image.open(path)
    except (Image.DecompressionBombError, Image.DecompressionBombWarning) as exc:
        raise ImageRejected("decompression_bomb", _bomb_detail(exc, max_pixels)) from exc
    except _DECODE_ERRORS as exc:
        raise ImageRejected("broken_image", "its header cannot be read: " + damage(exc)) from exc
    w, h = im.size
    if w * h > max_pixels:
        im.close()
        raise ImageRejected(
            "decompression_bomb",
            f"{w:,} x {h:,} = {w * h:,} pixels, above max_pixels = {max_pixels:,} "
            "(raise [images] max_pixels if such images are expected)",
        )
    return im


# Pillow's bomb message names the pixel count (PIL.Image._decompression_bomb_check): "Image
# size (900000000 pixels) exceeds limit of ... pixels, could be decompression bomb DOS attack."
_BOMB_PIXELS = re.compile(r"\((\d+) pixels\)")


def _bomb_detail(exc: Exception, max_pixels: int) -> str:
    """A bomb refused by Pillow while opening, said with the recipe's own limit."""
    found = _BOMB_PIXELS.search(str(exc))
    pixels = int(found[1]) if found else None
    if pixels is not None and pixels > max_pixels:
        return f"{pixels:,} pixels, above max_pixels = {max_pixels:,}"
    size = f"{pixels:,} pixels" if pixels is not None else "its pixel count"
    return (f"{size}, more than the image library opens safely "
            f"({Image.MAX_IMAGE_PIXELS or 0:,} pixels), whatever max_pixels = {max_pixels:,} says")


def damage(exc: BaseException) -> str:
    """What a decoder's complaint means, in words (the library's own text is not shown)."""
    text = str(exc).lower()
    if "truncated" in text or isinstance(exc, EOFError):
        return "the file ends before the picture does (cut short in transfer?)"
    if "crc" in text or "checksum" in text:
        return "a block of the file fails its checksum (CRC): the bytes were damaged"
    return "the picture data is damaged and cannot be decoded"


def _verify_png(path: Path, max_pixels: int) -> None:
    """PNG chunk CRCs via verify(), which is a no-op for JPEG (libraries.md section 7)."""
    try:
        with _open(path, max_pixels) as im:
            im.verify()
    except ImageRejected:
        raise
    except _DECODE_ERRORS as exc:
        raise ImageRejected("broken_image", "the PNG structure check fails: " + damage(exc)) \
            from exc


def _decode_all(im: Image.Image, path: Path) -> None:
    """Decode every pixel of the current frame; raise broken_image on any decoder error."""
    # A full RGB decode. Asking libjpeg for YCbCr at full size (draft) to skip the colour
    # conversion was measured 15% SLOWER with libjpeg-turbo (bench/ingest_parts.py).
    try:
        im.load()
    except _DECODE_ERRORS as exc:
        raise ImageRejected("broken_image", damage(exc)) from exc


@dataclass
class _Geometry:
    """Stored size, EXIF orientation and the size as displayed."""

    width: int
    height: int
    orientation: int
    display_width: int
    display_height: int


@dataclass
class _Described:
    """What the header and embedded metadata say, read before any pixel is decoded."""

    exif: dict[str, Any]
    rights: dict[str, Any]
    mode: str
    bit_depth: int
    alpha: bool
    icc: bool
    icc_profile: str | None
    dpi: tuple[float, float] | None


def _identify(fh: BinaryIO) -> tuple[bytes, str]:
    """The first 64 bytes of the file open as ``fh`` and the format their signature names;
    not_an_image otherwise."""
    head = fh.read(64)
    fmt = sniff_format(head)
    if fmt is None:
        raise ImageRejected("not_an_image", describe_non_image(head))
    return head, fmt


@contextlib.contextmanager
def _open_identified(fh: BinaryIO, max_pixels: int) -> Iterator[tuple[bytes, str, Image.Image]]:
    """(first bytes, format, the image opened) of the file open as ``fh``: the signature
    first (not_an_image), then :func:`_open`; the image is closed after."""
    head, fmt = _identify(fh)
    with _open(fh, max_pixels) as im:
        yield head, fmt, im


def _mismatch_flag(mismatch: str | None, flags: list[str]) -> None:
    """Flag ``type_mismatch:<kinds>`` for a declared type or URL suffix that disagrees."""
    if mismatch:
        kinds = "+".join(p.split("=", 1)[0] for p in mismatch.split(" but ", 1)[1].split(", "))
        flags.append(f"type_mismatch:{kinds}")


def _geometry(im: Image.Image, fmt: str, path: Path) -> _Geometry:
    """Check Pillow agrees on the format; size and orientation as stored and as displayed."""
    if im.format != fmt:
        raise ImageRejected(
            "broken_image", f"its signature says {fmt} but its contents read as {im.format}"
        )
    width, height = im.size
    orientation = _orientation(im)
    if orientation not in range(1, 9):
        orientation = 1  # reserved values (standards.md 6.1) are treated as "no rotation"
    dw, dh = (height, width) if orientation in (5, 6, 7, 8) else (width, height)
    return _Geometry(width, height, orientation, dw, dh)


def _check_shape(
    geo: _Geometry, path: Path, min_side: int, min_aspect: float, max_aspect: float
) -> None:
    """too_small / bad_aspect on the displayed size (0 turns a limit off)."""
    dw, dh = geo.display_width, geo.display_height
    shortest = min(dw, dh)
    if min_side and shortest < min_side:
        raise ImageRejected(
            "too_small", f"shortest side {shortest:,} px, under min_side = {min_side:,}"
        )
    aspect = dw / dh if dh else 0.0
    if (min_aspect and aspect < min_aspect) or (max_aspect and aspect > max_aspect):
        raise ImageRejected(
            "bad_aspect",
            f"width / height = {aspect:.3f}, outside min_aspect = {min_aspect:g} .. "
            f"max_aspect = {max_aspect:g} (0 is no limit)",
        )


def _describe(im: Image.Image, fmt: str, head: bytes, flags: list[str]) -> _Described:
    """EXIF, IPTC and XMP (rights merged in that order), pixel layout, ICC profile and dpi."""
    exif, rights = read_exif(im, flags)
    rights.update(read_iptc(im, flags))
    rights.update(read_xmp(im, flags))
    return _Described(
        exif=exif,
        rights=rights,
        mode=im.mode,
        bit_depth=_bit_depth(im, fmt, head),
        alpha=_has_alpha(im),
        icc=bool(im.info.get("icc_profile")),
        icc_profile=_icc_profile_name(im.info.get("icc_profile"), flags),
        dpi=_dpi(im),
    )


def _check_pixels(
    im: Image.Image, fmt: str, geo: _Geometry, path: Path, max_pixels: int, full_decode: bool
) -> HashFacts | None:
    """PNG CRCs, the full decode (skipped for a JPEG when full_decode is False) and, for
    formats other than JPEG, the hash of the pixels just decoded; None means "hash later"."""
    if fmt == "PNG":
        _verify_png(path, max_pixels)
    if full_decode or fmt != "JPEG":
        _decode_all(im, path)
    if fmt != "JPEG":  # draft() only helps JPEG; elsewhere hash the pixels just decoded
        return _hash(im, geo.orientation, path)
    return None


def _facts(
    fmt: str,
    geo: _Geometry,
    described: _Described,
    frames: int,
    hashes: HashFacts,
    flags: list[str],
    mismatch: str | None,
) -> ImageFacts:
    """Assemble the ImageFacts; a non-default orientation is also kept in the EXIF summary."""
    if geo.orientation != 1:
        described.exif["orientation"] = geo.orientation
    mime, ext, _ = FORMATS[fmt]
    phash, mirror, blank = hashes.phash, hashes.mirror, hashes.blank
    if blank:  # a flat picture (collector.checks.pixels.is_blank): never compared by look
        flags.append("blank")
    return ImageFacts(
        format=fmt,
        mime=mime,
        ext=ext,
        width=geo.width,
        height=geo.height,
        display_width=geo.display_width,
        display_height=geo.display_height,
        mode=described.mode,
        bit_depth=described.bit_depth,
        alpha=described.alpha,
        frames=frames,
        animated=frames > 1,
        orientation=geo.orientation,
        icc=described.icc,
        dpi=described.dpi,
        icc_profile=described.icc_profile,
        phash=phash,
        phash_mirror=mirror,
        hash_algo=HASH_ALGO,
        exif=described.exif,
        rights=described.rights,
        flags=flags,
        type_mismatch=mismatch,
        turns=hashes.turns,
        window_hashes=hashes.windows,
    )


def _measure_pixels(im: Image.Image, path: Path, *, decoded: bool, alpha: bool,
                    native: bool, max_pixels: int) -> PixelFacts:
    """Transparency share and native-size estimate (collector.checks.pixel_facts) of the
    first frame. A JPEG not decoded at full size (the draft path) has no alpha (Pillow docs,
    JPEG modes L, RGB, CMYK) and is decoded as full-size luma only when ``native`` asks."""
    share = transparent_share(im) if decoded and alpha else 0.0
    if decoded:
        return PixelFacts(share, estimate_enlargement(im))
    if not native:
        return PixelFacts(share, None)
    with _open(path, max_pixels) as luma:
        luma.draft("L", luma.size)  # libjpeg decodes luma only, no colour conversion
        _decode_all(luma, path)
        return PixelFacts(share, estimate_enlargement(luma))


def _apply_policies(pixel: PixelFacts, path: Path, flags: list[str], *, transparent: str,
                    enlarged: str, min_side: int) -> None:
    """The recipe's transparency and enlargement policies: flag, or raise ImageRejected."""
    for policy, reason, detail in verdicts(pixel, transparent=transparent, enlarged=enlarged,
                                           min_side=min_side):
        if policy == "reject":
            raise ImageRejected(reason, detail)  # no temp-file name: the recipe's own words
        flags.append(reason)


def inspect_image(
    path: Path,
    *,
    content_type: str | None = None,
    url: str | None = None,
    max_pixels: int = 89_478_485,
    min_side: int = 0,
    min_aspect: float = 0.0,
    max_aspect: float = 0.0,
    full_decode: bool = True,
    transparent: str = "keep",
    enlarged: str = "keep",
    colours: int = 5,
) -> ImageFacts:
    """Check one image file and collect its facts; raise ImageRejected(reason, detail) if unfit.

    The checks run in this order, and the first that fails decides the reason: signature
    (not_an_image), open and pixel limit (decompression_bomb, broken_image), format agreement
    (broken_image), shape (too_small, bad_aspect), then, after the metadata is read, PNG CRCs
    and the decode (broken_image).

    full_decode=False: a JPEG's one draft decode (hash and colour facts, 1/8 scale, every block
    entropy-decoded) is the integrity check; it caught the same truncations as a full decode
    (missing EOI, cut at 50%/90%) in a probe. Other formats are always decoded in full.

    max_pixels above Pillow's global Image.MAX_IMAGE_PIXELS has no effect unless that global is
    raised too (Pillow checks it inside Image.open).

    transparent / enlarged: the recipe's policies ("keep", "flag", "reject") for images with
    transparent pixels and images that look enlarged (collector.checks.pixel_facts); they run
    after the decode (reasons ``transparent``, ``enlarged``). The native size is estimated on
    every fully decoded image; a JPEG on the draft path is decoded again (luma only) for it
    only when ``enlarged`` is not "keep".
    colours: dominant colours in the colour facts (collector.checks.colour_facts); 0: none.
    """
    path = Path(path)
    flags: list[str] = []
    # one opening of the file for its signature and for the image library
    with path.open("rb") as fh, _open_identified(fh, max_pixels) as (head, fmt, im):
        mismatch = type_mismatch(fmt, content_type, url)
        _mismatch_flag(mismatch, flags)
        geo = _geometry(im, fmt, path)
        _check_shape(geo, path, min_side, min_aspect, max_aspect)
        described = _describe(im, fmt, head, flags)
        hashes = _check_pixels(im, fmt, geo, path, max_pixels, full_decode)
        frames = int(getattr(im, "n_frames", 1) or 1)
        decoded = full_decode or fmt != "JPEG"
        pixel = _measure_pixels(im, path, decoded=decoded, alpha=described.alpha,
                                native=enlarged != "keep", max_pixels=max_pixels)
        colour = _colour(im, colours, path) if hashes is not None and colours else None
        if not decoded:  # a JPEG on the draft path: this opened file's one draft decode
            hashes, colour = _from_drafts(im, path, max_pixels, geo.orientation, colours)
    _apply_policies(pixel, path, flags, transparent=transparent, enlarged=enlarged,
                    min_side=min_side)
    if hashes is None:  # a JPEG decoded in full: hash and colour from its draft, reopened
        hashes, colour = _reopened(path, max_pixels, geo.orientation, colours)
    facts = _facts(fmt, geo, described, frames, hashes, flags, mismatch)
    facts.pixel = pixel
    facts.colour = colour
    return facts


def _from_drafts(im: Image.Image, path: Path, max_pixels: int, orientation: int,
                 colours: int) -> tuple[HashFacts, ColourFacts | None]:
    """A JPEG's hashes and colour facts from ONE draft decode: the HASH_ALGO draft asked for
    as YCbCr (collector.checks.phash.hash_draft), whose Y band is the hash's luma bit for bit
    and whose colour the facts use (none when ``colours`` is 0). A second draft is decoded
    only where that one cannot serve: a draft smaller than the colour facts' picture
    (``WORK_SIDE``), a file whose components are RGB (a luma draft), or one whose YCbCr
    libjpeg refuses (RGB-coded without saying so). ``im`` is the file opened, not loaded."""
    full_size, coded_as = im.size, im.mode
    hash_draft(im, colour=bool(colours))
    try:
        im.load()
    except _DECODE_ERRORS as exc:
        if im.mode != "YCbCr":
            raise ImageRejected("broken_image", damage(exc)) from exc
        return _from_two_drafts(path, max_pixels, orientation, colours)
    hashes = _hash(im, orientation, path)
    if not colours:
        return hashes, None
    luma_only = im.mode == "L" and coded_as != "L"  # RGB-coded: see hash_draft
    if not luma_only and (max(im.size) >= WORK_SIDE or im.size == full_size):
        return hashes, _colour(im, colours, path)
    return hashes, _colour_draft(path, max_pixels, colours)


def _reopened(path: Path, max_pixels: int, orientation: int,
              colours: int) -> tuple[HashFacts, ColourFacts | None]:
    """:func:`_from_drafts` of the file opened afresh (the first open was decoded in full)."""
    with _open(path, max_pixels) as im:
        return _from_drafts(im, path, max_pixels, orientation, colours)


def _from_two_drafts(path: Path, max_pixels: int, orientation: int,
                     colours: int) -> tuple[HashFacts, ColourFacts | None]:
    """A JPEG's hashes from a luma draft and its colour facts from a colour draft."""
    with _open(path, max_pixels) as im:
        hashes = _hash(im, orientation, path)
    return hashes, (_colour_draft(path, max_pixels, colours) if colours else None)


def _colour_draft(path: Path, max_pixels: int, colours: int) -> ColourFacts:
    """The colour facts of a JPEG from its own colour draft (1/2..1/8 scale, sides at least
    ``WORK_SIDE``)."""
    with _open(path, max_pixels) as im:
        im.draft("RGB", (WORK_SIDE, WORK_SIDE))
        return _colour(im, colours, path)


def _colour(im: Image.Image, colours: int, path: Path) -> ColourFacts:
    """The colour facts of the first frame (collector.checks.colour_facts)."""
    try:
        # a JPEG's YCbCr draft as it is: colour_facts reduces it before converting it
        picture = im if im.mode == "YCbCr" else colour_ready(im, WORK_SIDE)
        return colour_facts(picture, colours=colours)
    except _DECODE_ERRORS as exc:
        raise ImageRejected("broken_image", damage(exc)) from exc
