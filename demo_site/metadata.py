"""Byte-level builders for embedded metadata and deliberately broken files.

Pillow writes EXIF and XMP but not IPTC, so the IPTC-IIM block is built by hand
(standards.md §6.2: datasets ``1C 02 nn`` + 2-byte length, inside JPEG APP13
"Photoshop 3.0" / 8BIM resource 0x0404).
"""

from __future__ import annotations

import io
import struct
import zlib
from xml.sax.saxutils import escape

from PIL import Image

# Exif tag ids, CIPA DC-008 (standards.md §6.1)
TAG_ORIENTATION = 0x0112
TAG_ARTIST = 0x013B
TAG_COPYRIGHT = 0x8298
TAG_GPS_IFD = 0x8825
# IPTC-IIM Record 2 datasets (standards.md §6.2)
IIM_BYLINE = 0x50
IIM_COPYRIGHT = 0x74


def exif_bytes(*, orientation: int | None = None, artist: str | None = None,
               copyright_notice: str | None = None,
               gps: tuple[float, float] | None = None) -> bytes:
    """Serialise an Exif block (for ``save(exif=...)``) with the given fields."""
    exif = Image.Exif()
    if orientation is not None:
        exif[TAG_ORIENTATION] = orientation
    if artist is not None:
        exif[TAG_ARTIST] = artist
    if copyright_notice is not None:
        exif[TAG_COPYRIGHT] = copyright_notice
    if gps is not None:
        lat, lon = gps
        ifd = exif.get_ifd(TAG_GPS_IFD)
        # GPS IFD tags 1-4: LatitudeRef, Latitude, LongitudeRef, Longitude (Exif 2.3 §4.6.6)
        ifd[1] = "N" if lat >= 0 else "S"
        ifd[2] = _dms(abs(lat))
        ifd[3] = "E" if lon >= 0 else "W"
        ifd[4] = _dms(abs(lon))
    return exif.tobytes()


def _dms(value: float) -> tuple[float, float, float]:
    deg = int(value)
    minutes = int((value - deg) * 60)
    seconds = round(((value - deg) * 60 - minutes) * 60, 2)
    return (float(deg), float(minutes), float(seconds))


def iptc_app13(byline: str | None, copyright_notice: str | None) -> bytes:
    """Build a complete JPEG APP13 segment holding IPTC-IIM By-line and Copyright Notice."""
    iim = bytearray()
    # 2:00 Record Version = 4, customary first dataset of record 2 (from memory)
    iim += b"\x1c\x02\x00" + struct.pack(">H", 2) + struct.pack(">H", 4)
    for dataset, text in ((IIM_BYLINE, byline), (IIM_COPYRIGHT, copyright_notice)):
        if text is None:
            continue
        value = text.encode("utf-8")
        iim += bytes([0x1C, 0x02, dataset]) + struct.pack(">H", len(value)) + value
    if len(iim) % 2:
        iim += b"\x00"  # 8BIM resource data is padded to an even length (from memory)
    resource = b"8BIM" + struct.pack(">H", 0x0404) + b"\x00\x00" + struct.pack(">I", len(iim))
    payload = b"Photoshop 3.0\x00" + resource + bytes(iim)
    return b"\xff\xed" + struct.pack(">H", len(payload) + 2) + payload


def insert_jpeg_segment(jpeg: bytes, segment: bytes) -> bytes:
    """Insert a marker segment after SOI and any leading APPn segments of a JPEG."""
    if jpeg[:2] != b"\xff\xd8":
        raise ValueError("not a JPEG stream (no SOI marker)")
    pos = 2
    while pos + 4 <= len(jpeg) and jpeg[pos] == 0xFF and 0xE0 <= jpeg[pos + 1] <= 0xEF:
        (length,) = struct.unpack(">H", jpeg[pos + 2:pos + 4])
        pos += 2 + length
    return jpeg[:pos] + segment + jpeg[pos:]


def xmp_packet(*, creator: str | None = None, rights: str | None = None,
               web_statement: str | None = None, marked: bool | None = None) -> bytes:
    """An XMP packet with dc:creator, dc:rights, xmpRights:Marked/WebStatement (§6.3)."""
    parts = []
    if creator is not None:
        parts.append(f"<dc:creator><rdf:Seq><rdf:li>{escape(creator)}</rdf:li></rdf:Seq>"
                     "</dc:creator>")
    if rights is not None:
        parts.append("<dc:rights><rdf:Alt><rdf:li xml:lang=\"x-default\">"
                     f"{escape(rights)}</rdf:li></rdf:Alt></dc:rights>")
    if marked is not None:
        parts.append(f"<xmpRights:Marked>{'True' if marked else 'False'}</xmpRights:Marked>")
    if web_statement is not None:
        parts.append(f"<xmpRights:WebStatement>{escape(web_statement)}"
                     "</xmpRights:WebStatement>")
    body = "\n   ".join(parts)
    text = (
        '<?xpacket begin="\ufeff" id="W5M0MpCehiHzreSzNTczkc9d"?>\n'
        '<x:xmpmeta xmlns:x="adobe:ns:meta/">\n'
        ' <rdf:RDF xmlns:rdf="http://www.w3.org/1999/02/22-rdf-syntax-ns#">\n'
        '  <rdf:Description rdf:about=""\n'
        '    xmlns:dc="http://purl.org/dc/elements/1.1/"\n'
        '    xmlns:xmpRights="http://ns.adobe.com/xap/1.0/rights/">\n'
        f"   {body}\n"
        "  </rdf:Description>\n"
        " </rdf:RDF>\n"
        "</x:xmpmeta>\n"
        '<?xpacket end="w"?>'
    )
    return text.encode("utf-8")


def _png_chunk(kind: bytes, data: bytes) -> bytes:
    # PNG spec §5.3: length, type, data, CRC-32 over type + data
    return (struct.pack(">I", len(data)) + kind + data
            + struct.pack(">I", zlib.crc32(kind + data) & 0xFFFFFFFF))


def bomb_png(side: int = 30000) -> bytes:
    """A valid 1-bit greyscale PNG of side×side zero pixels (~107 KiB for 30000²).

    Its header claims side² pixels, far above Pillow's 2×89,478,485 error limit
    (libraries.md §7), so a careful reader refuses it at open().
    """
    ihdr = struct.pack(">IIBBBBB", side, side, 1, 0, 0, 0, 0)
    row = b"\x00" * (1 + (side + 7) // 8)  # filter byte 0 + packed 1-bit pixels
    comp = zlib.compressobj(9)
    chunks = []
    block = row * 1000
    full, rest = divmod(side, 1000)
    for _ in range(full):
        chunks.append(comp.compress(block))
    chunks.append(comp.compress(row * rest))
    chunks.append(comp.flush())
    return (b"\x89PNG\r\n\x1a\n" + _png_chunk(b"IHDR", ihdr)
            + _png_chunk(b"IDAT", b"".join(chunks)) + _png_chunk(b"IEND", b""))


def truncate(data: bytes, fraction: float = 0.6) -> bytes:
    """Cut a file short (a download that stopped half-way)."""
    return data[: int(len(data) * fraction)]


def encode(im: Image.Image, fmt: str, **params: object) -> bytes:
    """Encode an image to bytes with Pillow."""
    buf = io.BytesIO()
    im.save(buf, fmt, **params)
    return buf.getvalue()


ERROR_PAGE = (
    b"<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">"
    b"<title>502 Bad Gateway</title></head>\n<body><h1>Bad Gateway</h1>"
    b"<p>The image store of the Fernhollow Field Society did not answer in time. "
    b"Please try again later.</p></body></html>\n"
)
