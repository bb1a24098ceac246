"""A fictional open-licence archive on loopback, for the demo and the tests.

The "Fernhollow Field Society" is invented; every picture is generated. ``generate``
writes the archive and a manifest of what a correct collector must conclude for every
item; ``start`` serves it on 127.0.0.1-127.0.0.4 (one port, four hosts):

* host 1 (127.0.0.1) "api": JSON API v1 (page numbers + total) and v2 (cursor, nested
  media candidates, detail records); robots.txt 200 with Allow/Disallow, a wildcard and
  Crawl-delay 0.2; 429 answers carry Retry-After in seconds.
* host 2 (127.0.0.2) "gallery": HTML listing pages (srcset thumbnails, <base href>,
  rel=next) and detail pages (licence block, rel=license); robots.txt 404 (allow all);
  Retry-After as HTTP-date.
* host 3 (127.0.0.3) "mirror": serves files, but robots.txt answers 503, so a polite
  client must not fetch anything else there.
* host 4 (127.0.0.4) "annex": JSON API v3 paged by RFC 8288 Link rel="next"; robots.txt
  redirects to /policies/robots.txt (Disallow: /drafts/); Retry-After as HTTP-date.

Beside the archive: ``loopback`` (a scriptable one-host loopback server with a request log),
``requestlog`` (counting a request log's busiest window) and ``hostile`` / ``hostile_run`` (an
archive that misbehaves on purpose, and the judge of a gather against it), shared by the tests
and the benches.

This package never imports ``collector``: it stands in for a real server.
"""

from __future__ import annotations

from collector.demo_site.generate import (
    content_version,
    ensure_content,
    generate,
    load_manifest,
    manifest_digest,
)
from collector.demo_site.hosts import DEFAULT_RATE, HOSTS
from collector.demo_site.server import DEMO_OPTIONS, DemoServer, RequestRecord, start

__all__ = [
    "DEFAULT_RATE",
    "DEMO_OPTIONS",
    "HOSTS",
    "DemoServer",
    "RequestRecord",
    "content_version",
    "ensure_content",
    "generate",
    "load_manifest",
    "manifest_digest",
    "start",
]
