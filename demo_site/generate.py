"""Generate the Fernhollow Field Society archive: files, site map and manifest.

``generate(out_dir)`` writes, deterministically for a given seed:

* ``site/<host>/<path>``  every file the demo server serves (images, HTML pages)
* ``site.json``           the server's map: robots per host, routes, JSON API records
* ``scans/``              scanner-bed pages for the local scans source
* ``manifest.json``       what a correct collector must conclude for every item
"""

from __future__ import annotations

import hashlib
import json
import shutil
from pathlib import Path
from typing import Any

import numpy as np

from collector.demo_site import pages
from collector.demo_site.builder import (
    GALLERY_PAGE,
    GENERATOR_VERSION,
    POLICY,
    SEED,
    SOURCE_ORDER,
    Builder,
    canonical_json,
    sha256_hex,
    url,
)
from collector.demo_site.content import (
    build_api_linked,
    build_api_objects,
    build_api_pages,
    build_gallery,
    build_scans,
)
from collector.demo_site.hosts import (
    CRAWL_DELAY,
    DEFAULT_RATE,
    HOST_ROLES,
    HOSTS,
    LAST_MODIFIED,
    RETRY_AFTER_FORM,
)
from collector.demo_site.iiif_archive import build_iiif
from collector.demo_site.oai_content import build_oai, oai_manifest
from collector.demo_site.pixel_cases import build_pixel_cases
from collector.demo_site.tdm import build_reading_room

ROBOTS_API = """# Fernhollow Field Society: API and media host
User-agent: *
Allow: /private/public-notes/
Disallow: /private/
Disallow: /*.bak$
Disallow: /search?
Crawl-delay: {delay}

# an invented indexer that the society asked to stay away
User-agent: fernhollow-indexer
Disallow: /
"""
ROBOTS_ANNEX = """# Fernhollow Field Society: annex
User-agent: *
Disallow: /drafts/
"""

def _hosts_section(rate: float) -> dict[str, Any]:
    return {
        str(h): {
            "address": HOSTS[h], "role": HOST_ROLES[h], "rate_per_s": rate,
            "retry_after_form": RETRY_AFTER_FORM[h],
            "robots": {
                1: {"status": 200, "body": ROBOTS_API.format(delay=CRAWL_DELAY)},
                2: {"status": 404},
                3: {"status": 503},
                4: {"status": 301, "location": "/policies/robots.txt",
                    "target_body": ROBOTS_ANNEX},
            }[h],
        } for h in HOSTS
    }


def generate(out_dir: Path, *, seed: int = SEED) -> dict[str, Any]:
    """Write the whole archive into ``out_dir`` (emptied first); return the manifest."""
    out_dir = Path(out_dir)
    for sub in ("site", "scans"):
        if (out_dir / sub).exists():
            shutil.rmtree(out_dir / sub)
    out_dir.mkdir(parents=True, exist_ok=True)
    b = Builder(out_dir, seed)
    build_api_pages(b)
    build_api_objects(b)
    build_api_linked(b)
    build_gallery(b)
    build_scans(b)
    build_oai(b)
    iiif_source = build_iiif(b)
    build_reading_room(b)
    build_pixel_cases(b)
    hosts = _hosts_section(DEFAULT_RATE)
    b.put_page(4, "/policies/robots.txt", ROBOTS_ANNEX, "text/plain; charset=utf-8",
               role="robots")
    site = {"hosts": hosts, "routes": {str(h): r for h, r in b.routes.items()},
            "apis": b.apis, "last_modified": LAST_MODIFIED, "crawl_delay": CRAWL_DELAY}
    site_bytes = canonical_json(site)
    (out_dir / "site.json").write_bytes(site_bytes)
    resources = []
    for h, routes in b.routes.items():
        for path, res in sorted(routes.items()):
            resources.append({"url": url(h, path), "host": h, "path": path,
                              **{k: v for k, v in res.items() if k != "file"}})
    manifest = {
        "format": "fernhollow-demo-manifest/1",
        "generator_version": GENERATOR_VERSION,
        "seed": seed,
        "society": pages.SOCIETY,
        "notice": "Invented archive; generated images; licence data is not legal advice.",
        "hosts": hosts,
        "policy": POLICY,
        "source_order": list(SOURCE_ORDER),
        "sources": [*_sources_section(b), iiif_source],
        "items": [it.to_json() for it in b.items],
        "resources": resources,
        "scans": b.scans,
        "oai": oai_manifest(),
        "site_sha256": sha256_hex(site_bytes),
    }
    manifest["digest"] = manifest_digest(manifest)
    (out_dir / "manifest.json").write_text(json.dumps(manifest, indent=1, sort_keys=True,
                                                      ensure_ascii=False))
    return manifest


def _sources_section(b: Builder) -> list[dict[str, Any]]:
    v1, v2, v3 = b.apis["v1"], b.apis["v2"], b.apis["v3"]
    return [
        {"name": "api-pages", "kind": "json_api", "style": "page", "host": 1,
         "url": url(1, v1["path"]), "per_page": v1["per_page"], "total": len(v1["records"])},
        {"name": "api-objects", "kind": "json_api", "style": "cursor", "host": 1,
         "url": url(1, v2["path"]), "page_size": v2["page_size"],
         "total": len(v2["records"]), "detail": url(1, v2["path"] + "/{id}")},
        {"name": "api-linked", "kind": "json_api", "style": "link_header", "host": 4,
         "url": url(4, v3["path"]), "page_size": v3["page_size"],
         "total": len(v3["records"])},
        {"name": "gallery", "kind": "html", "host": 2, "url": url(2, "/gallery/"),
         "page_size": GALLERY_PAGE, "total": sum(1 for i in b.items if i.source == "gallery")},
        {"name": "scanner", "kind": "scans", "path": "scans",
         "files": [s["file"] for s in b.scans]},
        {"name": "oai-records", "kind": "oai_pmh", "host": b.apis["oai"]["host"],
         "url": url(b.apis["oai"]["host"], b.apis["oai"]["path"]),
         "page_size": b.apis["oai"]["page_size"], "total": len(b.apis["oai"]["records"])},
        {"name": "reading-room", "kind": "html", "host": 2, "url": url(2, "/reading-room/"),
         "total": sum(1 for i in b.items if i.source == "reading-room"),
         "tdmrep": url(2, "/.well-known/tdmrep.json")},
    ]


def manifest_digest(manifest: dict[str, Any]) -> str:
    """sha256 over the canonical JSON of the manifest without its own "digest" key."""
    body = {k: v for k, v in manifest.items() if k != "digest"}
    return sha256_hex(canonical_json(body))


def load_manifest(content_dir: Path) -> dict[str, Any]:
    """Read ``manifest.json`` from a generated content folder."""
    return json.loads((Path(content_dir) / "manifest.json").read_text())


def content_version() -> str:
    """A short digest naming this generator's output (for cache folder names).

    It covers the generator's own source files, so editing them invalidates the cache.
    """
    import PIL

    h = hashlib.sha256(f"{GENERATOR_VERSION}:{SEED}:{PIL.__version__}:{np.__version__}"
                       .encode())
    for name in ("art", "builder", "catalogue", "content", "generate", "hosts", "metadata",
                 "pages", "oai", "oai_content", "iiif_archive", "tdm"):
        h.update((Path(__file__).parent / f"{name}.py").read_bytes())
    return h.hexdigest()[:12]


def ensure_content(cache_root: Path | None = None) -> Path:
    """Generate the archive once into a cache folder and return it (reused afterwards)."""
    import os
    import tempfile

    root = cache_root or Path(os.environ.get("XDG_CACHE_HOME", Path.home() / ".cache")) \
        / "collector-demo"
    target = Path(root) / content_version()
    if (target / "manifest.json").exists():
        return target
    target.parent.mkdir(parents=True, exist_ok=True)
    tmp = Path(tempfile.mkdtemp(prefix=".gen-", dir=target.parent))
    try:
        generate(tmp)
        try:
            tmp.rename(target)
        except OSError:  # another process won the race; use its copy
            shutil.rmtree(tmp, ignore_errors=True)
    finally:
        if tmp.exists() and tmp != target:
            shutil.rmtree(tmp, ignore_errors=True)
    return target

