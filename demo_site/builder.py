"""Building blocks of the generated archive: hosts, policy, items and the file builder.

The expected outcomes assume the policy in ``POLICY`` (the demo recipe's settings) and
that sources are processed one after another in ``SOURCE_ORDER`` with items in listing
order: "duplicate_of" names the first occurrence in that order.
"""

from __future__ import annotations

import hashlib
import io
import json
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any

from PIL import Image

from collector.demo_site import art, metadata
from collector.demo_site.catalogue import ALLOWED, CREATORS, PLACES, SUBJECTS, Licence
from collector.demo_site.hosts import HOSTS

GENERATOR_VERSION = "1"
SEED = 3  # chosen so unrelated pictures are >= 14 bits apart (imagehash.phash)

SOURCE_ORDER = ("api-pages", "api-objects", "api-linked", "gallery", "scanner", "oai-records",
                "iiif", "reading-room")
POLICY: dict[str, Any] = {
    "licence_allow": [
        "CC0-1.0", "CC-PDM-1.0",
        "CC-BY-1.0", "CC-BY-2.0", "CC-BY-2.5", "CC-BY-3.0", "CC-BY-4.0",
        "CC-BY-SA-1.0", "CC-BY-SA-2.0", "CC-BY-SA-2.5", "CC-BY-SA-3.0", "CC-BY-SA-4.0",
        "rs:NoC-US",
    ],
    "allow_unknown": False,
    "min_side": 128,
    "max_image_bytes": 3_000_000,
    "max_pixels": 89_478_485,
    "near_distance": 8,
    "near_duplicates": "keep",
}

V1_PER_PAGE = 20
V2_PAGE = 10
V3_PAGE = 8
GALLERY_PAGE = 12


@dataclass
class Item:
    """One listed item and what a correct collector must conclude about it."""

    source: str
    key: str
    title: str
    creator: str
    date: str
    licence: Licence
    image_host: int
    image_path: str
    state: str = "stored"
    reason: str | None = None
    duplicate_of: dict[str, str] | None = None
    mirrored: bool | None = None
    conflict: bool = False
    flags: list[str] = field(default_factory=list)
    type_mismatch: dict[str, str] | None = None
    embedded: dict[str, str] | None = None
    deliberate: str | None = None
    final_image_url: str | None = None
    page_url: str | None = None
    note: str = ""
    facts: dict[str, Any] = field(default_factory=dict)

    @property
    def image_url(self) -> str:
        return url(self.image_host, self.image_path)

    def to_json(self) -> dict[str, Any]:
        d = asdict(self)
        d.pop("licence")
        facts = d.pop("facts")
        d.update(image_url=self.image_url, licence_text=self.licence.text,
                 licence_url=self.licence.url, expected_spdx=self.licence.spdx, **facts)
        return d


def url(host: int, path: str) -> str:
    """Absolute URL on a demo host, with the ``{port}`` placeholder."""
    return f"http://{HOSTS[host]}:{{port}}{path}"


def seed_for(seed: int, name: str) -> int:
    digest = hashlib.sha256(f"{seed}:{name}".encode()).digest()
    return int.from_bytes(digest[:8], "big")


def sha256_hex(data: bytes) -> str:
    return hashlib.sha256(data).hexdigest()


def canonical_json(obj: Any) -> bytes:
    """Canonical JSON bytes (sorted keys, no spaces) used for digests."""
    return json.dumps(obj, sort_keys=True, separators=(",", ":"), ensure_ascii=False).encode()


class Builder:
    """Collects files, routes and items while the archive is generated."""

    def __init__(self, out: Path, seed: int) -> None:
        self.out = out
        self.seed = seed
        self.routes: dict[int, dict[str, dict[str, Any]]] = {h: {} for h in HOSTS}
        self.items: list[Item] = []
        self.by_key: dict[str, Item] = {}
        self.pictures: dict[str, Image.Image] = {}
        self.bytes_of: dict[str, bytes] = {}
        self.apis: dict[str, Any] = {}
        self.scans: list[dict[str, Any]] = []
        self.counter = 0

    # -- content helpers --
    def picture(self, name: str, width: int = 640, height: int = 480,
                motif: str | None = None) -> Image.Image:
        im = art.specimen(seed_for(self.seed, name), width, height, motif)
        self.pictures[name] = im
        return im

    def person(self, name: str) -> tuple[str, str, str]:
        """Title, creator and date for an item, drawn from its name."""
        s = seed_for(self.seed, "meta:" + name)
        subject = SUBJECTS[s % len(SUBJECTS)]
        place = PLACES[(s >> 8) % len(PLACES)]
        creator = CREATORS[(s >> 16) % len(CREATORS)]
        date = f"20{18 + (s >> 24) % 7}-{1 + (s >> 32) % 12:02d}-{1 + (s >> 40) % 28:02d}"
        self.counter += 1
        return f"{subject}, {place} (no. {self.counter})", creator, date

    # -- routes --
    def put_file(self, host: int, path: str, data: bytes, content_type: str,
                 role: str = "image", deliberate: str | None = None,
                 template: bool = False,
                 headers: dict[str, str] | None = None) -> dict[str, Any]:
        rel = path + "index.html" if path.endswith("/") else path
        target = self.out / "site" / str(host) / rel.lstrip("/")
        target.parent.mkdir(parents=True, exist_ok=True)
        target.write_bytes(data)
        res = {"kind": "file", "file": f"site/{host}{rel}", "status": 200,
               "content_type": content_type, "sha256": sha256_hex(data), "size": len(data),
               "role": role, "deliberate": deliberate, "template": template}
        if headers:  # further response header fields (the reading room's reservations)
            res["headers"] = sorted(headers.items())
        self.routes[host][path] = res
        return res

    def put_page(self, host: int, path: str, text: str, content_type: str,
                 role: str = "page") -> None:
        """A text page; "{port}" in it is replaced by the server (so sha256 is pre-fill)."""
        self.put_file(host, path, text.encode("utf-8"), content_type, role=role,
                      template=True)

    def put_redirect(self, host: int, path: str, status: int, location: str) -> None:
        self.routes[host][path] = {"kind": "redirect", "status": status, "location": location,
                                   "role": "redirect", "deliberate": None}

    def put_missing(self, host: int, path: str) -> None:
        self.routes[host][path] = {"kind": "missing", "status": 404, "role": "image",
                                   "deliberate": "missing"}

    def add(self, item: Item) -> Item:
        self.items.append(item)
        self.by_key[item.key] = item
        return item

    def serve_image(self, item: Item, data: bytes, content_type: str,
                    deliberate: str | None = None, facts: dict[str, Any] | None = None,
                    headers: dict[str, str] | None = None) -> None:
        self.put_file(item.image_host, item.image_path, data, content_type,
                      deliberate=deliberate, headers=headers)
        self.bytes_of[item.key] = data
        item.deliberate = deliberate
        item.facts = {"sha256": sha256_hex(data), "bytes": len(data),
                      "content_type": content_type, **(facts or image_facts(data))}


def image_facts(data: bytes) -> dict[str, Any]:
    """Format, size, mode, frames and Exif orientation as Pillow reads them."""
    with Image.open(io.BytesIO(data)) as im:
        orientation = im.getexif().get(metadata.TAG_ORIENTATION)
        return {"format": im.format, "width": im.width, "height": im.height, "mode": im.mode,
                "frames": getattr(im, "n_frames", 1), "orientation": orientation}


def jpeg(im: Image.Image, quality: int = 90, **params: Any) -> bytes:
    return metadata.encode(im, "JPEG", quality=quality, **params)


def png(im: Image.Image, **params: Any) -> bytes:
    return metadata.encode(im, "PNG", **params)


def licence_cycle(i: int) -> Licence:
    return ALLOWED[i % len(ALLOWED)]


