"""The polite fetcher against real loopback servers; politeness judged from the server's log."""

from __future__ import annotations

import gzip
import hashlib
import threading
import time
from collections.abc import Iterator
from email.utils import formatdate
from pathlib import Path

import pytest
from support.server import LoopbackServer, send

from collector.demo_site.requestlog import max_in_window
from collector.errors import (
    DownloadTimeout,
    FetchError,
    HostParked,
    RobotsDenied,
    TooLarge,
    UnsafeURL,
)
from collector.fetching.fetcher import Fetcher, FetchSettings
from collector.storage.ledger import Ledger

ALLOWED = ("127.0.0.1", "127.0.0.2", "127.0.0.3")  # never 127.0.0.9: the guard's target


@pytest.fixture
def sites() -> Iterator[list[LoopbackServer]]:
    made = [LoopbackServer(a) for a in ALLOWED]
    for s in made:
        s.routes["/robots.txt"] = (200, b"user-agent: *\ndisallow: /private/\n")
    yield made
    for s in made:
        s.close()


@pytest.fixture
def ledger(tmp_path: Path) -> Iterator[Ledger]:
    led = Ledger.create(tmp_path / "ledger.sqlite")
    yield led
    led.close()


def settings(**kw: object) -> FetchSettings:
    recipe = {
        "contact": "curator@example.org",
        "budgets": {"min_interval": 0.0, "requests_per_hour": 100000, "max_attempts": 3,
                    "backoff_base": 0.05, "backoff_max": 0.2},
        "network": {"allow_addresses": list(ALLOWED), "connect_timeout": 2.0,
                    "read_timeout": 5.0, "download_deadline": 10.0},
    }
    return FetchSettings.from_recipe(recipe, **kw)


def fetches(ledger: Ledger) -> list[dict]:
    return ledger.query("SELECT * FROM fetches ORDER BY id")


@pytest.mark.slow
def test_no_host_ever_exceeds_five_requests_per_second(fresh_demo_server) -> None:
    """300 requests to the demo archive over 3 hosts at a 5 req/s budget, two threads and
    two allowed connections per host: no 1 s window of the SERVER's log holds more than 5
    starts, and the archive (20 req/s published) never answers 429.

    Budget from recipe [budgets] min_interval = 0.2 s; tolerance 0.05 s for loopback
    scheduling jitter, well under one request interval.
    """
    server = fresh_demo_server
    paths = {1: "/api/v1/specimens?page=1&per_page=5&n={}", 2: "/gallery/?n={}",
             4: "/api/v3/finds?n={}"}
    fetcher = Fetcher(FetchSettings.from_recipe({
        "contact": "curator@example.org",
        "budgets": {"min_interval": 0.2, "requests_per_hour": 100000, "max_connections": 2},
        "network": {"allow_addresses": ["127.0.0.1", "127.0.0.2", "127.0.0.4"]}}), None)
    errors: list[BaseException] = []

    def worker(host: int, part: int) -> None:
        try:
            for i in range(part, 100, 2):
                fetcher.get_page(server.url(host, paths[host].format(i)))
        except BaseException as exc:  # pragma: no cover - reported below
            errors.append(exc)

    threads = [threading.Thread(target=worker, args=(h, p)) for h in paths for p in (0, 1)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    fetcher.close()
    assert not errors
    for host in paths:
        records = [r for r in server.log if r.host_index == host]
        pages = [r for r in records if not r.path.endswith("robots.txt")]
        assert len(pages) == 100
        assert max_in_window([r.t for r in records], 1.0 - 0.05) <= 5
        assert {r.status for r in pages} == {200}


def test_retry_after_seconds_delays_the_next_request(sites: list[LoopbackServer]) -> None:
    """429 + Retry-After: 2 -> next request to the host starts >= 2 s later (RFC 9110 §10.2.3)."""
    site = sites[0]
    calls = {"n": 0}

    def flaky(h: object) -> None:
        calls["n"] += 1
        if calls["n"] == 1:
            send(h, 429, b"slow down", {"Retry-After": "2"})  # type: ignore[arg-type]
        else:
            send(h, 200, b"ok")  # type: ignore[arg-type]

    site.routes["/limited"] = flaky
    page = Fetcher(settings(), None).get_page(site.url("/limited"))
    assert page.status == 200
    first, second = site.hits_for("/limited")
    assert second.mono - first.mono >= 2.0


def test_retry_after_http_date_is_honoured(sites: list[LoopbackServer]) -> None:
    """503 with an IMF-fixdate ~3 s ahead: the retry starts no earlier than that date (§10.2.3)."""
    site = sites[1]
    state: dict[str, float] = {}

    def maintenance(h: object) -> None:
        if "until" not in state:
            state["until"] = float(int(time.time()) + 3)  # whole seconds, as HTTP-date has
            send(h, 503, b"", {"Retry-After": formatdate(state["until"], usegmt=True)})  # type: ignore[arg-type]
        else:
            send(h, 200, b"back")  # type: ignore[arg-type]

    site.routes["/maint"] = maintenance
    Fetcher(settings(), None).get_page(site.url("/maint"))
    retry = site.hits_for("/maint")[1]
    assert retry.wall >= state["until"]


def test_retry_after_over_the_cap_parks_the_host(sites: list[LoopbackServer],
                                                 ledger: Ledger) -> None:
    """Retry-After above budgets.max_retry_after raises HostParked and sends nothing more."""
    site = sites[0]
    site.routes["/busy"] = (429, b"", {"Retry-After": "7200"})
    fetcher = Fetcher(settings(), ledger)
    with pytest.raises(HostParked) as err:
        fetcher.get_page(site.url("/busy"))
    assert err.value.until >= time.time() + 7000
    with pytest.raises(HostParked):
        fetcher.get_page(site.url("/other"))
    assert site.targets() == ["/robots.txt", "/busy"]
    assert ledger.get_host(site.key)["parked_until"] >= time.time() + 7000


def test_garbage_retry_after_falls_back_to_backoff_and_is_noted(
        sites: list[LoopbackServer], ledger: Ledger) -> None:
    """Retry-After '1.5' is not delay-seconds (RFC 9110 §10.2.3): ignored, noted, backed off."""
    site = sites[0]
    calls = {"n": 0}

    def odd(h: object) -> None:
        calls["n"] += 1
        if calls["n"] == 1:
            send(h, 503, b"", {"Retry-After": "1.5"})  # type: ignore[arg-type]
        else:
            send(h, 200, b"fine")  # type: ignore[arg-type]

    site.routes["/odd"] = odd
    Fetcher(settings(), ledger).get_page(site.url("/odd"))
    rows = [r for r in fetches(ledger) if r["url"].endswith("/odd")]
    assert [(r["attempt"], r["status"]) for r in rows] == [(1, 503), (2, 200)]
    assert "ignored" in rows[0]["error"]


def test_every_attempt_is_a_fetches_row(sites: list[LoopbackServer], ledger: Ledger) -> None:
    """A request that fails twice then succeeds leaves three rows with attempts 1, 2, 3."""
    site = sites[0]
    calls = {"n": 0}

    def third_time(h: object) -> None:
        calls["n"] += 1
        send(h, 200 if calls["n"] == 3 else 502, b"x")  # type: ignore[arg-type]

    site.routes["/third"] = third_time
    Fetcher(settings(), ledger, run_id=7).get_page(site.url("/third"), item_id=3)
    rows = [r for r in fetches(ledger) if r["url"].endswith("/third")]
    assert [(r["attempt"], r["status"]) for r in rows] == [(1, 502), (2, 502), (3, 200)]
    assert all(r["run_id"] == 7 and r["item_id"] == 3 and r["host"] == site.key for r in rows)
    assert rows[-1]["robots_verdict"] == "allowed" and rows[-1]["bytes"] == 1


def test_robots_503_means_no_request_beyond_robots_txt(
        sites: list[LoopbackServer], ledger: Ledger) -> None:
    """robots.txt 503 -> complete disallow (RFC 9309 §2.3.1.4), recorded as unreachable."""
    site = sites[2]
    site.routes["/robots.txt"] = (503, b"")
    fetcher = Fetcher(settings(), ledger)
    for path in ("/a", "/b"):
        with pytest.raises(RobotsDenied) as err:
            fetcher.get_page(site.url(path))
        assert err.value.rule == "unreachable"
    assert site.targets() == ["/robots.txt"]
    refused = [r for r in fetches(ledger) if r["purpose"] != "robots"]
    assert {r["robots_verdict"] for r in refused} == {"unreachable"}


def test_robots_404_allows_everything(sites: list[LoopbackServer]) -> None:
    """robots.txt answering 404 is "unavailable": any URL may be fetched (RFC 9309 §2.3.1.3)."""
    site = sites[0]
    site.routes["/robots.txt"] = (404, b"")
    site.routes["/private/x"] = (200, b"ok")
    assert Fetcher(settings(), None).get_page(site.url("/private/x")).body == b"ok"


def test_disallowed_url_is_refused_and_recorded_with_rule(
        sites: list[LoopbackServer], ledger: Ledger) -> None:
    """A URL robots.txt disallows is never requested; the row names the matching rule."""
    site = sites[0]
    with pytest.raises(RobotsDenied):
        Fetcher(settings(), ledger).get_page(site.url("/private/secret.html"))
    assert "/private/secret.html" not in site.targets()
    row = fetches(ledger)[-1]
    assert (row["robots_verdict"], row["robots_rule"]) == ("disallowed", "Disallow: /private/")


def test_product_token_selects_our_group_and_user_agent_names_contact(
        sites: list[LoopbackServer]) -> None:
    """Groups are matched by product token (RFC 9309 §2.2.1); the UA header carries the contact."""
    site = sites[0]
    site.routes["/robots.txt"] = (200, b"user-agent: fernbot\ndisallow: /\n\nuser-agent: *\n")
    site.routes["/x"] = (200, b"x")
    with pytest.raises(RobotsDenied):
        Fetcher(settings(product_token="FernBot"), None).get_page(site.url("/x"))
    Fetcher(settings(), None).get_page(site.url("/x"))
    assert site.hits_for("/x")[0].headers["User-Agent"].endswith("(+curator@example.org)")


def test_redirect_to_disallowed_path_on_another_host_is_not_followed(
        sites: list[LoopbackServer]) -> None:
    """A redirect to a path another host's robots.txt disallows is not followed (RobotsDenied)."""
    a, b = sites[0], sites[1]
    a.routes["/go"] = (302, b"", {"Location": b.url("/private/img.png")})
    with pytest.raises(RobotsDenied):
        Fetcher(settings(), None).get_page(a.url("/go"))
    assert b.targets() == ["/robots.txt"]


def test_redirect_to_unlisted_loopback_address_is_refused(sites: list[LoopbackServer]) -> None:
    """A redirect to 127.0.0.9 (not in allow_addresses) is refused before any connection."""
    a = sites[0]
    a.routes["/hop"] = (302, b"", {"Location": "http://127.0.0.9:9/steal"})
    with pytest.raises(UnsafeURL):
        Fetcher(settings(), None).get_page(a.url("/hop"))


def test_non_http_scheme_is_refused(sites: list[LoopbackServer]) -> None:
    """Only http and https are fetched; a redirect to file:// is refused."""
    a = sites[0]
    a.routes["/file"] = (302, b"", {"Location": "file:///etc/passwd"})
    with pytest.raises(UnsafeURL):
        Fetcher(settings(), None).get_page(a.url("/file"))


def test_redirects_are_followed_up_to_ten_hops(sites: list[LoopbackServer]) -> None:
    """Ten redirects are followed; the eleventh is refused (CONTRACT: max 10 hops)."""
    a = sites[0]
    for i in range(12):
        a.routes[f"/r{i}"] = (302, b"", {"Location": f"/r{i + 1}"})
    a.routes["/r10"] = (200, b"end")
    page = Fetcher(settings(), None).get_page(a.url("/r0"))
    assert page.body == b"end" and page.url == a.url("/r10")
    a.routes["/r10"] = (302, b"", {"Location": "/r11"})
    with pytest.raises(FetchError) as err:
        Fetcher(settings(), None).get_page(a.url("/r0"))
    assert err.value.reason == "redirect_blocked"


def test_robots_redirects_up_to_five_are_followed(sites: list[LoopbackServer]) -> None:
    """robots.txt reached through 5 redirects applies to the first authority (RFC 9309 §2.3.1.2)."""
    a, b = sites[0], sites[1]
    a.routes["/robots.txt"] = (301, b"", {"Location": b.url("/rb1")})
    for i in range(1, 5):
        b.routes[f"/rb{i}"] = (301, b"", {"Location": b.url(f"/rb{i + 1}")})
    b.routes["/rb5"] = (200, b"user-agent: *\ndisallow: /no\n")
    with pytest.raises(RobotsDenied):
        Fetcher(settings(), None).get_page(a.url("/no"))


def test_robots_more_than_five_redirects_means_allow_all(sites: list[LoopbackServer]) -> None:
    """Over 5 robots.txt redirects the file counts as unavailable: allow all (RFC 9309 §2.3.1.2)."""
    a = sites[0]
    a.routes["/robots.txt"] = (301, b"", {"Location": "/rb1"})
    for i in range(1, 8):
        a.routes[f"/rb{i}"] = (301, b"", {"Location": f"/rb{i + 1}"})
    a.routes["/rb8"] = (200, b"user-agent: *\ndisallow: /\n")
    a.routes["/no"] = (200, b"fetched")
    assert Fetcher(settings(), None).get_page(a.url("/no")).body == b"fetched"
    assert "/rb6" not in a.targets()


def test_robots_is_fetched_once_and_reused_from_the_ledger(
        sites: list[LoopbackServer], ledger: Ledger) -> None:
    """A second fetcher on the same ledger within 24 h reuses robots.txt (RFC 9309 §2.4)."""
    site = sites[0]
    site.routes["/x"] = (200, b"x")
    Fetcher(settings(), ledger).get_page(site.url("/x"))
    Fetcher(settings(), ledger).get_page(site.url("/x"))
    assert site.targets().count("/robots.txt") == 1
    row = ledger.get_host(site.key)
    assert row["robots_status"] == 200 and row["robots_sha256"]


def test_slow_drip_download_stops_at_the_deadline(
        sites: list[LoopbackServer], tmp_path: Path) -> None:
    """A server dripping a byte every 0.1 s is cut off at the overall deadline (libraries.md §6)."""
    site = sites[0]

    def drip(h: object) -> None:
        h.send_response(200)  # type: ignore[attr-defined]
        h.send_header("Content-Length", "600")  # type: ignore[attr-defined]
        h.end_headers()  # type: ignore[attr-defined]
        try:
            for _ in range(600):
                h.wfile.write(b"x")  # type: ignore[attr-defined]
                h.wfile.flush()  # type: ignore[attr-defined]
                time.sleep(0.1)
        except OSError:
            pass

    site.routes["/drip.png"] = drip
    fetcher = Fetcher(settings(download_deadline=1.0), None)
    began = time.monotonic()
    with pytest.raises(DownloadTimeout):
        fetcher.download(site.url("/drip.png"), tmp_path)
    assert time.monotonic() - began < 5.0  # generous: the drip alone would take 60 s
    assert list(tmp_path.iterdir()) == []


def test_gzip_bomb_is_capped_on_decoded_bytes(sites: list[LoopbackServer], tmp_path: Path) -> None:
    """10 MB of zeros sent gzip-compressed (~10 KB) is stopped at a 1 MB decoded-bytes cap."""
    site = sites[0]
    bomb = gzip.compress(b"\0" * 10_000_000)
    site.routes["/bomb.png"] = (200, bomb, {"Content-Encoding": "gzip"})
    with pytest.raises(TooLarge):
        Fetcher(settings(max_image_bytes=1_000_000), None).download(site.url("/bomb.png"),
                                                                    tmp_path)
    assert list(tmp_path.iterdir()) == []


def test_content_length_over_the_cap_is_rejected_before_the_body(
        sites: list[LoopbackServer], tmp_path: Path) -> None:
    """A declared 50 MB body over a 1 MB cap is refused from the header, without reading it."""
    site = sites[0]

    def huge(h: object) -> None:
        h.send_response(200)  # type: ignore[attr-defined]
        h.send_header("Content-Length", "50000000")  # type: ignore[attr-defined]
        h.end_headers()  # type: ignore[attr-defined]
        try:
            h.wfile.write(b"x" * 10)  # type: ignore[attr-defined]
            h.wfile.flush()  # type: ignore[attr-defined]
            time.sleep(3)
        except OSError:
            pass

    site.routes["/huge.png"] = huge
    began = time.monotonic()
    with pytest.raises(TooLarge):
        Fetcher(settings(max_image_bytes=1_000_000), None).download(site.url("/huge.png"),
                                                                    tmp_path)
    assert time.monotonic() - began < 2.5
    assert list(tmp_path.iterdir()) == []


def test_download_streams_to_temp_file_with_sha256(
        sites: list[LoopbackServer], tmp_path: Path) -> None:
    """The body lands in a temp file in dest_dir with its SHA-256 (FIPS 180-4 vector for "abc")."""
    site = sites[0]
    site.routes["/abc.png"] = (200, b"abc", {"Content-Type": "image/png", "ETag": '"v1"'})
    got = Fetcher(settings(), None).download(site.url("/abc.png"), tmp_path)
    assert got.sha256 == "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad"
    assert got.path is not None and got.path.parent == tmp_path and got.path.read_bytes() == b"abc"
    assert (got.size, got.content_type, got.etag) == (3, "image/png", '"v1"')
    assert hashlib.sha256(got.path.read_bytes()).hexdigest() == got.sha256


def test_conditional_download_304_costs_no_bytes(sites: list[LoopbackServer],
                                                 tmp_path: Path) -> None:
    """An ETag sends If-None-Match; a 304 is success without a file (RFC 9110 §15.4.5)."""
    site = sites[0]

    def cond(h: object) -> None:
        if h.headers.get("If-None-Match") == '"v1"':  # type: ignore[attr-defined]
            send(h, 304, b"", {"ETag": '"v1"'})  # type: ignore[arg-type]
        else:
            send(h, 200, b"new")  # type: ignore[arg-type]

    site.routes["/c.png"] = cond
    ledger = Ledger.create(tmp_path / "l.sqlite")
    got = Fetcher(settings(), ledger).download(site.url("/c.png"), tmp_path, etag='"v1"',
                                               last_modified="Tue, 15 Nov 1994 12:45:26 GMT")
    assert got.not_modified and got.path is None and got.size == 0
    row = ledger.query("SELECT status, from_cache FROM fetches WHERE purpose = 'image'")[-1]
    assert row == {"status": 304, "from_cache": 1}
    ledger.close()
    assert site.hits_for("/c.png")[0].headers["If-Modified-Since"] == (
        "Tue, 15 Nov 1994 12:45:26 GMT")


def test_failing_host_opens_the_circuit_breaker(sites: list[LoopbackServer]) -> None:
    """After breaker_threshold failed requests the host is parked; other hosts carry on."""
    bad, good = sites[0], sites[1]
    bad.routes["/down"] = (500, b"")
    good.routes["/up"] = (200, b"up")
    fetcher = Fetcher(settings(breaker_threshold=2), None)
    with pytest.raises(FetchError) as first:
        fetcher.get_page(bad.url("/down"))
    assert first.value.reason == "http_500"
    with pytest.raises(HostParked):
        fetcher.get_page(bad.url("/down"))
    with pytest.raises(HostParked):
        fetcher.get_page(bad.url("/down"))
    assert bad.targets().count("/down") == 6  # 2 requests x 3 attempts, then nothing
    assert fetcher.get_page(good.url("/up")).body == b"up"


def test_connection_refused_is_a_fetch_error_not_a_crash() -> None:
    """A host that refuses connections yields FetchError('connection') after retries."""
    closed = LoopbackServer("127.0.0.1")
    url = closed.url("/x")
    closed.close()
    with pytest.raises(FetchError) as err:
        Fetcher(settings(), None).get_page(url)
    assert err.value.reason in {"connection", "robots_unreachable"}


SECRET = "fern-Sekr3t-9431"


def test_secrets_never_reach_the_ledger_file_or_errors(
        sites: list[LoopbackServer], tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    """Secret params/headers are REDACTED in rows and messages; SQLite file and WAL lack them."""
    site = sites[0]
    site.routes["/api"] = (200, b'{"ok": true}', {"Content-Type": "application/json"})
    site.routes["/broken"] = (503, b"")
    monkeypatch.setenv("FERN_TOKEN", SECRET)
    path = tmp_path / "secret.sqlite"
    ledger = Ledger.create(path)
    fetcher = Fetcher(settings(headers={"Authorization": "Bearer ${FERN_TOKEN}"}), ledger)
    page = fetcher.get_page(site.url("/api"), params={"key": SECRET, "page": "1"},
                            secret_params=["key"])
    assert page.json() == {"ok": True}
    with pytest.raises(FetchError) as err:
        fetcher.get_page(site.url("/broken") + f"?key={SECRET}", secret_params=["key"])
    assert SECRET not in str(err.value) and "REDACTED" in str(err.value)
    assert site.hits_for(f"/api?key={SECRET}&page=1")[0].headers["Authorization"].endswith(SECRET)
    blob = b"".join(p.read_bytes() for p in tmp_path.iterdir() if p.is_file())
    ledger.close()
    blob += b"".join(p.read_bytes() for p in tmp_path.iterdir() if p.is_file())
    assert SECRET.encode() not in blob
    assert b"REDACTED" in blob


def test_unset_environment_variable_stops_the_request_before_sending(
        sites: list[LoopbackServer], ledger: Ledger, monkeypatch: pytest.MonkeyPatch) -> None:
    """A ${NAME} in params or headers whose variable is unset is named and nothing is sent
    (the fetcher is the one place that fills ${NAME}; moved here from the json_api tests)."""
    site = sites[0]
    site.route("/api", (200, b"[]", {"Content-Type": "application/json"}))
    monkeypatch.delenv("FERN_TEST_KEY", raising=False)
    fetcher = Fetcher(settings(), ledger)
    with pytest.raises(FetchError, match="FERN_TEST_KEY") as err:
        fetcher.get_page(site.url("/api"), params={"key": "${FERN_TEST_KEY}"},
                         secret_params=["key"])
    assert err.value.reason == "unset_variable"
    with pytest.raises(FetchError, match="FERN_TEST_KEY"):
        fetcher.get_page(site.url("/api"), headers={"Authorization": "Bearer ${FERN_TEST_KEY}"})
    assert site.hits == []
    monkeypatch.setenv("FERN_TEST_KEY", "s3cret-key")
    fetcher.get_page(site.url("/api"), params={"key": "${FERN_TEST_KEY}"}, secret_params=["key"])
    assert [t for t in site.targets() if t != "/robots.txt"] == ["/api?key=s3cret-key"]


def test_page_exposes_json_text_and_link_header(sites: list[LoopbackServer]) -> None:
    """Page gives the decoded text, parsed JSON and RFC 8288 Link relations."""
    site = sites[0]
    site.routes["/list"] = (200, '{"t": "Fernhollow \u00e9"}'.encode(),
                            {"Content-Type": "application/json; charset=utf-8",
                             "Link": '<http://127.0.0.1/list?page=2>; rel="next"'})
    page = Fetcher(settings(), None).get_page(site.url("/list"))
    assert page.json() == {"t": "Fernhollow \u00e9"} and "\u00e9" in page.text
    assert page.links["next"] == "http://127.0.0.1/list?page=2"
