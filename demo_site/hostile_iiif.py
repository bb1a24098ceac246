"""Hostile IIIF servers for the hostile archive (``demo_site.hostile``): a manifest that lists
itself, a collection cycle, and an info.json claiming 10^9 x 10^9 pixels.

Each handler serves a whole small IIIF site on its case's server: ``/iiif/start.json`` (where
the source starts), further documents under ``/iiif/``, image services under ``/svc/`` (their
``info.json`` and any image request, answered with a small noise picture). Document shapes:
IIIF Presentation API 3.0 §3; info.json: Image API 3.0 §5.
"""

from __future__ import annotations

import io
import json
import random
from http.server import BaseHTTPRequestHandler
from typing import Any

from PIL import Image

from collector.demo_site.loopback import send

H = BaseHTTPRequestHandler
P3 = "http://iiif.io/api/presentation/3/context.json"
CC0 = "https://creativecommons.org/publicdomain/zero/1.0/"
START = "/iiif/start.json"


def _base(h: H) -> str:
    address: Any = h.server.server_address  # an IPv4 (host, port) pair on loopback
    return f"http://{address[0]}:{address[1]}"


def _json(h: H, doc: Any) -> None:
    send(h, 200, json.dumps(doc).encode(), {"Content-Type": "application/ld+json"})


def _picture(seed: str) -> bytes:
    rng = random.Random(seed)
    out = io.BytesIO()
    Image.frombytes("RGB", (64, 64), rng.randbytes(64 * 64 * 3)).save(out, "PNG")
    return out.getvalue()


def _manifest(base: str, name: str, extra_items: list[dict[str, Any]] | None = None,
              ) -> dict[str, Any]:
    """A 3.0 manifest with one canvas painted through the image service /svc/<name>."""
    canvas = f"{base}/iiif/{name}/canvas/1"
    body = {"id": f"{base}/svc/{name}/full/max/0/default.png", "type": "Image",
            "service": [{"id": f"{base}/svc/{name}", "type": "ImageService3",
                         "profile": "level2"}]}
    return {"@context": P3, "id": f"{base}/iiif/{name}.json", "type": "Manifest",
            "label": {"none": [name]}, "rights": CC0,
            "items": [{"id": canvas, "type": "Canvas", "width": 64, "height": 64, "items": [
                {"id": f"{canvas}/page", "type": "AnnotationPage", "items": [
                    {"id": f"{canvas}/anno", "type": "Annotation", "motivation": "painting",
                     "body": body, "target": canvas}]}]}, *(extra_items or [])]}


def _collection(base: str, path: str, refs: list[tuple[str, str]]) -> dict[str, Any]:
    return {"@context": P3, "id": base + path, "type": "Collection", "label": {"none": [path]},
            "items": [{"id": base + ref, "type": kind} for kind, ref in refs]}


def _service(h: H, width: int, height: int) -> bool:
    """Answer /svc/ requests: info.json with the given size claim, else a small picture."""
    path = h.path.split("?", 1)[0]
    if not path.startswith("/svc/"):
        return False
    if path.endswith("/info.json"):
        _json(h, {"@context": "http://iiif.io/api/image/3/context.json",
                  "id": _base(h) + path.removesuffix("/info.json"), "type": "ImageService3",
                  "protocol": "http://iiif.io/api/image", "profile": "level2",
                  "width": width, "height": height})
    else:
        send(h, 200, _picture(path.split("/")[2]), {"Content-Type": "image/png"})
    return True


def self_listing_manifest(h: H, ctx: Any) -> None:
    """A manifest whose items list the manifest itself (and whose collection lists it twice)."""
    if _service(h, 64, 64):
        return
    base = _base(h)
    if h.path == START:
        _json(h, _collection(base, START, [("Manifest", "/iiif/selfish.json")] * 2))
    else:
        _json(h, _manifest(base, "selfish", [{"id": f"{base}/iiif/selfish.json",
                                              "type": "Manifest"}]))


def collection_cycle(h: H, ctx: Any) -> None:
    """Collection A lists B, B lists A and a manifest: a cycle a walker must leave."""
    if _service(h, 64, 64):
        return
    base = _base(h)
    if h.path == START:
        _json(h, _collection(base, START, [("Collection", "/iiif/b.json")]))
    elif h.path == "/iiif/b.json":
        _json(h, _collection(base, "/iiif/b.json", [("Collection", START),
                                                    ("Manifest", "/iiif/leaf.json")]))
    else:
        _json(h, _manifest(base, "leaf"))


def billion_pixels(h: H, ctx: Any) -> None:
    """An info.json claiming 10^9 x 10^9 pixels: the request must stay at the target size."""
    if _service(h, 10**9, 10**9):
        return
    _json(h, _manifest(_base(h), "vast"))


def requested_sizes(paths: list[str]) -> list[str]:
    """The size segments of the image requests in a request log (Image API 3.0 §4)."""
    return [p.split("/")[4] for p in paths
            if p.startswith("/svc/") and not p.endswith("/info.json") and p.count("/") >= 6]


def surrogate_labels(h: H, ctx: Any) -> None:
    """A manifest whose label, summary and metadata hold lone surrogates (JSON escapes such as
    "\\ud800", RFC 8259 §8.2), and a collection listing it beside a manifest whose id holds
    one (a URL no request can carry)."""
    if _service(h, 64, 64):
        return
    base = _base(h)
    if h.path == START:
        _json(h, _collection(base, START, [("Manifest", "/iiif/odd.json"),
                                           ("Manifest", "/iiif/odd\udc00.json")]))
        return
    doc = _manifest(base, "odd")
    doc["label"] = {"en": ["fern \ud800 frond"]}
    doc["summary"] = {"en": ["\udfff"]}
    doc["metadata"] = [{"label": {"en": ["Creator \udbff"]}, "value": {"en": ["Ann \ud800"]}}]
    _json(h, doc)
