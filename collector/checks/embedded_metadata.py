"""Embedded metadata of an opened image: EXIF (standards.md section 6.1), IPTC-IIM (6.2) and
XMP (6.3), read into a summary, the rights fields and personal-data flags.

Each reader takes the flags list of the image being checked and appends a flag
(``exif_unreadable``, ``iptc_unreadable``, ``xmp_unreadable``) rather than failing when the
metadata is malformed; EXIF adds ``gps``, ``camera_serial`` and ``owner_name`` when present.
"""

from __future__ import annotations

import warnings
from typing import Any, cast

from PIL import ExifTags, Image, ImageFile, IptcImagePlugin

__all__ = ["MAX_TEXT", "read_exif", "read_iptc", "read_xmp"]

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


def read_exif(im: Image.Image, flags: list[str]) -> tuple[dict[str, Any], dict[str, Any]]:
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


def read_iptc(im: Image.Image, flags: list[str]) -> dict[str, Any]:
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
    # IPTC Photo Metadata 2023.1 "Data Mining" and "Other Constraints" (PLUS namespace);
    # judged by collector.checks.reservations.xmp_signals.
    "{http://ns.useplus.org/ldf/xmp/1.0/}DataMining": "xmp_data_mining",
    "{http://ns.useplus.org/ldf/xmp/1.0/}OtherConstraints": "xmp_other_constraints",
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


def read_xmp(im: Image.Image, flags: list[str]) -> dict[str, Any]:
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
