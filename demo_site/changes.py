"""The demo archive months later: a few objects changed on purpose, for re-check tests.

:func:`change_archive` edits a running :class:`~collector.demo_site.server.Site` in memory
(the generated files on disk are never touched; a replaced image is written beside them under
``changed/``): one object's licence changes, some objects are removed (gone from the listing,
their images answer 404), one image's bytes are replaced (same URL, new ETag). Conditional
requests keep working for everything else (RFC 9110 §13.1). ``DemoServer.restore_archive``
puts the archive back as generated.
"""

from __future__ import annotations

import hashlib
import io
from dataclasses import dataclass
from pathlib import Path
from typing import Any
from urllib.parse import urlsplit

from PIL import Image, ImageOps


@dataclass(frozen=True)
class ArchiveChanges:
    """What :func:`change_archive` changed (object ids of the JSON API v1)."""

    licence_changed: str
    old_licence: Any
    new_licence: str
    removed: tuple[str, ...]
    replaced: str
    replaced_sha256: str


def _route_of(site: Any, record: dict[str, Any]) -> dict[str, Any]:
    return site.routes[1][urlsplit(record["image"]["full"]).path]


def _new_bytes(content_dir: Path, route: dict[str, Any]) -> tuple[str, bytes]:
    """The image of ``route`` mirrored left to right, in the same format: new bytes."""
    source = content_dir / route["file"]
    with Image.open(source) as im:
        fmt = im.format or "PNG"
        out = io.BytesIO()
        ImageOps.mirror(im.convert("RGB")).save(out, format=fmt)
    return "changed/" + Path(route["file"]).name, out.getvalue()


def change_archive(site: Any, *, licence_of: str, new_licence: str,
                   remove: tuple[str, ...], replace: str) -> ArchiveChanges:
    """Change the v1 API objects named (see the module docstring); returns what changed."""
    api = site.apis["v1"]
    by_id = {r["id"]: r for r in api["records"]}
    record = by_id[licence_of]
    old = record["rights"]["licence"]
    record["rights"] = {"licence": new_licence, "url": None}
    if licence_of in api.get("details", {}):
        api["details"][licence_of]["licence"] = {"name": new_licence, "url": None}
    for object_id in remove:
        _route_of(site, by_id[object_id])["kind"] = "missing"
        api["records"].remove(by_id[object_id])
        api.get("details", {}).pop(object_id, None)
    route = _route_of(site, by_id[replace])
    name, data = _new_bytes(site.content_dir, route)
    (site.content_dir / name).parent.mkdir(exist_ok=True)
    (site.content_dir / name).write_bytes(data)
    sha = hashlib.sha256(data).hexdigest()
    route.update({"file": name, "sha256": sha, "size": len(data)})
    return ArchiveChanges(licence_of, old, new_licence, tuple(remove), replace, sha)
