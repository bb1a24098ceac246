"""The four loopback hosts of the demo archive and their published behaviour."""

from __future__ import annotations

HOSTS: dict[int, str] = {1: "127.0.0.1", 2: "127.0.0.2", 3: "127.0.0.3", 4: "127.0.0.4"}
HOST_ROLES: dict[int, str] = {
    1: "api: JSON APIs v1 (page numbers) and v2 (cursor) and their media; robots.txt 200 "
       "with Allow/Disallow, a wildcard and Crawl-delay; 429 Retry-After in seconds",
    2: "gallery: HTML listing and detail pages; robots.txt 404 (allow all); "
       "429 Retry-After as HTTP-date",
    3: "mirror: serves files but robots.txt answers 503 (assume complete disallow); "
       "429 Retry-After in seconds",
    4: "annex: JSON API v3 with RFC 8288 Link rel=next; robots.txt redirects to "
       "/policies/robots.txt; 429 Retry-After as HTTP-date",
}
RETRY_AFTER_FORM = {1: "seconds", 2: "http-date", 3: "seconds", 4: "http-date"}
DEFAULT_RATE = 20.0  # requests per second per host (token bucket, see server.py)
CRAWL_DELAY = 0.2
LAST_MODIFIED = "Sat, 01 Mar 2025 09:00:00 GMT"  # IMF-fixdate, RFC 9110 §5.6.7
