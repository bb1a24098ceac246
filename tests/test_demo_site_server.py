"""The demo server: hosts, robots variants, rate limiting, log and listing completeness."""

from __future__ import annotations

import http.client
import json
import time
import tomllib
from collections.abc import Iterator
from datetime import UTC, datetime
from email.utils import parsedate_to_datetime
from pathlib import Path
from typing import Any
from urllib.parse import quote, urljoin, urlsplit
from xml.etree import ElementTree

import pytest
from bs4 import BeautifulSoup

from collector.demo_site import DemoServer, recipes


def fetch(url: str, headers: dict[str, str] | None = None, method: str = "GET"
          ) -> tuple[int, http.client.HTTPMessage, bytes]:
    """One request without following redirects (loopback only)."""
    parts = urlsplit(url)
    assert parts.hostname and parts.hostname.startswith("127.0.0.")
    conn = http.client.HTTPConnection(parts.hostname, parts.port, timeout=10)
    try:
        target = parts.path + (f"?{parts.query}" if parts.query else "")
        conn.request(method, target, headers={"User-Agent": "demo-test/1", **(headers or {})})
        resp = conn.getresponse()
        return resp.status, resp.headers, resp.read()
    finally:
        conn.close()


@pytest.fixture(scope="module")
def fast_server(demo_content: Path) -> Iterator[DemoServer]:
    """A second server on the same content without rate limits, for bulk checks."""
    with DemoServer(demo_content, rate=0, slow={}) as server:
        yield server


@pytest.fixture(scope="module")
def manifest(demo_content: Path) -> dict[str, Any]:
    return json.loads((demo_content / "manifest.json").read_text())


def test_server_starts_quickly_and_every_host_answers_on_one_port(demo_content: Path) -> None:
    """All four loopback hosts share one ephemeral port and answer within 2 s of start."""
    t0 = time.monotonic()
    with DemoServer(demo_content) as server:
        assert time.monotonic() - t0 < 2.0  # brief's start-up target, generous on 2 cores
        assert server.port > 0
        for h in (1, 2, 3, 4):
            assert server.base_url(h) == f"http://127.0.0.{h}:{server.port}"
            status, _, _ = fetch(server.url(h, "/no-such-page"))
            assert status == 404
        assert {r.host for r in server.log} == {f"127.0.0.{h}" for h in (1, 2, 3, 4)}


def test_robots_variants_are_200_with_rules_404_503_and_redirect(
        fresh_demo_server: DemoServer) -> None:
    """robots.txt: host 1 rules with Crawl-delay, host 2 404, host 3 503, host 4 redirect."""
    s = fresh_demo_server
    status, headers, body = fetch(s.url(1, "/robots.txt"))
    text = body.decode()
    assert status == 200 and headers["Content-Type"].startswith("text/plain")
    assert "Disallow: /private/" in text and "Crawl-delay: 0.2" in text
    assert "Disallow: /*.bak$" in text  # wildcard and end anchor, RFC 9309 §2.2.3
    assert fetch(s.url(2, "/robots.txt"))[0] == 404  # "unavailable": allow all, §2.3.1.3
    assert fetch(s.url(3, "/robots.txt"))[0] == 503  # "unreachable": disallow, §2.3.1.4
    status, headers, _ = fetch(s.url(4, "/robots.txt"))
    assert status in (301, 302, 307, 308)  # redirects to follow, RFC 9309 §2.3.1.2
    target = urljoin(s.url(4, "/robots.txt"), headers["Location"])
    status, _, body = fetch(target)
    assert status == 200 and "Disallow: /drafts/" in body.decode()


def _hammer(server: DemoServer, host: int, n: int = 30) -> list[tuple[int, Any]]:
    return [fetch(server.url(host, "/robots.txt"))[:2] for _ in range(n)]


def test_hammering_host_1_gets_429_with_retry_after_in_seconds(demo_content: Path) -> None:
    """Going faster than the published rate yields 429 with delay-seconds Retry-After."""
    with DemoServer(demo_content, rate=5, burst=3) as server:
        replies = _hammer(server, 1)
        limited = [h for status, h in replies if status == 429]
        assert limited, "a burst of 30 requests at a 5/s limit must be refused"
        value = limited[0]["Retry-After"]
        # RFC 9110 §10.2.3: delay-seconds = 1*DIGIT
        assert value.isdigit() and 1 <= int(value) <= 5
        assert [r.status for r in server.log].count(429) == len(limited)


def test_hammering_host_2_gets_429_with_retry_after_as_http_date(demo_content: Path) -> None:
    """The gallery host states Retry-After as an IMF-fixdate that email.utils parses."""
    with DemoServer(demo_content, rate=5, burst=3) as server:
        limited = [h for status, h in _hammer(server, 2) if status == 429]
        assert limited
        value = limited[0]["Retry-After"]
        assert value.endswith(" GMT")  # IMF-fixdate, RFC 9110 §5.6.7
        when = parsedate_to_datetime(value)
        delta = (when - datetime.now(UTC)).total_seconds()
        assert -1 <= delta <= 10


def test_rate_limit_lets_a_client_at_half_the_rate_through(demo_content: Path) -> None:
    """A client spacing requests at twice the minimum interval is never refused."""
    with DemoServer(demo_content, rate=10, burst=1) as server:
        statuses = []
        for _ in range(8):
            statuses.append(fetch(server.url(1, "/robots.txt"))[0])
            time.sleep(0.2)
        assert statuses == [200] * 8


def test_scheduled_maintenance_answers_503_then_recovers(demo_content: Path) -> None:
    """The first N hits on the maintenance path get 503 with Retry-After, then 200."""
    with DemoServer(demo_content, maintenance={"/api/v2/objects": 2}) as server:
        first = fetch(server.url(1, "/api/v2/objects"))
        second = fetch(server.url(1, "/api/v2/objects"))
        third = fetch(server.url(1, "/api/v2/objects"))
        assert [first[0], second[0], third[0]] == [503, 503, 200]
        assert first[1]["Retry-After"] == "1"
        server.reset()
        assert fetch(server.url(1, "/api/v2/objects"))[0] == 503


def test_request_log_records_time_client_agent_path_status_and_bytes(
        demo_content: Path, tmp_path: Path) -> None:
    """Every request is logged in memory and as JSONL with a server monotonic start."""
    log_path = tmp_path / "requests.jsonl"
    with DemoServer(demo_content, log_path=log_path) as server:
        before = time.monotonic()
        status, _, body = fetch(server.url(1, "/api/v1/specimens?page=2&per_page=5"))
        after = time.monotonic()
        fetch(server.url(2, "/gallery/"), method="HEAD")
        log = server.log
    assert status == 200
    first = log[0]
    assert before <= first.t <= first.t_end <= after
    assert (first.host, first.path, first.status, first.bytes, first.user_agent) == (
        "127.0.0.1", "/api/v1/specimens?page=2&per_page=5", 200, len(body), "demo-test/1")
    assert log[1].method == "HEAD" and log[1].bytes == 0
    lines = [json.loads(line) for line in log_path.read_text().splitlines()]
    assert [r["path"] for r in lines] == [r.path for r in log]


def test_conditional_get_with_etag_answers_304(fresh_demo_server: DemoServer) -> None:
    """If-None-Match with the served ETag gives 304 without a body (RFC 9110 §13.1.2)."""
    url = fresh_demo_server.url(1, "/media/specimens/FH-S-0001.jpg")
    status, headers, body = fetch(url)
    assert status == 200 and body[:2] == b"\xff\xd8"
    status, _, body = fetch(url, {"If-None-Match": headers["ETag"]})
    assert status == 304 and body == b""
    status, _, _ = fetch(url, {"If-None-Match": '"something-else"'})
    assert status == 200


def test_redirect_chain_has_three_hops_across_hosts(fresh_demo_server: DemoServer,
                                                    manifest: dict[str, Any]) -> None:
    """The moved specimen takes three redirects via another host to the final image."""
    item = next(i for i in manifest["items"] if i["final_image_url"])
    url, hops = fresh_demo_server.fill(item["image_url"]), []
    while True:
        status, headers, body = fetch(url)
        if status not in (301, 302, 303, 307, 308):
            break
        url = urljoin(url, headers["Location"])
        hops.append(urlsplit(url).hostname)
    assert len(hops) == 3 and len(set(hops)) >= 2
    assert url == fresh_demo_server.fill(item["final_image_url"])
    assert status == 200 and len(body) == item["bytes"]


def test_bad_pagination_parameters_get_400(fresh_demo_server: DemoServer) -> None:
    """Malformed page, per_page and cursor values are refused with 400 and a JSON error."""
    for target in ("/api/v1/specimens?page=x", "/api/v1/specimens?per_page=500",
                   "/api/v2/objects?cursor=%%%"):
        status, _, body = fetch(fresh_demo_server.url(1, target))
        assert status == 400 and "error" in json.loads(body), target


def _crawl(server: DemoServer) -> tuple[dict[tuple[str, str], str], set[str]]:
    """List every item via the three APIs and the HTML gallery; collect image URLs."""
    listed: dict[tuple[str, str], str] = {}
    referenced: set[str] = set()
    page = 1
    while True:  # v1: page numbers until the total is reached
        body = json.loads(fetch(server.url(1, f"/api/v1/specimens?page={page}"))[2])
        for r in body["results"]:
            listed[("api-pages", r["id"])] = r["image"]["full"]
        if page * 20 >= body["meta"]["total"]:
            break
        page += 1
    cursor = ""
    while True:  # v2: cursor
        body = json.loads(fetch(server.url(1, f"/api/v2/objects?cursor={cursor}"))[2])
        for r in body["data"]["items"]:
            urls = [urljoin(server.url(1, "/"), m["href"]) for m in r["media"]]
            referenced.update(urls)
            best = max(r["media"], key=lambda m: m["width"])
            listed[("api-objects", r["id"])] = urljoin(server.url(1, "/"), best["href"])
            detail = fetch(server.url(1, f"/api/v2/objects/{r['id']}"))
            assert detail[0] == 200
        cursor = body["paging"]["next_cursor"]
        if not cursor:
            break
    url: str | None = server.url(4, "/api/v3/finds")
    while url:  # v3: Link rel="next"
        _, headers, raw = fetch(url)
        for r in json.loads(raw)["finds"]:
            listed[("api-linked", r["ref"])] = r["file"]["url"]
        links = {p.split(";")[1].strip(): p.split(";")[0].strip(" <>")
                 for p in headers["Link"].split(",")}
        url = links.get('rel="next"')
    url = server.url(2, "/gallery/")
    while url:  # HTML listing with <base href> and detail pages
        soup = BeautifulSoup(fetch(url)[2], "html.parser")
        base = soup.find("base")["href"]
        for tile in soup.select("li.tile"):
            img = tile.select_one("img")
            referenced.add(urljoin(base, img["src"]))
            for part in img["srcset"].split(","):
                referenced.add(urljoin(base, part.split()[0]))
            detail_url = urljoin(base, tile.select_one("a")["href"])
            detail = BeautifulSoup(fetch(detail_url)[2], "html.parser")
            full = urljoin(detail_url, detail.select_one("figure img.full")["src"])
            key = detail_url.rsplit("/", 1)[1].removesuffix(".html")
            listed[("gallery", key)] = full
            assert detail.select_one('a[rel="license"]') or detail.select_one(".licence")
        nxt = soup.select_one("a[rel=next]")
        url = urljoin(base, nxt["href"]) if nxt else None
    _crawl_oai(server, listed)
    for start in ("/reading-room/", "/reading-room/closed/"):  # reservations (demo_site.tdm)
        listing = server.url(2, start)
        for card in BeautifulSoup(fetch(listing)[2], "html.parser").select("li.card a.record"):
            detail_url = urljoin(listing, card["href"])
            detail = BeautifulSoup(fetch(detail_url)[2], "html.parser")
            key = detail_url.rsplit("/", 1)[1].removesuffix(".html")
            listed[("reading-room", key)] = urljoin(detail_url,
                                                    detail.select_one("figure img.full")["src"])
    referenced.update(listed.values())
    return listed, referenced


def _crawl_oai(server: DemoServer, listed: dict[tuple[str, str], str]) -> None:
    """List the OAI-PMH feed (OAI-PMH 2.0 §4.6 ListRecords, §3.5 resumptionToken) with its
    one-off misbehaviours disarmed; deleted records (§2.5.1) list no image."""
    assert server.site is not None and server.site.oai is not None
    server.site.oai.arm(expire_token=False, unavailable=0)
    ns = {"o": "http://www.openarchives.org/OAI/2.0/", "dc": "http://purl.org/dc/elements/1.1/"}
    query = "verb=ListRecords&metadataPrefix=oai_dc"
    while query:
        root = ElementTree.fromstring(fetch(server.url(4, f"/oai?{query}"))[2])
        for record in root.iterfind("o:ListRecords/o:record", ns):
            if record.find("o:header", ns).get("status") == "deleted":
                continue
            key = record.findtext("o:header/o:identifier", namespaces=ns)
            image = [v.text for v in record.iterfind(".//dc:identifier", ns)
                     if v.text.endswith(".png")]
            listed[("oai-records", key)] = image[0]
        token = root.findtext("o:ListRecords/o:resumptionToken", namespaces=ns)
        query = f"verb=ListRecords&resumptionToken={quote(token)}" if token else ""
    server.site.arm()


def test_every_listed_item_has_exactly_one_expected_outcome(
        fast_server: DemoServer, manifest: dict[str, Any]) -> None:
    """Items found by crawling all endpoints match the manifest items one to one."""
    listed, _ = _crawl(fast_server)
    expected = {(i["source"], i["key"]): fast_server.fill(i["image_url"])
                for i in manifest["items"] if i["source"] != "iiif"}
    assert listed == expected


def _crawl_iiif(server: DemoServer, url: str) -> Iterator[tuple[str, dict[str, Any]]]:
    """(canvas id, image service) of every canvas below a IIIF collection (Presentation 3.0 §3:
    items of Collections and Manifests; 2.1: sequences -> canvases -> images -> resource)."""
    doc = json.loads(fetch(url)[2])
    for entry in doc.get("items", []):
        if entry["type"] in ("Collection", "Manifest"):
            yield from _crawl_iiif(server, entry["id"])
        elif entry["type"] == "Canvas":
            body = entry["items"][0]["items"][0]["body"]
            yield entry["id"], body["service"][0]
    for seq in doc.get("sequences", []):
        for canvas in seq["canvases"]:
            yield canvas["@id"], canvas["images"][0]["resource"]["service"]


def test_iiif_canvases_match_the_manifest_and_serve_the_expected_size(
        fast_server: DemoServer, manifest: dict[str, Any]) -> None:
    """Every canvas of the IIIF collection is a manifest item; its info.json answers, and the
    one size a correct client asks for (manifest "iiif_size") is served at that size."""
    top = fast_server.url(4, "/iiif/collection.json")
    found = dict(_crawl_iiif(fast_server, top))
    items = {i["key"]: i for i in manifest["items"] if i["source"] == "iiif"}
    assert set(found) == set(items)
    for key, service in found.items():
        service_id = service.get("id") or service["@id"]
        assert fetch(f"{service_id}/info.json")[0] == 200
        status, _, body = fetch(fast_server.fill(items[key]["image_url"]))
        assert status == 200 and len(body) == items[key]["bytes"], key


def test_every_referenced_image_url_exists_or_is_deliberately_broken(
        fast_server: DemoServer, manifest: dict[str, Any]) -> None:
    """Each image URL in the APIs and HTML answers 200 (after redirects) or is marked."""
    _, referenced = _crawl(fast_server)
    broken = {fast_server.fill(i["image_url"]) for i in manifest["items"]
              if i["deliberate"] == "missing"}
    assert len(referenced) >= 100
    for url in sorted(referenced):
        status, headers, _ = fetch(url, method="HEAD")
        hops = 0
        while status in (301, 302, 307, 308) and hops < 5:
            url = urljoin(url, headers["Location"])
            status, headers, _ = fetch(url, method="HEAD")
            hops += 1
        assert status == (404 if url in broken else 200), url


def test_served_content_types_match_the_manifest(fast_server: DemoServer,
                                                 manifest: dict[str, Any]) -> None:
    """Every file resource is served with the manifest's type, including wrong ones."""
    files = [r for r in manifest["resources"] if r["kind"] == "file"]
    assert any(r["deliberate"] == "wrong_content_type" for r in files)
    for res in files:
        status, headers, body = fetch(fast_server.fill(res["url"]))
        assert status == 200, res["url"]
        assert headers["Content-Type"] == res["content_type"], res["url"]
        if not res["template"]:
            assert len(body) == res["size"]
    wrong = next(i for i in manifest["items"] if i["deliberate"] == "wrong_content_type")
    _, headers, body = fetch(fast_server.fill(wrong["image_url"]))
    # served as JPEG, but the bytes carry the PNG signature (PNG spec §5.2)
    assert headers["Content-Type"] == "image/jpeg" and body[:8] == b"\x89PNG\r\n\x1a\n"
    html = next(i for i in manifest["items"] if i["deliberate"] == "html_as_image")
    _, headers, body = fetch(fast_server.fill(html["image_url"]))
    assert headers["Content-Type"] == "image/jpeg" and body.startswith(b"<!DOCTYPE html>")


def test_recipes_render_to_toml_with_port_scans_and_loopback_only(tmp_path: Path) -> None:
    """Every shipped recipe renders to TOML naming only loopback hosts on the given port."""
    assert {"demo", "smoke"} <= set(recipes.names())
    for name in recipes.names():
        data = tomllib.loads(recipes.render(name, 43210, tmp_path / "scans"))
        assert data["contact"].endswith("example.org")  # RFC 2606 reserved domain
        assert data["sources"], name
        for source in data["sources"]:
            for url in [source.get("url"), *source.get("listing_pages", [])]:
                if url:
                    parts = urlsplit(url)
                    assert parts.hostname in data["network"]["allow_addresses"]
                    assert parts.port == 43210
    demo = tomllib.loads(recipes.render("demo", 1, tmp_path / "scans"))
    assert [s["name"] for s in demo["sources"]] == ["api-pages", "api-objects", "api-linked",
                                                     "gallery", "scanner", "oai-records", "iiif",
                                                     "reading-room"]
    assert demo["sources"][4]["path"] == (tmp_path / "scans").as_posix()
    assert demo["sources"][1]["detail"]["url"].endswith("/api/v2/objects/{id}")
