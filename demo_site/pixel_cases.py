"""Transparency and enlargement cases of the archive, listed at the end of api-pages.

Three specimens whose pictures train badly as they are: a palette PNG with a transparent palette
entry, an RGBA PNG cut out on a transparent background, and a small picture enlarged six times
(a 100x75 original served at 600x450). The demo recipe flags both kinds
(``[images] transparent = "flag"``, ``enlarged = "flag"`` with ``min_side = 128``), so each is
stored with its flag.
"""

from __future__ import annotations

from PIL import Image, ImageDraw

from collector.demo_site.builder import Builder, Item, jpeg, licence_cycle, png, url

FAST = Image.Quantize.FASTOCTREE


def _palette_with_clear_border(b: Builder, key: str) -> bytes:
    """A 64-colour palette picture whose outer band uses a transparent palette entry."""
    im = b.picture(key, 480, 360, "leaf").quantize(63, method=FAST)
    palette = [*(im.getpalette() or []), *[0] * 189][:189]
    im.putpalette([*palette, 255, 255, 255])  # entry 63: the clear border
    ImageDraw.Draw(im).rectangle((0, 0, 479, 359), outline=63, width=40)
    return png(im, transparency=63)


def _cut_out(b: Builder, key: str) -> bytes:
    """An RGBA picture: a beetle-shaped ellipse kept, the background fully transparent."""
    im = b.picture(key, 480, 480, "beetle").convert("RGBA")
    mask = Image.new("L", im.size, 0)
    ImageDraw.Draw(mask).ellipse((90, 40, 390, 440), fill=255)
    im.putalpha(mask)
    return png(im)


def _enlarged(b: Builder, key: str) -> bytes:
    """A 100x75 picture enlarged six times with bicubic interpolation, as JPEG."""
    small = b.picture(key, 100, 75, "stone")
    return jpeg(small.resize((600, 450), Image.Resampling.BICUBIC))


CASES = (
    ("FH-P-0001", "png", _palette_with_clear_border, "transparent",
     "palette PNG, a transparent palette entry (tRNS) around the picture: flagged"),
    ("FH-P-0002", "png", _cut_out, "transparent",
     "RGBA PNG cut out on a transparent background: flagged"),
    ("FH-P-0003", "jpg", _enlarged, "enlarged",
     "100x75 picture enlarged 6x to 600x450: native side under min_side 128, flagged"),
)


def build_pixel_cases(b: Builder) -> None:
    """Add the cases to api-pages (records and details) with their expected outcome."""
    v1 = b.apis["v1"]
    for n, (key, ext, make, flag, note) in enumerate(CASES, start=1):
        title, creator, date = b.person(key)
        lic = licence_cycle(n)
        item = b.add(Item("api-pages", key, title, creator, date, lic, 1,
                          f"/media/specimens/{key}.{ext}"))
        b.serve_image(item, make(b, key), "image/png" if ext == "png" else "image/jpeg")
        item.flags = [flag]
        item.note = note
        item.page_url = url(1, f"/api/v1/specimens/{key}")
        v1["records"].append({
            "id": key, "title": title, "date": date, "creator": {"name": creator},
            "rights": {"licence": lic.text, "url": lic.url},
            "image": {"full": item.image_url}, "links": {"self": item.page_url}})
        v1["details"][key] = {"id": key, "title": title,
                              "licence": {"name": lic.text, "url": lic.url},
                              "files": {"original": item.image_url}}
