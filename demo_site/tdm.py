"""The demo archive's reservations against text-and-data mining: the pieces the demo host,
the hostile archive and the tests share. Invented data; standard library only.

- :func:`build_reading_room`: the "reading-room" source on host 2, whose items meet each
  reservation collector reads (``PLAN``: what each item carries and its expected outcome);
  the host's ``/.well-known/tdmrep.json`` reserves one path prefix.
- :func:`xmp_packet`: an XMP packet carrying IPTC Photo Metadata 2023.1 "Data Mining"
  (``plus:DataMining``, namespace ``http://ns.useplus.org/ldf/xmp/1.0/``, a value of the PLUS
  Data Mining vocabulary ``http://ns.useplus.org/ldf/vocab/DMI-...``) and "Other Constraints".
"""

from __future__ import annotations

import json
from typing import Any

PLUS_VOCAB = "http://ns.useplus.org/ldf/vocab/"


def xmp_packet(term: str, constraint: str = "Ask the archive first") -> bytes:
    """An XMP packet whose plus:DataMining is ``PLUS_VOCAB + term`` (a full URI is kept as
    given) and whose plus:OtherConstraints is ``constraint``."""
    value = term if term.startswith("http") else PLUS_VOCAB + term
    return ("<?xpacket begin='' id='W5M0MpCehiHzreSzNTczkc9d'?><x:xmpmeta xmlns:x='adobe:ns:"
            "meta/'><rdf:RDF xmlns:rdf='http://www.w3.org/1999/02/22-rdf-syntax-ns#'>"
            "<rdf:Description rdf:about='' xmlns:plus='http://ns.useplus.org/ldf/xmp/1.0/'>"
            f"<plus:DataMining>{value}</plus:DataMining><plus:OtherConstraints><rdf:Alt>"
            f"<rdf:li xml:lang='x-default'>{constraint}</rdf:li></rdf:Alt>"
            "</plus:OtherConstraints></rdf:Description></rdf:RDF></x:xmpmeta>"
            "<?xpacket end='w'?>").encode()


# --- the reading room: one source whose items meet every reservation collector reads --------
READING_ROOM = "/reading-room/"
RESERVED_PREFIX = "/reading-room/reserved/"
# TDMRep §3.1: a JSON array of rules; this one reserves one path prefix.
TDMREP_RULES = [{"location": RESERVED_PREFIX, "tdm-reservation": 1,
                 "tdm-policy": "http://127.0.0.2:{port}/reading-room/tdm-policy.json"}]
HTML_TYPE = "text/html; charset=utf-8"
# (key, what the archive does, expected state, expected reason); rr-6 is on the closed page.
PLAN = (
    ("rr-1", "plain", "stored", None),
    ("rr-2", "detail page meta tdm-reservation 1 (TDMRep §3.3)", "skipped", "tdmrep_reserved"),
    ("rr-3", "image answer X-Robots-Tag: noimageai (common practice)", "rejected",
     "noai_directive"),
    ("rr-4", "XMP plus:DataMining DMI-PROHIBITED-AIMLTRAINING (IPTC 2023.1)", "rejected",
     "xmp_data_mining"),
    ("rr-5", f"image under {RESERVED_PREFIX}, reserved by tdmrep.json (TDMRep §3.1)",
     "skipped", "tdmrep_reserved"),
    ("rr-7", "image answer tdm-reservation: 1 (TDMRep §3.2)", "rejected", "tdmrep_reserved"),
    ("rr-6", "listing page answers tdm-reservation: 1 (TDMRep §3.2)", "skipped",
     "tdmrep_reserved"),
)


def _listing(title: str, cards: list[tuple[str, str, str]]) -> str:
    rows = "".join(f'<li class="card"><a class="record" href="{href}">{name}</a> '
                   f'<span class="rights">{rights}</span></li>\n' for name, href, rights in cards)
    return (f'<!DOCTYPE html>\n<html lang="en"><head><meta charset="utf-8"><title>{title}'
            f"</title></head>\n<body><h1>{title}</h1><ul>\n{rows}</ul></body></html>\n")


def build_reading_room(b: Any) -> None:
    """The reading room on host 2 (see PLAN); items are Builder items of source
    "reading-room" with their expected outcomes, for the manifest."""
    from collector.demo_site.builder import Item, jpeg, url
    from collector.demo_site.catalogue import ALLOWED
    from collector.demo_site.pages import detail_page

    licence = ALLOWED[6]  # CC0 1.0 Universal
    cards: dict[str, list[tuple[str, str, str]]] = {"open": [], "closed": []}
    for key, what, state, reason in PLAN:
        title, creator, date = b.person(key)
        folder = RESERVED_PREFIX if key == "rr-5" else READING_ROOM + "media/"
        item = b.add(Item("reading-room", key, title, creator, date, licence, 2,
                          f"{folder}{key}.jpg", state=state, reason=reason, note=what))
        params: dict[str, Any] = {"xmp": xmp_packet("DMI-PROHIBITED-AIMLTRAINING")} \
            if key == "rr-4" else {}
        headers = ({"X-Robots-Tag": "noimageai"} if key == "rr-3" else
                   {"tdm-reservation": "1"} if key == "rr-7" else None)
        data = jpeg(b.picture(key, 480, 360), **params)
        b.serve_image(item, data, "image/jpeg", headers=headers)
        page = detail_page(title=title, creator=creator, date=date,
                           image_src=item.image_url, width=480, height=360,
                           licence_text=licence.text or "", licence_url=licence.url,
                           listing_href=READING_ROOM)
        if key == "rr-2":
            page = page.replace("<head>", '<head><meta name="tdm-reservation" content="1">', 1)
        detail = f"{READING_ROOM}item/{key}.html"
        b.put_page(2, detail, page, HTML_TYPE)
        item.page_url = url(2, detail)
        cards["closed" if key == "rr-6" else "open"].append(
            (title, url(2, detail), licence.text or ""))
    b.put_page(2, READING_ROOM, _listing("Reading room", cards["open"]), HTML_TYPE)
    b.put_file(2, READING_ROOM + "closed/", _listing("Reading room, closed stacks",
                                                     cards["closed"]).encode(),
               HTML_TYPE, role="page", template=True, headers={"tdm-reservation": "1"})
    b.put_page(2, "/.well-known/tdmrep.json", json.dumps(TDMREP_RULES, indent=1),
               "application/json", role="policy")
