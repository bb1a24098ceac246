"""Image formats by their first bytes, and what a Content-Type or URL says against them
(standards.md section 9: the signatures of PNG, JPEG, GIF, WebP, TIFF 6.0 and BMP)."""

from __future__ import annotations

from pathlib import Path
from urllib.parse import urlsplit

__all__ = ["FORMATS", "describe_non_image", "sniff_format", "type_mismatch"]

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


def describe_non_image(head: bytes) -> str:
    """What a file that is no image seems to be, for the rejection detail."""
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


def type_mismatch(fmt: str, content_type: str | None, url: str | None) -> str | None:
    """How the Content-Type or URL extension disagrees with the bytes' format, or None."""
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
