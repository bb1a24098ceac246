"""HTML pages of the gallery host (listing grid and detail pages), as text templates.

Absolute URLs carry the literal ``{port}`` placeholder, which the server replaces with
its port when it sends the page.
"""

from __future__ import annotations

from html import escape

SOCIETY = "Fernhollow Field Society"

_HEAD = """<!DOCTYPE html>
<html lang="en">
<head>
<meta charset="utf-8">
<title>{title}</title>
{base}<link rel="stylesheet" href="/static/site.css">
</head>
<body>
<header><p class="society">{society}</p><h1>{heading}</h1></header>
"""

_FOOT = """<footer><p>The {society} is a fictional society; every picture in this archive
is generated. Licence statements are part of the demonstration and are not legal
advice.</p></footer>
</body>
</html>
"""


def listing_page(*, page: int, pages: int, tiles: list[dict], base_href: str) -> str:
    """One page of the thumbnail grid; relative links resolve against ``base_href``.

    Each tile dict has: detail (relative href), thumb_1x, thumb_2x (relative), w, h,
    title, creator, licence (display text).
    """
    out = [_HEAD.format(title=f"Open collection — page {page} of {pages}",
                        base=f'<base href="{escape(base_href)}">\n', society=SOCIETY,
                        heading="Open collection")]
    out.append(f'<p class="count">Page {page} of {pages}</p>\n<ul class="grid">\n')
    for t in tiles:
        out.append(
            '<li class="tile">'
            f'<a href="{escape(t["detail"])}">'
            f'<img src="{escape(t["thumb_1x"])}" '
            f'srcset="{escape(t["thumb_1x"])} 160w, {escape(t["thumb_2x"])} 320w" '
            f'sizes="160px" width="{t["w"]}" height="{t["h"]}" alt="{escape(t["title"])}">'
            "</a>\n"
            f'  <span class="caption">{escape(t["title"])}</span>\n'
            f'  <span class="by">{escape(t["creator"])}</span>\n'
            f'  <span class="licence">{escape(t["licence"])}</span></li>\n'
        )
    out.append("</ul>\n<nav class=\"pager\">")
    if page > 1:
        prev = "./" if page == 2 else f"page/{page - 1}/"
        out.append(f'<a rel="prev" href="{prev}">Previous</a> ')
    if page < pages:
        out.append(f'<a rel="next" href="page/{page + 1}/">Next page</a>')
    out.append("</nav>\n")
    out.append(_FOOT.format(society=SOCIETY))
    return "".join(out)


def detail_page(*, title: str, creator: str, date: str, image_src: str, width: int,
                height: int, licence_text: str, licence_url: str | None,
                listing_href: str) -> str:
    """A detail page: full-size image in a figure, creator, and a licence block."""
    out = [_HEAD.format(title=f"{escape(title)} — {SOCIETY}", base="", society=SOCIETY,
                        heading=escape(title))]
    out.append(
        f'<figure><img class="full" src="{escape(image_src)}" width="{width}" '
        f'height="{height}" alt="{escape(title)}">\n'
        f"<figcaption>{escape(title)}, recorded {escape(date)}</figcaption></figure>\n"
        f'<p>Recorded by <span class="creator">{escape(creator)}</span>.</p>\n'
        '<div class="licence-block"><p>Licence: '
        f'<span class="licence">{escape(licence_text)}</span>'
    )
    if licence_url:
        out.append(f' — <a rel="license" href="{escape(licence_url)}">read the licence</a>')
    out.append(f'</p></div>\n<p><a href="{escape(listing_href)}">Back to the collection</a></p>\n')
    out.append(_FOOT.format(society=SOCIETY))
    return "".join(out)


STYLE = """body { font-family: sans-serif; margin: 2em; }
ul.grid { list-style: none; display: flex; flex-wrap: wrap; gap: 1em; padding: 0; }
li.tile { width: 170px; }
li.tile span { display: block; font-size: 0.8em; }
"""
