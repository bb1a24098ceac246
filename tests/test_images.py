"""inspect_image on real files generated with Pillow (and a few hand-built byte layouts)."""

from __future__ import annotations

import json
import struct
import zlib
from pathlib import Path

import imagehash
import numpy as np
import pytest
from PIL import Image, ImageDraw

from collector.checks.images import inspect_image, sniff_format
from collector.checks.phash import hamming, hash_image_file
from collector.errors import ImageRejected


def scene(size: tuple[int, int] = (320, 240), seed: int = 0) -> Image.Image:
    """A small structured RGB picture (gradient plus shapes)."""
    rng = np.random.default_rng(seed)
    w, h = size
    grad = np.linspace(0, 255, w, dtype=np.float64)[None, :] * np.ones((h, 1))
    im = Image.fromarray(np.stack([grad, grad[::-1], grad * 0.5], -1).astype(np.uint8))
    draw = ImageDraw.Draw(im)
    for _ in range(4):
        x0, x1 = sorted(rng.integers(0, w, 2))
        y0, y1 = sorted(rng.integers(0, h, 2))
        draw.ellipse([x0, y0, x1 + 3, y1 + 3], fill=tuple(int(c) for c in rng.integers(0, 256, 3)))
    return im


def rejected(path: Path, **kw) -> ImageRejected:
    with pytest.raises(ImageRejected) as info:
        inspect_image(path, **kw)
    return info.value


# --- formats by magic bytes (standards.md section 9) -------------------------------------------
@pytest.mark.parametrize(
    ("fmt", "suffix", "signature"),
    [
        ("PNG", "png", b"\x89PNG\r\n\x1a\n"),
        ("JPEG", "jpg", b"\xff\xd8\xff"),
        ("GIF", "gif", b"GIF8"),
        ("WEBP", "webp", b"RIFF"),
        ("TIFF", "tif", b"II*\x00"),
        ("BMP", "bmp", b"BM"),
    ],
)
def test_each_supported_format_is_recognised_by_its_signature(tmp_path, fmt, suffix, signature):
    """Files written by Pillow start with the standards.md section 9 signature and are accepted."""
    path = tmp_path / f"pic.{suffix}"
    scene().save(path, format=fmt)
    assert path.read_bytes().startswith(signature)
    facts = inspect_image(path)
    assert (facts.format, facts.ext, facts.width, facts.height) == (fmt, suffix, 320, 240)


def test_webp_needs_the_webp_tag_at_offset_8_not_just_riff():
    """RIFF....WEBP is WebP; a RIFF WAVE file is not (RFC 9649 layout, standards.md 9)."""
    assert sniff_format(b"RIFF\x10\x00\x00\x00WEBPVP8 ") == "WEBP"
    assert sniff_format(b"RIFF\x10\x00\x00\x00WAVEfmt ") is None


def test_big_endian_tiff_signature_is_mm_00_2a():
    """TIFF big-endian is 4D 4D 00 2A; the misprinted 4D 4D 2A 00 is not TIFF (standards.md 9)."""
    assert sniff_format(b"MM\x00*\x00\x00\x00\x08") == "TIFF"
    assert sniff_format(b"MM*\x00\x00\x00\x00\x08") is None


def test_big_endian_tiff_file_is_accepted(tmp_path):
    """A big-endian 16-bit TIFF (Pillow writes I;16B as MM) is recognised and read."""
    path = tmp_path / "be.tif"
    grey = np.asarray(scene().convert("L")).astype(">u2") * 257
    Image.frombytes("I;16B", (320, 240), grey.tobytes()).save(path, format="TIFF")
    assert path.read_bytes()[:4] == b"MM\x00*"
    facts = inspect_image(path)
    assert (facts.format, facts.bit_depth) == ("TIFF", 16)


# --- rejections --------------------------------------------------------------------------------
def test_html_page_named_jpg_is_not_an_image(tmp_path):
    """An HTML error page saved as .jpg is rejected as not_an_image."""
    path = tmp_path / "photo.jpg"
    path.write_bytes(b"<!DOCTYPE html><html><body>404 Not Found</body></html>")
    err = rejected(path, content_type="image/jpeg")
    assert err.reason == "not_an_image"
    assert "HTML" in err.detail


def test_plain_text_and_unknown_bytes_are_not_images(tmp_path):
    """Text and unknown signatures are not_an_image."""
    text = tmp_path / "a.png"
    text.write_bytes(b"Sorry, this specimen image is no longer available.\n")
    blob = tmp_path / "b.png"
    blob.write_bytes(bytes(range(200, 256)) * 4)
    assert rejected(text).reason == "not_an_image"
    assert rejected(blob).reason == "not_an_image"


@pytest.mark.parametrize("full_decode", [True, False])
def test_jpeg_missing_only_the_eoi_marker_is_broken(tmp_path, full_decode):
    """Dropping the final FF D9 makes load() fail, so the file is broken_image (libraries.md 7)."""
    path = tmp_path / "cut.jpg"
    scene().save(path, quality=90)
    data = path.read_bytes()
    assert data[-2:] == b"\xff\xd9"  # EOI (standards.md section 9)
    path.write_bytes(data[:-2])
    assert rejected(path, full_decode=full_decode).reason == "broken_image"


def test_jpeg_cut_in_half_is_broken(tmp_path):
    """A JPEG truncated at 50% is broken_image (libraries.md section 7)."""
    path = tmp_path / "half.jpg"
    scene().save(path, quality=90)
    data = path.read_bytes()
    path.write_bytes(data[: len(data) // 2])
    assert rejected(path).reason == "broken_image"


def _png_chunks(data: bytes) -> list[tuple[int, bytes, bytes]]:
    out, pos = [], 8
    while pos < len(data):
        (length,) = struct.unpack(">I", data[pos : pos + 4])
        out.append((pos, data[pos + 4 : pos + 8], data[pos + 8 : pos + 8 + length]))
        pos += 12 + length
    return out


def test_png_with_a_flipped_idat_byte_is_broken(tmp_path):
    """One flipped byte inside IDAT fails the CRC / decode (libraries.md section 7)."""
    path = tmp_path / "flip.png"
    scene().save(path)
    data = bytearray(path.read_bytes())
    pos, _, body = next(c for c in _png_chunks(bytes(data)) if c[1] == b"IDAT")
    data[pos + 8 + len(body) // 2] ^= 0xFF
    path.write_bytes(bytes(data))
    assert rejected(path).reason == "broken_image"


def test_png_cut_in_half_is_broken(tmp_path):
    """A PNG truncated at 50% is broken_image."""
    path = tmp_path / "half.png"
    scene().save(path)
    data = path.read_bytes()
    path.write_bytes(data[: len(data) // 2])
    assert rejected(path).reason == "broken_image"


def _png(width: int, height: int, bit_depth: int, colour_type: int, rows: bytes) -> bytes:
    """A PNG built chunk by chunk (PNG spec: signature, IHDR, IDAT, IEND with CRC-32)."""

    def chunk(kind: bytes, body: bytes) -> bytes:
        return (
            struct.pack(">I", len(body)) + kind + body + struct.pack(">I", zlib.crc32(kind + body))
        )

    ihdr = struct.pack(">IIBBBBB", width, height, bit_depth, colour_type, 0, 0, 0)
    return b"\x89PNG\r\n\x1a\n" + chunk(b"IHDR", ihdr) + chunk(b"IDAT", rows) + chunk(b"IEND", b"")


def test_one_bit_30000_square_png_is_a_decompression_bomb(tmp_path):
    """A 1-bit 30000x30000 PNG of ~100 KiB is refused before decoding (libraries.md section 7)."""
    comp = zlib.compressobj(9)
    row = b"\x00" + bytes(30000 // 8)  # filter byte + 3750 bytes of 1-bit pixels
    rows = b"".join(comp.compress(row) for _ in range(30000)) + comp.flush()
    path = tmp_path / "bomb.png"
    path.write_bytes(_png(30000, 30000, 1, 0, rows))
    assert path.stat().st_size < 200_000
    err = rejected(path)
    assert err.reason == "decompression_bomb"


def test_max_pixels_below_pillow_default_is_enforced(tmp_path):
    """A caller's lower max_pixels rejects an image Pillow itself would open."""
    path = tmp_path / "big.png"
    scene((200, 100)).save(path)
    assert rejected(path, max_pixels=19_999).reason == "decompression_bomb"
    assert inspect_image(path, max_pixels=20_000).width == 200


def test_bomb_warning_is_not_turned_into_an_error_globally(tmp_path):
    """After a rejection, Pillow's global warning filters are unchanged."""
    import warnings

    before = list(warnings.filters)
    path = tmp_path / "big.png"
    scene((200, 100)).save(path)
    rejected(path, max_pixels=10)
    assert warnings.filters == before


def test_too_small_uses_the_shortest_displayed_side(tmp_path):
    """min_side rejects an image whose shorter side is under the limit."""
    path = tmp_path / "small.png"
    scene((300, 90)).save(path)
    assert rejected(path, min_side=100).reason == "too_small"
    assert inspect_image(path, min_side=90).height == 90


def test_bad_aspect_outside_bounds(tmp_path):
    """A 4:1 strip is bad_aspect under max_aspect 3; a 1:4 strip under min_aspect 0.5."""
    wide, tall = tmp_path / "wide.png", tmp_path / "tall.png"
    scene((400, 100)).save(wide)
    scene((100, 400)).save(tall)
    assert rejected(wide, max_aspect=3.0).reason == "bad_aspect"
    assert rejected(tall, min_aspect=0.5).reason == "bad_aspect"
    assert inspect_image(wide, min_aspect=0.5, max_aspect=4.0).width == 400


# --- type mismatch -----------------------------------------------------------------------------
def test_content_type_and_extension_mismatch_is_recorded_not_rejected(tmp_path):
    """A valid JPEG served as image/png from a .png URL is kept, with the mismatch recorded."""
    path = tmp_path / "x.bin"
    scene().save(path, format="JPEG")
    facts = inspect_image(path, content_type="image/png", url="http://127.0.0.2/a/leaf.png?s=1")
    assert facts.format == "JPEG"
    assert facts.type_mismatch and "content_type=image/png" in facts.type_mismatch
    assert ".png" in facts.type_mismatch
    assert "type_mismatch:content_type+url_ext" in facts.flags


def test_matching_or_generic_types_are_not_a_mismatch(tmp_path):
    """image/jpg alias, octet-stream and extension-less URLs raise no mismatch."""
    path = tmp_path / "x.jpg"
    scene().save(path)
    for ct, url in [
        ("image/jpeg; charset=binary", "http://127.0.0.2/leaf.JPEG"),
        ("image/jpg", "http://127.0.0.2/media/123"),
        ("application/octet-stream", None),
    ]:
        assert inspect_image(path, content_type=ct, url=url).type_mismatch is None


# --- facts -------------------------------------------------------------------------------------
def test_orientation_6_swaps_the_display_size(tmp_path):
    """Orientation 6 (rotate 90 deg clockwise to display) swaps width and height (Exif, 6.1)."""
    exif = Image.Exif()
    exif[0x0112] = 6
    path = tmp_path / "o6.jpg"
    scene((320, 240)).save(path, exif=exif)
    facts = inspect_image(path)
    assert (facts.width, facts.height, facts.orientation) == (320, 240, 6)
    assert (facts.display_width, facts.display_height) == (240, 320)


def test_gps_rationals_become_decimal_degrees_and_set_the_flag(tmp_path):
    """GPS (52, 30, 15.5) N reads as 52.504306 (libraries.md 7) and flags personal data."""
    exif = Image.Exif()
    gps = exif.get_ifd(0x8825)  # GPSInfo IFD pointer (standards.md section 6.1)
    gps[1], gps[2] = "N", (52.0, 30.0, 15.5)
    gps[3], gps[4] = "W", (1.0, 15.0, 0.0)
    path = tmp_path / "gps.jpg"
    scene().save(path, exif=exif)
    facts = inspect_image(path)
    assert facts.exif["gps"] == {"lat": 52.504306, "lon": -1.25}
    assert "gps" in facts.flags


def test_exif_artist_copyright_serial_and_owner_are_read(tmp_path):
    """EXIF 315, 33432, 0xA431 and 0xA430 land in rights / summary with flags (Exif, 6.1)."""
    exif = Image.Exif()
    exif[315] = "A. Fern"
    exif[33432] = "(c) Fernhollow Field Society, CC BY 4.0"
    exif[271], exif[272] = "Fernhollow Optics", "FH-1"
    sub = exif.get_ifd(0x8769)
    sub[0xA431] = "FH1-000123"
    sub[0xA430] = "B. Hollow"
    path = tmp_path / "exif.jpg"
    scene().save(path, exif=exif)
    facts = inspect_image(path)
    assert facts.rights["exif_artist"] == "A. Fern"
    assert facts.rights["exif_copyright"] == "(c) Fernhollow Field Society, CC BY 4.0"
    assert facts.exif["make"] == "Fernhollow Optics"
    assert facts.exif["camera_serial"] == "FH1-000123"
    assert {"camera_serial", "owner_name"} <= set(facts.flags)
    json.dumps(facts.exif), json.dumps(facts.rights)  # must be storable as JSON columns


def test_very_long_embedded_text_is_kept_in_part(tmp_path):
    """A 50,000-character EXIF Artist is cut to 2000 characters (the IIM Caption/Abstract
    maximum, standards.md 6.2) plus a note of how much was left out."""
    exif = Image.Exif()
    exif[315] = "A" * 50_000
    path = tmp_path / "long.jpg"
    scene().save(path, exif=exif)
    artist = inspect_image(path).rights["exif_artist"]
    assert artist.startswith("A" * 2000) and artist.endswith("[48000 more characters not kept]")


def _iptc_dataset(dataset: int, value: bytes) -> bytes:
    # IIM: tag marker 0x1C, record 2, dataset number, 2-byte length (standards.md section 6.2)
    return b"\x1c\x02" + bytes([dataset]) + struct.pack(">H", len(value)) + value


def _with_app13(jpeg: bytes, iim: bytes) -> bytes:
    # APP13 "Photoshop 3.0\0", 8BIM resource 0x0404, empty Pascal name padded to 2 bytes,
    # 4-byte size, data padded to even length (standards.md section 6.2, layout from memory).
    if len(iim) % 2:
        iim += b"\x00"
    resource = b"8BIM" + struct.pack(">H", 0x0404) + b"\x00\x00" + struct.pack(">I", len(iim)) + iim
    payload = b"Photoshop 3.0\x00" + resource
    segment = b"\xff\xed" + struct.pack(">H", len(payload) + 2) + payload
    return jpeg[:2] + segment + jpeg[2:]


def test_hand_built_iptc_block_is_read_back(tmp_path):
    """By-line 2:80, Copyright 2:116, Credit 2:110, Source 2:115, Caption 2:120 are decoded."""
    path = tmp_path / "iptc.jpg"
    scene().save(path)
    iim = b"".join(
        [
            _iptc_dataset(80, "Ärni Fern".encode()),
            _iptc_dataset(116, b"(c) Fernhollow Field Society, CC BY 4.0"),
            _iptc_dataset(110, "Fernhollow Société".encode("latin-1")),
            _iptc_dataset(115, b"Fernhollow archive"),
            _iptc_dataset(120, b"Oak leaf, autumn"),
        ]
    )
    path.write_bytes(_with_app13(path.read_bytes(), iim))
    rights = inspect_image(path).rights
    assert rights["iptc_byline"] == "Ärni Fern"  # UTF-8
    assert rights["iptc_copyright"] == "(c) Fernhollow Field Society, CC BY 4.0"
    assert rights["iptc_credit"] == "Fernhollow Société"  # latin-1 fallback
    assert rights["iptc_source"] == "Fernhollow archive"
    assert rights["iptc_caption"] == "Oak leaf, autumn"


XMP = b"""<?xpacket begin="" id="W5M0MpCehiHzreSzNTczkc9d"?>
<x:xmpmeta xmlns:x="adobe:ns:meta/"><rdf:RDF xmlns:rdf="http://www.w3.org/1999/02/22-rdf-syntax-ns#">
<rdf:Description rdf:about="" xmlns:dc="http://purl.org/dc/elements/1.1/"
  xmlns:xmpRights="http://ns.adobe.com/xap/1.0/rights/" xmlns:cc="http://creativecommons.org/ns#"
  xmpRights:Marked="True">
 <dc:creator><rdf:Seq><rdf:li>A. Fern</rdf:li><rdf:li>B. Hollow</rdf:li></rdf:Seq></dc:creator>
 <dc:rights><rdf:Alt><rdf:li xml:lang="x-default">Fernhollow Field Society, CC BY-SA 4.0</rdf:li>
 </rdf:Alt></dc:rights>
 <xmpRights:WebStatement>https://creativecommons.org/licenses/by-sa/4.0/</xmpRights:WebStatement>
 <xmpRights:UsageTerms><rdf:Alt><rdf:li xml:lang="x-default">Credit the society</rdf:li></rdf:Alt>
 </xmpRights:UsageTerms>
 <cc:license rdf:resource="https://creativecommons.org/licenses/by-sa/4.0/"/>
</rdf:Description></rdf:RDF></x:xmpmeta><?xpacket end="w"?>"""


def test_xmp_rights_properties_are_read_back(tmp_path):
    """dc:creator (Seq), dc:rights (Alt), WebStatement, UsageTerms, Marked, cc:license (6.3)."""
    path = tmp_path / "xmp.jpg"
    scene().save(path, xmp=XMP)
    rights = inspect_image(path).rights
    assert rights["xmp_creator"] == "A. Fern; B. Hollow"
    assert rights["xmp_rights"] == "Fernhollow Field Society, CC BY-SA 4.0"
    assert rights["xmp_web_statement"] == "https://creativecommons.org/licenses/by-sa/4.0/"
    assert rights["xmp_usage_terms"] == "Credit the society"
    assert rights["xmp_marked"] is True
    assert rights["xmp_license"] == "https://creativecommons.org/licenses/by-sa/4.0/"


def test_xmp_entity_expansion_bomb_is_refused_and_recorded(tmp_path):
    """XMP with DTD entities is not expanded: no crash, flag xmp_unreadable (libraries.md 7)."""
    bomb = (
        b'<?xml version="1.0"?><!DOCTYPE x [<!ENTITY a "aaaaaaaaaa">'
        + b"".join(
            b'<!ENTITY %s "%s">' % (bytes([98 + i]), (b"&" + bytes([97 + i]) + b";") * 10)
            for i in range(8)
        )
        + b']><x:xmpmeta xmlns:x="adobe:ns:meta/">&i;</x:xmpmeta>'
    )
    path = tmp_path / "bomb.jpg"
    scene().save(path, xmp=bomb)
    facts = inspect_image(path)
    assert "xmp_unreadable" in facts.flags
    assert not any(k.startswith("xmp_") for k in facts.rights)


def test_sixteen_bit_png_reports_bit_depth_16(tmp_path):
    """IHDR bit depth 16 (file offset 24, standards.md section 9) is reported."""
    path = tmp_path / "deep.png"
    Image.fromarray((np.arange(64 * 48, dtype=np.uint16) * 20).reshape(48, 64)).save(path)
    assert path.read_bytes()[24] == 16
    facts = inspect_image(path)
    assert facts.bit_depth == 16 and facts.alpha is False


def test_palette_png_with_trns_has_alpha(tmp_path):
    """Colour type 3 with a tRNS chunk carries alpha (standards.md section 9)."""
    path = tmp_path / "pal.png"
    scene().convert("P", palette=Image.Palette.ADAPTIVE, colors=16).save(path, transparency=0)
    assert any(c[1] == b"tRNS" for c in _png_chunks(path.read_bytes()))
    facts = inspect_image(path)
    assert (facts.mode, facts.alpha) == ("P", True)


def test_palette_png_without_trns_has_no_alpha(tmp_path):
    """Colour type 3 without tRNS has no alpha."""
    path = tmp_path / "pal.png"
    scene().convert("P", palette=Image.Palette.ADAPTIVE, colors=16).save(path)
    assert inspect_image(path).alpha is False


def test_rgba_png_has_alpha(tmp_path):
    """Colour type 6 (truecolour + alpha) reports alpha (standards.md section 9)."""
    path = tmp_path / "rgba.png"
    scene().convert("RGBA").save(path)
    assert path.read_bytes()[25] == 6
    assert inspect_image(path).alpha is True


def test_cmyk_jpeg_reports_mode_cmyk(tmp_path):
    """A CMYK JPEG is read in mode CMYK and still hashed."""
    path = tmp_path / "cmyk.jpg"
    scene().convert("CMYK").save(path)
    facts = inspect_image(path)
    assert facts.mode == "CMYK"
    assert 0 < facts.phash < 2**64


def test_animated_gif_reports_frames(tmp_path):
    """A three-frame GIF reports frames 3 and animated."""
    path = tmp_path / "anim.gif"
    frames = [scene(seed=i) for i in range(3)]
    frames[0].save(path, save_all=True, append_images=frames[1:], duration=100, loop=0)
    facts = inspect_image(path)
    assert (facts.frames, facts.animated) == (3, True)


def test_icc_and_dpi_are_reported(tmp_path):
    """An embedded ICC profile and a 300 dpi density are reported."""
    from PIL import ImageCms

    profile = ImageCms.ImageCmsProfile(ImageCms.createProfile("sRGB")).tobytes()
    path = tmp_path / "icc.jpg"
    scene().save(path, icc_profile=profile, dpi=(300, 300))
    facts = inspect_image(path)
    assert facts.icc is True and facts.dpi == (300.0, 300.0)
    # The profile's own description tag (ICC.1 'desc'), as LittleCMS names its sRGB profile.
    assert facts.icc_profile == ImageCms.getProfileDescription(
        ImageCms.ImageCmsProfile(ImageCms.createProfile("sRGB"))).strip()


def test_a_broken_icc_profile_is_flagged_not_fatal(tmp_path):
    """Garbage where the ICC profile should be: the image is still accepted, the profile is
    named unreadable and flagged."""
    path = tmp_path / "bad-icc.png"
    scene().save(path, icc_profile=b"not an ICC profile at all" * 4)
    facts = inspect_image(path)
    assert facts.icc_profile == "(unreadable profile)"
    assert "icc_unreadable" in facts.flags


def test_hash_of_a_png_equals_imagehash_and_of_a_jpeg_equals_the_draft_pipeline(tmp_path):
    """PNG hashes are imagehash's bits; JPEG hashes equal hash_image_file (draft pipeline)."""
    png, jpg = tmp_path / "a.png", tmp_path / "a.jpg"
    scene((640, 480), seed=3).save(png)
    scene((640, 480), seed=3).save(jpg, quality=92)
    with Image.open(png) as im:
        assert inspect_image(png).phash == int(str(imagehash.phash(im)), 16)
    facts = inspect_image(jpg)
    assert (facts.phash, facts.phash_mirror) == hash_image_file(jpg)
    assert facts.hash_algo == "dct-phash-64/draft-v2"
    assert hamming(facts.phash, inspect_image(png).phash) <= 2
