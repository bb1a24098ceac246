"""The five sources of the archive and the trouble planted in each.

Each ``build_*`` function adds items (with their expected outcome) and the files, pages
and API records that describe them.
"""

from __future__ import annotations

import io
from typing import Any

import numpy as np
from PIL import Image, ImageOps

from collector.demo_site import art, metadata, pages
from collector.demo_site.builder import (
    GALLERY_PAGE,
    POLICY,
    V1_PER_PAGE,
    V2_PAGE,
    V3_PAGE,
    Builder,
    Item,
    image_facts,
    jpeg,
    licence_cycle,
    png,
    seed_for,
    sha256_hex,
    url,
)
from collector.demo_site.catalogue import GALLERY_TEXT_LICENCES, Licence

# fast octree quantisation: median cut takes ~0.5 s per picture here
FAST = Image.Quantize.FASTOCTREE


# --------------------------------------------------------------------------------------
# Source 1: api-pages (JSON, page-number pagination), host 1
# --------------------------------------------------------------------------------------

def build_api_pages(b: Builder) -> None:
    lic_by_index = {
        1: Licence("CC-BY-4.0", None, "CC-BY-4.0"),
        2: Licence("Creative Commons Attribution-ShareAlike 4.0 International", None,
                   "CC-BY-SA-4.0"),
        3: Licence(None, "https://creativecommons.org/licenses/by/4.0/deed.en", "CC-BY-4.0"),
        4: Licence(None, "https://creativecommons.org/licenses/by-sa/3.0/legalcode",
                   "CC-BY-SA-3.0"),
        5: Licence("Public Domain Mark 1.0", None, "CC-PDM-1.0"),
        6: Licence(None, "https://creativecommons.org/publicdomain/mark/1.0/", "CC-PDM-1.0"),
        7: Licence(None, "https://creativecommons.org/publicdomain/zero/1.0/", "CC0-1.0"),
        8: Licence("CC BY 4.0", "https://creativecommons.org/licenses/by/4.0/", "CC-BY-4.0"),
        9: Licence("cc-by-sa-4.0", None, "CC-BY-SA-4.0"),
        10: Licence("CC-BY-2.0", None, "CC-BY-2.0"),
        11: Licence("CC-BY-SA-2.0", None, "CC-BY-SA-2.0"),
        13: Licence("CC-BY-4.0", None, "CC-BY-4.0"),
        14: Licence("CC BY-SA 4.0", None, "CC-BY-SA-4.0"),
        15: Licence(None, "https://creativecommons.org/licenses/by-sa/4.0/deed.en",
                    "CC-BY-SA-4.0"),
        16: Licence("CC-BY-4.0", "https://creativecommons.org/licenses/by/4.0/", "CC-BY-4.0"),
        17: Licence("CC BY-NC 4.0", "https://creativecommons.org/licenses/by-nc/4.0/",
                    "CC-BY-NC-4.0"),
        18: Licence("All rights reserved", None, None),
        19: Licence("", None, None),
        20: Licence("Creative Commons Attribution-NoDerivatives 4.0 International", None,
                    "CC-BY-ND-4.0"),
    }
    records, details = [], {}
    for i in range(1, 41):
        key = f"FH-S-{i:04d}"
        title, creator, date = b.person(key)
        lic = lic_by_index.get(i, licence_cycle(i))
        item = b.add(Item("api-pages", key, title, creator, date, lic, 1,
                          f"/media/specimens/{key}.jpg"))
        _api_pages_item(b, i, item)
        if lic.spdx is None:
            item.state, item.reason = "skipped", "licence_unknown"
        elif lic.spdx not in POLICY["licence_allow"]:
            item.state, item.reason = "skipped", "licence_not_allowed"
        item.page_url = url(1, f"/api/v1/specimens/{key}")
        rec = {
            "id": key, "title": title, "date": date,
            "creator": {"name": creator},
            "rights": {"licence": lic.text, "url": lic.url},
            "image": {"full": item.image_url},
            "links": {"self": item.page_url},
        }
        records.append(rec)
        details[key] = {"id": key, "title": title,
                        "licence": {"name": lic.text, "url": lic.url},
                        "files": {"original": item.image_url}}
    b.apis["v1"] = {"host": 1, "path": "/api/v1/specimens", "records": records,
                    "details": details, "per_page": V1_PER_PAGE}


def _api_pages_item(b: Builder, i: int, item: Item) -> None:
    key = item.key
    if i == 2:  # PNG with an alpha channel: the feather sits on transparency
        im = b.picture(key, 512, 512, "feather").convert("RGBA")
        mask = Image.new("L", im.size, 0)
        from PIL import ImageDraw
        ImageDraw.Draw(mask).ellipse((40, 40, 472, 472), fill=255)
        im.putalpha(mask)
        item.image_path = f"/media/specimens/{key}.png"
        b.serve_image(item, png(im), "image/png")
        item.flags = ["transparent"]  # the demo recipe flags transparent images
    elif i == 3:  # palette PNG
        im = b.picture(key, 600, 400).quantize(64, method=FAST)
        item.image_path = f"/media/specimens/{key}.png"
        b.serve_image(item, png(im), "image/png")
    elif i == 4:  # 16-bit greyscale PNG
        grey = np.asarray(b.picture(key, 480, 480, "lichen").convert("L"), dtype=np.uint16)
        im = Image.fromarray(grey * 257)  # uint16 array -> mode "I;16"
        item.image_path = f"/media/specimens/{key}.png"
        b.serve_image(item, png(im), "image/png")
    elif i == 5:
        item.image_path = f"/media/specimens/{key}.webp"
        b.serve_image(item, metadata.encode(b.picture(key), "WEBP", quality=80), "image/webp")
    elif i == 6:
        item.image_path = f"/media/specimens/{key}.gif"
        im = b.picture(key, 400, 300).quantize(128, method=FAST)
        b.serve_image(item, metadata.encode(im, "GIF"), "image/gif")
    elif i == 7:  # animated GIF, 4 frames
        item.image_path = f"/media/specimens/{key}.gif"
        base = b.picture(key, 400, 300, "beetle")
        frames = [base.rotate(a, resample=Image.Resampling.BILINEAR).quantize(128, method=FAST)
                  for a in (0, 4, 8, 4)]
        data = metadata.encode(frames[0], "GIF", save_all=True, append_images=frames[1:],
                               duration=200, loop=0)
        b.serve_image(item, data, "image/gif")
        item.note = "animated GIF, 4 frames: the first frame is hashed, the count recorded"
    elif i == 8:
        item.image_path = f"/media/specimens/{key}.tif"
        b.serve_image(item, metadata.encode(b.picture(key), "TIFF", compression="tiff_lzw"),
                      "image/tiff")
    elif i == 9:
        b.serve_image(item, jpeg(b.picture(key).convert("CMYK")), "image/jpeg")
        item.note = "CMYK JPEG (Adobe, inverted): hashed like its RGB picture"
    elif i in (10, 11):
        upright = b.picture(key, 480, 640, "leaf")
        # Exif Orientation (standards.md §6.1): 6 = display needs ROTATE_270, so store the
        # upright picture turned the other way; 8 = display needs ROTATE_90.
        orientation = 6 if i == 10 else 8
        stored = upright.transpose(Image.Transpose.ROTATE_90 if orientation == 6
                                   else Image.Transpose.ROTATE_270)
        data = jpeg(stored, exif=metadata.exif_bytes(orientation=orientation))
        b.serve_image(item, data, "image/jpeg")
        item.note = f"Exif Orientation {orientation}: displays as 480x640"
    elif i == 12:
        data = jpeg(b.picture(key), exif=metadata.exif_bytes(gps=(47.5125, -28.2519)))
        b.serve_image(item, data, "image/jpeg")
        item.flags = ["gps"]
        item.embedded = {"gps": "47.5125 N, 28.2519 W (open ocean, invented)"}
        item.note = "GPS position in Exif: personal-data caution"
    elif i == 13:
        notice = f"(c) 2024 {item.creator}. Licensed CC BY 4.0."
        data = jpeg(b.picture(key), exif=metadata.exif_bytes(artist=item.creator,
                                                               copyright_notice=notice))
        b.serve_image(item, data, "image/jpeg")
        item.embedded = {"exif_artist": item.creator, "exif_copyright": notice}
    elif i == 14:
        notice = f"© 2023 {item.creator}, CC BY-SA 4.0"
        data = metadata.insert_jpeg_segment(jpeg(b.picture(key)),
                                            metadata.iptc_app13(item.creator, notice))
        b.serve_image(item, data, "image/jpeg")
        item.embedded = {"iptc_byline": item.creator, "iptc_copyright_notice": notice}
    elif i == 15:
        rights = "CC BY-SA 4.0, Fernhollow Field Society"
        statement = "https://creativecommons.org/licenses/by-sa/4.0/"
        xmp = metadata.xmp_packet(creator=item.creator, rights=rights,
                                  web_statement=statement, marked=True)
        b.serve_image(item, jpeg(b.picture(key), xmp=xmp), "image/jpeg")
        item.embedded = {"xmp_creator": item.creator, "xmp_rights": rights,
                         "xmp_web_statement": statement, "xmp_marked": "True"}
    elif i == 16:  # embedded rights contradict the declared CC BY 4.0
        rights = f"© 2022 {item.creator}. Non-commercial use only (CC BY-NC 4.0)."
        statement = "https://creativecommons.org/licenses/by-nc/4.0/"
        xmp = metadata.xmp_packet(creator=item.creator, rights=rights,
                                  web_statement=statement, marked=True)
        data = metadata.insert_jpeg_segment(jpeg(b.picture(key), xmp=xmp),
                                            metadata.iptc_app13(item.creator, rights))
        b.serve_image(item, data, "image/jpeg")
        item.embedded = {"xmp_creator": item.creator, "xmp_rights": rights,
                         "xmp_web_statement": statement, "xmp_marked": "True",
                         "iptc_byline": item.creator, "iptc_copyright_notice": rights}
        item.conflict = True
        item.note = "declared CC-BY-4.0, embedded XMP/IPTC say CC BY-NC 4.0"
    elif i == 21:
        item.image_path = f"/private/specimens/{key}.jpg"
        b.serve_image(item, jpeg(b.picture(key)), "image/jpeg")
        item.state, item.reason = "blocked", "robots_disallowed"
        item.note = "robots.txt of host 1: Disallow: /private/"
    elif i == 22:
        item.image_host = 3
        b.serve_image(item, jpeg(b.picture(key)), "image/jpeg")
        item.state, item.reason = "blocked", "robots_unreachable"
        item.note = "image on the mirror host, whose robots.txt answers 503"
    elif i == 23:
        item.image_path = f"/media/moved/{key}.jpg"
        final = f"/media/annex/{key}.jpg"
        b.put_redirect(1, item.image_path, 301, url(2, f"/relay/{key}.jpg"))
        b.put_redirect(2, f"/relay/{key}.jpg", 302, url(4, f"/relay/{key}.jpg"))
        b.put_redirect(4, f"/relay/{key}.jpg", 307, final)
        data = jpeg(b.picture(key))
        b.put_file(4, final, data, "image/jpeg")
        b.bytes_of[key] = data
        item.final_image_url = url(4, final)
        item.facts = {"sha256": sha256_hex(data), "bytes": len(data),
                      "content_type": "image/jpeg", **image_facts(data)}
        item.note = "three redirects: host 1 -> host 2 -> host 4 -> host 4 (relative Location)"
    elif i == 24:
        data = metadata.truncate(jpeg(b.picture(key)), 0.6)
        b.serve_image(item, data, "image/jpeg", deliberate="truncated",
                      facts={"format": "JPEG", "width": 640, "height": 480, "mode": "RGB",
                             "frames": 1, "orientation": None})
        item.state, item.reason = "rejected", "broken_image"
    elif i == 25:
        b.serve_image(item, metadata.ERROR_PAGE, "image/jpeg", deliberate="html_as_image",
                      facts={"format": None, "width": None, "height": None, "mode": None,
                             "frames": None, "orientation": None})
        item.state, item.reason = "rejected", "not_an_image"
    elif i == 26:
        b.serve_image(item, png(b.picture(key)), "image/jpeg",
                      deliberate="wrong_content_type")
        item.type_mismatch = {"served": "image/jpeg", "actual": "image/png"}
        item.flags = ["type_mismatch"]
        item.note = "valid PNG served as image/jpeg under a .jpg name: stored, mismatch recorded"
    elif i == 27:
        item.image_path = f"/media/specimens/{key}.png"
        data = png(art.noise_picture(seed_for(b.seed, key), 1200, 1200), compress_level=1)
        b.serve_image(item, data, "image/png", deliberate="oversized")
        item.state, item.reason = "rejected", "too_large"
        item.note = f"{len(data)} bytes > max_image_bytes {POLICY['max_image_bytes']}"
    elif i == 28:
        item.image_path = f"/media/specimens/{key}.png"
        b.serve_image(item, metadata.bomb_png(30000), "image/png", deliberate="bomb",
                      facts={"format": "PNG", "width": 30000, "height": 30000, "mode": "1",
                             "frames": 1, "orientation": None})
        item.state, item.reason = "rejected", "decompression_bomb"
    elif i == 29:
        b.serve_image(item, jpeg(b.picture(key, 120, 90)), "image/jpeg",
                      deliberate="too_small")
        item.state, item.reason = "rejected", "too_small"
        item.note = "a 120x90 thumbnail offered as the full image"
    elif i == 30:
        b.serve_image(item, b.bytes_of["FH-S-0001"], "image/jpeg")
        item.state, item.reason = "duplicate", "exact_duplicate"
        item.duplicate_of = {"source": "api-pages", "key": "FH-S-0001"}
    elif i == 31:
        b.put_missing(1, item.image_path)
        item.deliberate = "missing"
        item.state, item.reason = "failed", "http_404"
        item.facts = {"sha256": None, "bytes": None, "content_type": None, "format": None,
                      "width": None, "height": None, "mode": None, "frames": None,
                      "orientation": None}
    elif i == 32:
        item.image_path = f"/media/slow/{key}.jpg"
        b.serve_image(item, jpeg(b.picture(key)), "image/jpeg")
        item.note = "served slowly (server option slow)"
    else:
        motif = art.MOTIFS[i % len(art.MOTIFS)]
        b.serve_image(item, jpeg(b.picture(key, 640, 480, motif)), "image/jpeg")


# --------------------------------------------------------------------------------------
# Source 2: api-objects (JSON, cursor pagination, nested media, detail request), host 1
# --------------------------------------------------------------------------------------

def build_api_objects(b: Builder) -> None:
    records, details = [], {}
    for n in range(1, 25):
        key = f"obj-{2000 + n}"
        title, creator, date = b.person(key)
        lic = licence_cycle(n + 3)
        host = 1
        base = f"/media/objects/{key}"
        portrait = n % 4 == 0
        size = (540, 720) if portrait else (720, 540)
        ext, ctype = ("png", "image/png") if n == 15 else ("jpg", "image/jpeg")
        if n == 12:
            host = 3
        item = b.add(Item("api-objects", key, title, creator, date, lic, host,
                          f"{base}/original.{ext}"))
        if n == 3:
            original_bytes = b.bytes_of["FH-S-0033"]
            original = Image.open(io.BytesIO(original_bytes)).convert("RGB")
            item.state, item.reason = "duplicate", "exact_duplicate"
            item.duplicate_of = {"source": "api-pages", "key": "FH-S-0033"}
        elif n == 6:
            src = b.pictures["FH-S-0034"]
            original = src.resize((src.width // 2, src.height // 2), Image.Resampling.LANCZOS)
            original_bytes = jpeg(original)
            item.state, item.reason = "near_duplicate", "near_duplicate"
            item.duplicate_of = {"source": "api-pages", "key": "FH-S-0034"}
            item.mirrored = False
            item.note = "FH-S-0034 resized to 50% and re-encoded"
        else:
            original = b.picture(key, *size)
            original_bytes = png(original) if ext == "png" else jpeg(original)
        if n == 9:
            lic = Licence("Attribution-NonCommercial-ShareAlike 4.0 International",
                          "https://creativecommons.org/licenses/by-nc-sa/4.0/",
                          "CC-BY-NC-SA-4.0")
            item.licence = lic
            item.state, item.reason = "skipped", "licence_not_allowed"
        if n == 12:
            item.state, item.reason = "blocked", "robots_unreachable"
            item.note = "all media candidates on the mirror host (robots.txt 503)"
        b.serve_image(item, original_bytes, ctype)
        media = [{"href": item.image_path if host == 1 else item.image_url,
                  "width": original.width, "size": "original"}]
        # candidates are strictly smaller than the original, so "largest" is unambiguous
        for label, width in (("medium", min(360, original.width * 3 // 4)), ("thumb", 160)):
            h = round(original.height * width / original.width)
            small = original.resize((width, h), Image.Resampling.BILINEAR)
            path = f"{base}/{label}.jpg"
            res = b.put_file(host, path, jpeg(small, 85), "image/jpeg", role="candidate")
            res["of"] = key
            media.append({"href": path if host == 1 else url(host, path), "width": width,
                          "size": label})
        # listing order of candidates varies, so "largest" must really compare widths
        rot = n % 3
        media = media[rot:] + media[:rot]
        records.append({"id": key, "name": title, "recorded": date,
                        "maker": {"display": creator}, "media": media,
                        "links": {"self": f"/api/v2/objects/{key}"}})
        details[key] = {"object": {"id": key, "name": title, "credit": creator,
                                   "rights": {"statement": lic.text, "uri": lic.url}}}
        item.page_url = url(1, f"/api/v2/objects/{key}")
    b.apis["v2"] = {"host": 1, "path": "/api/v2/objects", "records": records,
                    "details": details, "page_size": V2_PAGE}


# --------------------------------------------------------------------------------------
# Source 3: api-linked (JSON, RFC 8288 Link rel="next"), host 4
# --------------------------------------------------------------------------------------

def build_api_linked(b: Builder) -> None:
    records = []
    for n in range(1, 21):
        key = f"find-{3000 + n}"
        title, creator, date = b.person(key)
        lic = licence_cycle(n + 5)
        # this API states licences by URL only
        assert lic.spdx is not None  # licence_cycle only yields SPDX licences
        lic = Licence(None, lic.url or _URL_FOR[lic.spdx], lic.spdx)
        host, path = 4, f"/media/finds/{key}.jpg"
        if n in (8, 13):
            host = 3
        if n == 11:
            path = f"/drafts/finds/{key}.jpg"
        item = b.add(Item("api-linked", key, title, creator, date, lic, host, path))
        if n == 4:
            src = b.pictures["FH-S-0035"]
            b.serve_image(item, jpeg(ImageOps.mirror(src)), "image/jpeg")
            item.state, item.reason = "near_duplicate", "near_duplicate"
            item.duplicate_of = {"source": "api-pages", "key": "FH-S-0035"}
            item.mirrored = True
            item.note = "FH-S-0035 mirrored left-right"
        else:
            b.serve_image(item, jpeg(b.picture(key, 600, 450)), "image/jpeg")
        if n in (8, 13):
            item.state, item.reason = "blocked", "robots_unreachable"
        if n == 11:
            item.state, item.reason = "blocked", "robots_disallowed"
            item.note = "host 4 robots.txt (reached by redirect): Disallow: /drafts/"
        if n == 16:
            item.licence = Licence(None, "https://creativecommons.org/licenses/by-nc-nd/4.0/",
                                   "CC-BY-NC-ND-4.0")
            item.state, item.reason = "skipped", "licence_not_allowed"
        records.append({"ref": key, "label": title, "recorded_by": creator,
                        "recorded_on": date, "rights_text": item.licence.text,
                        "rights_url": item.licence.url,
                        "file": {"url": item.image_url, "bytes": item.facts["bytes"]}})
    records += [_format_find(b, n) for n in (21, 22)]
    b.apis["v3"] = {"host": 4, "path": "/api/v3/finds", "records": records,
                    "page_size": V3_PAGE}


def _format_find(b: Builder, n: int) -> dict[str, Any]:
    """Finds in pixel formats that trace must get right (issue 14): n=21 a 16-bit greyscale
    TIFF whose values all lie above 255 (a clipping greyscale conversion would see a blank
    page), n=22 a flat white PNG (a blank page: stored, flagged ``blank``, never a near copy).
    """
    key = f"find-{3000 + n}"
    title, creator, date = b.person(key)
    lic = Licence(None, _URL_FOR["CC-BY-4.0"], "CC-BY-4.0")  # this API gives licence URLs
    if n == 21:
        path = f"/media/finds/{key}.tif"
        grey = np.asarray(b.picture(key, 560, 420, "lichen").convert("L"), dtype=np.uint32)
        data = metadata.encode(Image.fromarray((grey * 240 + 3000).astype(np.uint16)), "TIFF")
        note = "16-bit greyscale TIFF (values 3000..64200): hashed by its full 16-bit range"
    else:
        path = f"/media/finds/{key}.png"
        data = png(Image.new("RGB", (400, 300), (255, 255, 255)))
        note = "a flat white page: flagged blank, never reported as a near copy"
    item = b.add(Item("api-linked", key, title, creator, date, lic, 4, path))
    b.serve_image(item, data, "image/tiff" if n == 21 else "image/png")
    item.note = note
    if n == 22:
        item.flags = ["blank"]
    return {"ref": key, "label": title, "recorded_by": creator, "recorded_on": date,
            "rights_text": item.licence.text, "rights_url": item.licence.url,
            "file": {"url": item.image_url, "bytes": item.facts["bytes"]}}


_URL_FOR = {
    "CC-BY-4.0": "https://creativecommons.org/licenses/by/4.0/",
    "CC-BY-SA-4.0": "https://creativecommons.org/licenses/by-sa/4.0/",
    "CC-BY-SA-3.0": "https://creativecommons.org/licenses/by-sa/3.0/",
    "CC-BY-2.0": "https://creativecommons.org/licenses/by/2.0/",
    "CC0-1.0": "https://creativecommons.org/publicdomain/zero/1.0/",
    "CC-PDM-1.0": "https://creativecommons.org/publicdomain/mark/1.0/",
}


# --------------------------------------------------------------------------------------
# Source 4: gallery (HTML listing + detail pages), host 2
# --------------------------------------------------------------------------------------

def build_gallery(b: Builder) -> None:
    tiles: list[dict[str, Any]] = []
    n_items = 36
    for n in range(1, n_items + 1):
        key = f"g-{4000 + n}"
        title, creator, date = b.person(key)
        lic = GALLERY_TEXT_LICENCES[n % len(GALLERY_TEXT_LICENCES)]
        host, path = 2, f"/gallery/media/{key}.jpg"
        if n == 25:
            host = 3
        item = b.add(Item("gallery", key, title, creator, date, lic, host, path))
        if n == 5:
            data = b.bytes_of["find-3005"]
            item.state, item.reason = "duplicate", "exact_duplicate"
            item.duplicate_of = {"source": "api-linked", "key": "find-3005"}
        elif n == 10:
            data = jpeg(Image.open(io.BytesIO(b.bytes_of["FH-S-0036"])), quality=70)
            item.state, item.reason = "near_duplicate", "near_duplicate"
            item.duplicate_of = {"source": "api-pages", "key": "FH-S-0036"}
            item.mirrored = False
            item.note = "FH-S-0036 re-encoded as JPEG quality 70"
        elif n == 15:
            data = jpeg(b.picture(key, 110, 82))
            item.state, item.reason = "rejected", "too_small"
            item.deliberate = "too_small"
        else:
            data = jpeg(b.picture(key, 640 if n % 3 else 480, 480 if n % 3 else 640))
        if n == 20:
            item.licence = Licence("CC BY-NC-SA 4.0",
                                   "https://creativecommons.org/licenses/by-nc-sa/4.0/",
                                   "CC-BY-NC-SA-4.0")
            item.state, item.reason = "skipped", "licence_not_allowed"
        if n == 25:
            item.state, item.reason = "blocked", "robots_unreachable"
            item.note = "full image on the mirror host"
        b.serve_image(item, data, "image/jpeg", deliberate=item.deliberate)
        full = Image.open(io.BytesIO(data)).convert("RGB")
        thumbs = {}
        for w in (160, 320):
            h = max(1, round(full.height * w / full.width))
            tpath = f"/gallery/thumbs/{key}-{w}.jpg"
            b.put_file(2, tpath, jpeg(full.resize((w, h), Image.Resampling.BILINEAR), 80),
                       "image/jpeg", role="thumbnail")["of"] = key
            thumbs[w] = (f"thumbs/{key}-{w}.jpg", h)
        detail_path = f"/gallery/item/{key}.html"
        src = f"../media/{key}.jpg" if host == 2 else item.image_url
        b.put_page(2, detail_path, pages.detail_page(
            title=title, creator=creator, date=date, image_src=src, width=full.width,
            height=full.height, licence_text=item.licence.text or "",
            licence_url=item.licence.url, listing_href="../"), "text/html; charset=utf-8")
        item.page_url = url(2, detail_path)
        tiles.append({"detail": f"item/{key}.html", "thumb_1x": thumbs[160][0],
                      "thumb_2x": thumbs[320][0], "w": 160, "h": thumbs[160][1],
                      "title": title, "creator": creator, "licence": item.licence.text or ""})
    n_pages = (n_items + GALLERY_PAGE - 1) // GALLERY_PAGE
    for p in range(1, n_pages + 1):
        path = "/gallery/" if p == 1 else f"/gallery/page/{p}/"
        text = pages.listing_page(page=p, pages=n_pages,
                                  tiles=tiles[(p - 1) * GALLERY_PAGE:p * GALLERY_PAGE],
                                  base_href=url(2, "/gallery/"))
        b.put_page(2, path, text, "text/html; charset=utf-8")
    b.put_page(2, "/static/site.css", pages.STYLE, "text/css; charset=utf-8", role="asset")


# --------------------------------------------------------------------------------------
# Source 5: scanner (local files)
# --------------------------------------------------------------------------------------

SCAN_PLAN = (
    ("scan-01.png", 6, False),
    ("scan-02.png", 9, False),
    ("scan-03.tif", 5, True),
    ("scan-04-blank.png", 0, False),
)


def build_scans(b: Builder) -> None:
    folder = b.out / "scans"
    folder.mkdir(parents=True, exist_ok=True)
    for name, n, touching in SCAN_PLAN:
        page, placed = art.scan_bed(seed_for(b.seed, name), n, touching=touching)
        if name.endswith(".tif"):
            data = metadata.encode(page, "TIFF", compression="tiff_adobe_deflate")
        else:
            data = png(page, compress_level=1)
        (folder / name).write_bytes(data)
        b.scans.append({
            "file": f"scans/{name}", "sha256": sha256_hex(data), "bytes": len(data),
            "width": page.width, "height": page.height, "blank": n == 0,
            "items": [{"index": k, "kind": p.kind, "box": list(p.box), "angle": p.angle,
                       "state": "stored"} for k, p in enumerate(placed)],
            "touching_pairs": [[0, 1]] if touching else [],
            "note": ("items 0 and 1 touch: a splitter that merges them finds one region "
                     "fewer") if touching else ("no items: a blank scan" if n == 0 else ""),
        })


# --------------------------------------------------------------------------------------

