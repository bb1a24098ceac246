"""Ingest checks for a downloaded file: is it an image, is it whole, what does it say about itself.

``inspect_image`` decides the format from magic bytes (standards.md section 9), decodes the
image fully to catch truncation and corruption, applies size limits, reads dimensions, mode, bit
depth, alpha, frames and EXIF orientation, collects embedded rights metadata (EXIF, IPTC-IIM,
XMP; standards.md section 6) and personal-data flags, and computes the pHash pair.

Images may hold personal data (GPS position, camera serial numbers, owner names, faces): the
flags point at it; what to do with it is the user's decision.

Cost per JPEG (1 MP, one core, see bench/ingest_parts.py): one full decode for the integrity
check, plus one header parse and a draft (1/8 scale) decode for the hash.
"""

from __future__ import annotations

import io
import struct
import warnings
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, cast
from urllib.parse import urlsplit

from PIL import ExifTags, Image, ImageFile, IptcImagePlugin

from collector.checks.phash import HASH_ALGO, phash_prepared, to_signed64
from collector.errors import ImageRejected

__all__ = ["FORMATS", "RIGHTS_KEYS", "ImageFacts", "inspect_image", "sniff_format"]

# format -> (mime, canonical extension, other extensions)
FORMATS: dict[str, tuple[str, str, tuple[str, ...]]] = {
    "PNG": ("image/png", "png", ()),
    "JPEG": ("image/jpeg", "jpg", ("jpeg", "jpe", "jfif")),
    "GIF": ("image/gif", "gif", ()),
    "WEBP": ("image/webp", "webp", ()),
    "TIFF": ("image/tiff", "tif", ("tiff",)),
    "BMP": ("image/bmp", "bmp", ("dib",)),
}
_MIME_ALIASES = {
    "image/jpg": "image/jpeg",
    "image/pjpeg": "image/jpeg",
    "image/x-png": "image/png",
    "image/x-ms-bmp": "image/bmp",
    "image/x-bmp": "image/bmp",
    "image/tif": "image/tiff",
    "image/x-tiff": "image/tiff",
}
# Content types that say nothing about the format, so no mismatch is recorded.
_GENERIC_TYPES = {"application/octet-stream", "binary/octet-stream", "application/unknown"}

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
        }


# --- format detection (standards.md section 9) -------------------------------------------------
def sniff_format(head: bytes) -> str | None:
    """Image format named by the first bytes of a file, or None."""
    if head.startswith(b"\x89PNG\r\n\x1a\n"):
        return "PNG"
    if head.startswith(b"\xff\xd8\xff"):
        return "JPEG"
    if head[:6] in (b"GIF87a", b"GIF89a"):
        return "GIF"
    if head[:4] == b"RIFF" and head[8:12] == b"WEBP":
        return "WEBP"
    if head[:4] in (b"II*\x00", b"MM\x00*"):  # TIFF 6.0 section 2; not "MM*\0"
        return "TIFF"
    if head[:2] == b"BM":
        return "BMP"
    return None


def _describe_non_image(head: bytes) -> str:
    text = head.lstrip(b"\xef\xbb\xbf \t\r\n").lower()
    if text.startswith((b"<!doctype html", b"<html", b"<head", b"<body")):
        return "the bytes are an HTML page"
    if text.startswith((b"<?xml", b"<svg")):
        return "the bytes are XML/SVG, not a raster image"
    if text.startswith((b"{", b"[")):
        return "the bytes look like JSON"
    if not head:
        return "the file is empty"
    if all(32 <= b < 127 or b in (9, 10, 13) for b in head[:64]):
        return "the bytes are plain text"
    return f"unknown file signature {head[:8].hex(' ')}"


def _type_mismatch(fmt: str, content_type: str | None, url: str | None) -> str | None:
    mime, ext, other_exts = FORMATS[fmt]
    problems = []
    if content_type:
        declared = content_type.split(";", 1)[0].strip().lower()
        declared = _MIME_ALIASES.get(declared, declared)
        if declared and declared not in _GENERIC_TYPES and declared != mime:
            problems.append(f"content_type={declared}")
    if url:
        suffix = Path(urlsplit(url).path).suffix.lower().lstrip(".")
        known = {e for _, e0, es in FORMATS.values() for e in (e0, *es)}
        if suffix in known and suffix not in (ext, *other_exts):
            problems.append(f"url_ext=.{suffix}")
    if not problems:
        return None
    return f"bytes are {mime} but " + ", ".join(problems)


# --- small helpers -----------------------------------------------------------------------------
# The longest IPTC text field, Caption/Abstract, is 2000 bytes (IIM 2:120); a longer embedded
# text is kept in part so one file cannot bloat the ledger.
MAX_TEXT = 2000


def _text(value: Any) -> str | None:
    """Decode EXIF/IPTC values: bytes as UTF-8, else latin-1; strip NULs and blanks."""
    if value is None:
        return None
    if isinstance(value, list | tuple):
        parts = [t for t in (_text(v) for v in value) if t]
        return "; ".join(parts) or None
    if isinstance(value, bytes):
        try:
            value = value.decode("utf-8")
        except UnicodeDecodeError:
            value = value.decode("latin-1")
    text = str(value).replace("\x00", " ").strip()
    if len(text) > MAX_TEXT:
        text = text[:MAX_TEXT] + f"... [{len(text) - MAX_TEXT} more characters not kept]"
    return text or None


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


# --- EXIF (standards.md section 6.1) ----------------------------------------------------------
def _dms_to_decimal(dms: Any, ref: Any) -> float | None:
    try:
        d, m, s = (float(v) for v in dms)
    except (TypeError, ValueError, ZeroDivisionError):
        return None
    value = d + m / 60 + s / 3600
    if _text(ref) in ("S", "W"):
        value = -value
    return round(value, 6)


def _read_exif(im: Image.Image, flags: list[str]) -> tuple[dict[str, Any], dict[str, Any]]:
    """(summary, rights) from EXIF; adds personal-data flags."""
    summary: dict[str, Any] = {}
    rights: dict[str, Any] = {}
    try:
        exif = im.getexif()
        exif_ifd = exif.get_ifd(ExifTags.IFD.Exif)
        gps = exif.get_ifd(ExifTags.IFD.GPSInfo)
    except Exception:  # malformed IFDs come in many shapes; record and carry on
        flags.append("exif_unreadable")
        return summary, rights
    base = {
        "make": exif.get(ExifTags.Base.Make),
        "model": exif.get(ExifTags.Base.Model),
        "datetime": exif.get(ExifTags.Base.DateTime),
        "datetime_original": exif_ifd.get(ExifTags.Base.DateTimeOriginal),
        "software": exif.get(ExifTags.Base.Software),
    }
    summary.update({k: t for k, v in base.items() if (t := _text(v))})
    for key, tag in (
        ("exif_artist", ExifTags.Base.Artist),  # 315
        ("exif_copyright", ExifTags.Base.Copyright),  # 33432
        ("exif_description", ExifTags.Base.ImageDescription),  # 270
    ):
        if text := _text(exif.get(tag)):
            rights[key] = text
    # Camera serial: BodySerialNumber 0xA431 (Exif IFD); DNG CameraSerialNumber 0xC62F (IFD0).
    serial = _text(exif_ifd.get(0xA431)) or _text(exif.get(0xC62F))
    if serial:
        summary["camera_serial"] = serial
        flags.append("camera_serial")
    owner = _text(exif_ifd.get(0xA430))  # CameraOwnerName
    if owner:
        summary["owner_name"] = owner
        flags.append("owner_name")
    if gps:
        lat = _dms_to_decimal(
            gps.get(ExifTags.GPS.GPSLatitude), gps.get(ExifTags.GPS.GPSLatitudeRef)
        )
        lon = _dms_to_decimal(
            gps.get(ExifTags.GPS.GPSLongitude), gps.get(ExifTags.GPS.GPSLongitudeRef)
        )
        if lat is not None or lon is not None:
            summary["gps"] = {"lat": lat, "lon": lon}
            flags.append("gps")
    return summary, rights


# --- IPTC-IIM (standards.md section 6.2) ------------------------------------------------------
_IPTC_FIELDS = {
    (2, 80): "iptc_byline",
    (2, 116): "iptc_copyright",
    (2, 110): "iptc_credit",
    (2, 115): "iptc_source",
    (2, 120): "iptc_caption",
}


def _read_iptc(im: Image.Image, flags: list[str]) -> dict[str, Any]:
    try:
        # Only opened files carry IPTC; getiptcinfo reads the file's own segments.
        info = IptcImagePlugin.getiptcinfo(cast(ImageFile.ImageFile, im))
    except Exception:
        flags.append("iptc_unreadable")
        return {}
    if not info:
        return {}
    return {key: t for ds, key in _IPTC_FIELDS.items() if (t := _text(info.get(ds)))}


# --- XMP (standards.md section 6.3) ------------------------------------------------------------
_XMP_FIELDS = {
    "{http://purl.org/dc/elements/1.1/}creator": "xmp_creator",
    "{http://purl.org/dc/elements/1.1/}rights": "xmp_rights",
    "{http://ns.adobe.com/xap/1.0/rights/}WebStatement": "xmp_web_statement",
    "{http://ns.adobe.com/xap/1.0/rights/}UsageTerms": "xmp_usage_terms",
    "{http://ns.adobe.com/xap/1.0/rights/}Marked": "xmp_marked",
    "{http://creativecommons.org/ns#}license": "xmp_license",
}
_RDF = "{http://www.w3.org/1999/02/22-rdf-syntax-ns#}"


def _xmp_value(node: Any) -> str | None:
    """Flatten an XMP value: text, rdf:Seq/Bag/Alt of rdf:li, or an rdf:resource attribute."""
    if node is None:
        return None
    if isinstance(node, str):
        return node.strip() or None
    if isinstance(node, list):
        parts = [v for v in (_xmp_value(n) for n in node) if v]
        return "; ".join(dict.fromkeys(parts)) or None
    if isinstance(node, dict):
        for key in (
            f"{_RDF}Seq",
            f"{_RDF}Bag",
            f"{_RDF}Alt",
            f"{_RDF}li",
            "text",
            f"{_RDF}resource",
        ):
            if key in node:
                return _xmp_value(node[key])
    return None


def _descriptions(xmp: dict) -> list[dict]:
    meta = xmp.get("{adobe:ns:meta/}xmpmeta", xmp)
    rdf = meta.get(f"{_RDF}RDF", {}) if isinstance(meta, dict) else {}
    desc = rdf.get(f"{_RDF}Description", []) if isinstance(rdf, dict) else []
    return [d for d in (desc if isinstance(desc, list) else [desc]) if isinstance(d, dict)]


def _read_xmp(im: Image.Image, flags: list[str]) -> dict[str, Any]:
    raw = im.info.get("xmp") or im.info.get("XML:com.adobe.xmp")
    if not raw and not hasattr(im, "tag_v2"):
        return {}
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("error")  # "XMP data cannot be read without defusedxml"
            xmp = im.getxmp(strip_namespaces=False)
    except Exception:  # defusedxml EntitiesForbidden (entity bombs), ParseError, ...
        flags.append("xmp_unreadable")
        return {}
    out: dict[str, Any] = {}
    for desc in _descriptions(xmp):
        for name, key in _XMP_FIELDS.items():
            value = _xmp_value(desc.get(name))
            if value and key not in out:
                out[key] = value
    if "xmp_marked" in out:  # Boolean "True"/"False" (standards.md 6.3)
        marked = str(out["xmp_marked"]).strip().lower()
        out["xmp_marked"] = True if marked == "true" else False if marked == "false" else None
        if out["xmp_marked"] is None:
            del out["xmp_marked"]
    return out


def _orientation(im: Image.Image) -> int:
    try:
        return int(im.getexif().get(ExifTags.Base.Orientation, 1) or 1)
    except Exception:  # unreadable EXIF is reported by _read_exif
        return 1


def _hash(im: Image.Image, orientation: int, path: Path) -> tuple[int, int]:
    try:
        return phash_prepared(im, orientation)
    except _DECODE_ERRORS as exc:
        raise ImageRejected("broken_image", f"{path.name}: decoding failed: {exc}") from exc


# --- the check ---------------------------------------------------------------------------------
# What Pillow raises on damaged files: OSError ("image file is truncated"), SyntaxError (PNG
# CRC), ValueError/EOFError/struct.error from plugin parsers (libraries.md section 7).
_DECODE_ERRORS = (OSError, SyntaxError, ValueError, EOFError, IndexError, TypeError, struct.error)


def _open(path: Path, max_pixels: int) -> Image.Image:
    """Image.open with Pillow's bomb warning raised as an error here only (libraries.md 7)."""
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("error", Image.DecompressionBombWarning)
            im = Image.open(path)
    except (Image.DecompressionBombError, Image.DecompressionBombWarning) as exc:
        raise ImageRejected("decompression_bomb", f"{path.name}: {exc}") from exc
    except _DECODE_ERRORS as exc:
        raise ImageRejected("broken_image", f"{path.name}: Pillow cannot open it: {exc}") from exc
    w, h = im.size
    if w * h > max_pixels:
        im.close()
        raise ImageRejected(
            "decompression_bomb",
            f"{path.name}: {w}x{h} = {w * h} pixels is over the limit of {max_pixels}; "
            "raise [images] max_pixels if such images are expected",
        )
    return im


def _verify_png(path: Path, max_pixels: int) -> None:
    """PNG chunk CRCs via verify(), which is a no-op for JPEG (libraries.md section 7)."""
    try:
        with _open(path, max_pixels) as im:
            im.verify()
    except ImageRejected:
        raise
    except _DECODE_ERRORS as exc:
        raise ImageRejected("broken_image", f"{path.name}: PNG check failed: {exc}") from exc


def _decode_all(im: Image.Image, path: Path) -> None:
    """Decode every pixel of the current frame; raise broken_image on any decoder error."""
    # A full RGB decode. Asking libjpeg for YCbCr at full size (draft) to skip the colour
    # conversion was measured 15% SLOWER with libjpeg-turbo (bench/ingest_parts.py).
    try:
        im.load()
    except _DECODE_ERRORS as exc:
        raise ImageRejected("broken_image", f"{path.name}: decoding failed: {exc}") from exc


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
) -> ImageFacts:
    """Check one image file and collect its facts; raise ImageRejected(reason, detail) if unfit.

    full_decode=False lets a JPEG's draft decode for the hash (1/8 scale, every block still
    entropy-decoded) serve as the integrity check instead of a full-size decode; it caught the
    same truncations (missing EOI, cut at 50%/90%) in a probe and is ~3x cheaper. Other formats
    are always decoded in full.

    max_pixels above Pillow's global Image.MAX_IMAGE_PIXELS has no effect unless that global is
    raised too (Pillow checks it inside Image.open).
    """
    path = Path(path)
    with path.open("rb") as fh:
        head = fh.read(64)
    fmt = sniff_format(head)
    if fmt is None:
        raise ImageRejected("not_an_image", f"{path.name}: {_describe_non_image(head)}")
    flags: list[str] = []
    mismatch = _type_mismatch(fmt, content_type, url)
    if mismatch:
        kinds = "+".join(p.split("=", 1)[0] for p in mismatch.split(" but ", 1)[1].split(", "))
        flags.append(f"type_mismatch:{kinds}")

    with _open(path, max_pixels) as im:
        if im.format != fmt:
            raise ImageRejected(
                "broken_image", f"{path.name}: signature says {fmt} but Pillow read {im.format}"
            )
        width, height = im.size
        orientation = _orientation(im)
        if orientation not in range(1, 9):
            orientation = 1  # reserved values (standards.md 6.1) are treated as "no rotation"
        dw, dh = (height, width) if orientation in (5, 6, 7, 8) else (width, height)
        shortest = min(dw, dh)
        if min_side and shortest < min_side:
            raise ImageRejected(
                "too_small", f"{path.name}: shortest side {shortest}px is under min_side {min_side}"
            )
        aspect = dw / dh if dh else 0.0
        if (min_aspect and aspect < min_aspect) or (max_aspect and aspect > max_aspect):
            raise ImageRejected(
                "bad_aspect",
                f"{path.name}: width/height {aspect:.3f} is outside "
                f"min_aspect {min_aspect or 'off'} .. max_aspect {max_aspect or 'off'}",
            )
        exif, rights = _read_exif(im, flags)
        rights.update(_read_iptc(im, flags))
        rights.update(_read_xmp(im, flags))
        facts_mode = im.mode
        bit_depth = _bit_depth(im, fmt, head)
        alpha = _has_alpha(im)
        icc = bool(im.info.get("icc_profile"))
        icc_profile = _icc_profile_name(im.info.get("icc_profile"), flags)
        dpi = _dpi(im)
        if fmt == "PNG":
            _verify_png(path, max_pixels)
        if full_decode or fmt != "JPEG":
            _decode_all(im, path)
        hashes = None
        if fmt != "JPEG":  # draft() only helps JPEG; elsewhere hash the pixels just decoded
            hashes = _hash(im, orientation, path)
        frames = int(getattr(im, "n_frames", 1) or 1)

    if hashes is None:  # JPEG: a second, draft-mode decode at 1/8 scale (HASH_ALGO pipeline)
        with _open(path, max_pixels) as im:
            hashes = _hash(im, orientation, path)
    phash, mirror = hashes

    if orientation != 1:
        exif["orientation"] = orientation
    mime, ext, _ = FORMATS[fmt]
    return ImageFacts(
        format=fmt,
        mime=mime,
        ext=ext,
        width=width,
        height=height,
        display_width=dw,
        display_height=dh,
        mode=facts_mode,
        bit_depth=bit_depth,
        alpha=alpha,
        frames=frames,
        animated=frames > 1,
        orientation=orientation,
        icc=icc,
        dpi=dpi,
        icc_profile=icc_profile,
        phash=phash,
        phash_mirror=mirror,
        hash_algo=HASH_ALGO,
        exif=exif,
        rights=rights,
        flags=flags,
        type_mismatch=mismatch,
    )
