"""The demo archive's IIIF collection, on host 4 (the annex): a nested collection of four
manifests whose image services a polite client must negotiate with.

    /iiif/collection.json                      Presentation 3.0 Collection
      /iiif/herbarium/collection.json          a nested Collection
        /iiif/m/ferns.json                     3.0, two canvases, level-2 service, maxWidth 400
        /iiif/m/stones.json                    3.0, one canvas, level-0 service with sizes
        /iiif/m/feathers.json                  3.0, rights = RightsStatements.org NoC-US; its
                                               second canvas carries its own rights, InC
      /iiif/m/beetles.json                     Presentation 2.1, level-1 Image API 2.1 service

The image server is static: every service answers exactly the one size a correct client asks
for at the demo recipe's ``target_size`` (``IIIF_TARGET``); any other size is a 404 the gather
would report. Expected sizes follow IIIF Image API 3.0 §4.2/§5 and 2.1 §4.2/§5: a level-2
service confines to the box (``!w,h``) under maxWidth (maxHeight defaults to it); a level-0
service is asked for its smallest listed size at or above the target; a 2.1 level-1 service by
width (``w,``). Canvas ids live on an invented domain: they identify, they are never fetched.
"""

from __future__ import annotations

import json
from typing import Any

from collector.demo_site.builder import Builder, Item, jpeg, url
from collector.demo_site.catalogue import CC, Licence

HOST = 4
IIIF_TARGET = 512
SOURCE = "iiif"
IDS = "https://fernhollow.example.org/iiif"
P3 = "http://iiif.io/api/presentation/3/context.json"
P2 = "http://iiif.io/api/presentation/2/context.json"
NOC_US = "http://rightsstatements.org/vocab/NoC-US/1.0/"
IN_C = "http://rightsstatements.org/vocab/InC/1.0/"
JSON_LD = "application/ld+json"

# manifest -> (Presentation version, licence URL, canvases as (service level, full size,
# info.json extras, size a correct client asks for, served size, rights of the canvas))
PLAN: dict[str, dict[str, Any]] = {
    "ferns": {"version": "3.0", "rights": f"{CC}/licenses/by/4.0/", "spdx": "CC-BY-4.0",
              "canvases": [("level2", (1600, 1200), {"maxWidth": 400}, "!400,300", (400, 300),
                            None)] * 2},
    "stones": {"version": "3.0", "rights": f"{CC}/publicdomain/zero/1.0/", "spdx": "CC0-1.0",
               "canvases": [("level0", (2400, 1800), {"sizes": [
                   {"width": 300, "height": 225}, {"width": 600, "height": 450},
                   {"width": 1200, "height": 900}]}, "600,450", (600, 450), None)]},
    "feathers": {"version": "3.0", "rights": NOC_US, "spdx": None,
                 "canvases": [("level2", (800, 600), {}, "!512,384", (512, 384), None),
                              ("level2", (800, 600), {}, "!512,384", (512, 384), IN_C)]},
    "beetles": {"version": "2.1", "rights": f"{CC}/licenses/by-sa/4.0/", "spdx": "CC-BY-SA-4.0",
                "canvases": [("level1", (1024, 768), {}, "512,", (512, 384), None)]},
}


def _page(b: Builder, path: str, doc: dict[str, Any]) -> None:
    b.put_page(HOST, path, json.dumps(doc, indent=1), JSON_LD, role="page")


def _info(b: Builder, svc: str, version: str, level: str, full: tuple[int, int],
          extra: dict[str, Any]) -> None:
    """info.json of one service (Image API 3.0 §5 / 2.1 §5)."""
    if version == "3.0":
        doc = {"@context": "http://iiif.io/api/image/3/context.json", "id": url(HOST, svc),
               "type": "ImageService3", "protocol": "http://iiif.io/api/image",
               "profile": level, "width": full[0], "height": full[1], **extra}
    else:
        doc = {"@context": "http://iiif.io/api/image/2/context.json", "@id": url(HOST, svc),
               "protocol": "http://iiif.io/api/image", "width": full[0], "height": full[1],
               "profile": [f"http://iiif.io/api/image/2/{level}.json", *(
                   [{"maxWidth": extra["maxWidth"]}] if "maxWidth" in extra else [])]}
    _page(b, f"{svc}/info.json", doc)


def _canvas3(cid: str, label: str, svc: str, level: str, full: tuple[int, int],
             rights: str | None) -> dict[str, Any]:
    body = {"id": url(HOST, f"{svc}/full/max/0/default.jpg"), "type": "Image",
            "format": "image/jpeg", "width": full[0], "height": full[1],
            "service": [{"id": url(HOST, svc), "type": "ImageService3", "profile": level}]}
    canvas: dict[str, Any] = {
        "id": cid, "type": "Canvas", "label": {"none": [label]}, "width": full[0],
        "height": full[1], "items": [{"id": f"{cid}/page", "type": "AnnotationPage", "items": [
            {"id": f"{cid}/anno", "type": "Annotation", "motivation": "painting",
             "body": body, "target": cid}]}]}
    if rights:
        canvas["rights"] = rights
    return canvas


def _canvas2(cid: str, label: str, svc: str, level: str, full: tuple[int, int]) -> dict[str, Any]:
    return {"@id": cid, "@type": "sc:Canvas", "label": label, "width": full[0],
            "height": full[1], "images": [{
                "@type": "oa:Annotation", "motivation": "sc:painting", "on": cid,
                "resource": {"@id": url(HOST, f"{svc}/full/full/0/default.jpg"),
                             "@type": "dctypes:Image", "service": {
                                 "@context": "http://iiif.io/api/image/2/context.json",
                                 "@id": url(HOST, svc),
                                 "profile": f"http://iiif.io/api/image/2/{level}.json"}}}]}


def _manifest(b: Builder, name: str, plan: dict[str, Any]) -> str:
    """Serve one manifest, its info.json files and images; add its expected items."""
    path = f"/iiif/m/{name}.json"
    title, creator, date = b.person(f"iiif:{name}")
    canvases = []
    for n, (level, full, extra, size, served, rights) in enumerate(plan["canvases"], 1):
        cid, svc = f"{IDS}/{name}/canvas/{n}", f"/iiif/img/{name}-{n}"
        label = f"sheet {n}"
        _info(b, svc, plan["version"], level, full, extra)
        canvases.append(_canvas3(cid, label, svc, level, full, rights) if plan["version"] == "3.0"
                        else _canvas2(cid, label, svc, level, full))
        _item(b, name, plan, n, (title, creator, date), cid, svc, size, served, rights)
    if plan["version"] == "3.0":
        doc: dict[str, Any] = {
            "@context": P3, "id": url(HOST, path), "type": "Manifest",
            "label": {"en": [title], "de": [f"{title} (de)"]},
            "metadata": [{"label": {"en": ["Creator"]}, "value": {"none": [creator]}},
                         {"label": {"en": ["Date"]}, "value": {"none": [date]}}],
            "summary": {"en": ["Generated specimen sheets of an invented society."]},
            "rights": plan["rights"],
            "requiredStatement": {"label": {"en": ["Attribution"]},
                                  "value": {"en": ["Fernhollow Field Society"]}},
            "homepage": [{"id": url(HOST, f"/iiif/web/{name}"), "type": "Text"}],
            "items": canvases}
    else:
        doc = {"@context": P2, "@id": url(HOST, path), "@type": "sc:Manifest", "label": title,
               "metadata": [{"label": "Creator", "value": creator},
                            {"label": "Date", "value": date}],
               "license": plan["rights"], "attribution": "Fernhollow Field Society",
               "sequences": [{"@type": "sc:Sequence", "canvases": canvases}]}
    _page(b, path, doc)
    return path


def _item(b: Builder, name: str, plan: dict[str, Any], n: int, who: tuple[str, str, str],
          cid: str, svc: str, size: str, served: tuple[int, int], rights: str | None) -> None:
    """The expected outcome of one canvas, and the one image size served for it."""
    title = f"{who[0]} (sheet {n})" if len(plan["canvases"]) > 1 else who[0]
    licence_url = rights or plan["rights"]
    spdx = None if rights else plan["spdx"]
    item = b.add(Item(SOURCE, cid, title, who[1], who[2], Licence(None, licence_url, spdx),
                      HOST, f"{svc}/full/{size}/0/default.jpg"))
    b.serve_image(item, jpeg(b.picture(f"iiif:{name}-{n}", *served)), "image/jpeg")
    item.facts["iiif_size"] = size
    statement = {NOC_US: "NoC-US", IN_C: "InC"}.get(licence_url)
    if statement:
        item.facts["rights_statement"] = statement
    if statement == "InC":  # never allowed by default, and the demo recipe names only NoC-US
        item.state, item.reason = "skipped", "rights_statement_not_allowed"
        item.note = "the canvas's own rights: RightsStatements.org InC"


def build_iiif(b: Builder) -> dict[str, Any]:
    """Serve the IIIF collection on host 4; return its entry for the manifest's sources."""
    paths = {name: _manifest(b, name, plan) for name, plan in PLAN.items()}
    sub = {"@context": P3, "id": url(HOST, "/iiif/herbarium/collection.json"),
           "type": "Collection", "label": {"en": ["Herbarium sheets"]},
           "items": [{"id": url(HOST, paths[n]), "type": "Manifest", "label": {"en": [n]}}
                     for n in ("ferns", "stones", "feathers")]}
    _page(b, "/iiif/herbarium/collection.json", sub)
    top = {"@context": P3, "id": url(HOST, "/iiif/collection.json"), "type": "Collection",
           "label": {"en": ["Fernhollow Field Society: IIIF collection"]},
           "items": [{"id": sub["id"], "type": "Collection", "label": sub["label"]},
                     {"id": url(HOST, paths["beetles"]), "type": "Manifest",
                      "label": {"en": ["beetles"]}}]}
    _page(b, "/iiif/collection.json", top)
    return {"name": SOURCE, "kind": "iiif", "host": HOST, "url": top["id"],
            "target_size": IIIF_TARGET,
            "total": sum(1 for i in b.items if i.source == SOURCE)}
