"""robots.txt policy: RFC 9309 conformance table (standards.md §1.3) and fetch-outcome handling."""

from __future__ import annotations

import pytest

from collector.config.recipe import valid_product_token
from collector.fetching.robots import (
    ALLOW_ALL,
    DISALLOW_ALL,
    MAX_ROBOTS_BYTES,
    ROBOTS_TTL,
    RULES,
    classify_status,
    decode_body,
    policy_from_fetch,
    policy_from_stored,
)

BASE = "https://example.com"

# RFC 9309 §5.1 example file (standards.md "E51"); the figure's literal EOF line is not content.
E51 = """User-Agent: *
Disallow: *.gif$
Disallow: /example/
Allow: /publications/

User-Agent: foobot
Disallow:/
Allow:/example/page.html
Allow:/example/allowed.gif

User-Agent: barbot
User-Agent: bazbot
Disallow: /example/page.html

User-Agent: quxbot
"""
R11 = "User-Agent: foobot\nAllow: /example/page/\nDisallow: /example/page/disallowed.gif"
R12 = (
    "user-agent: ExampleBot\ndisallow: /foo\ndisallow: /bar\n\n"
    "user-agent: ExampleBot\ndisallow: /baz"
)
R13 = "user-agent: *\ndisallow: /foo\ndisallow: /bar\n\nuser-agent: BazBot\ndisallow: /baz"
R14 = "user-agent: BazBot\ndisallow: /"
R15 = "user-agent: ExampleBot\nallow: /x\ndisallow: /x"
R16 = "disallow: /\nuser-agent: *\nallow: /a"
R17 = "user-agent: *\ndisallow: /\nallow: /this/path/exactly$"
R18 = "user-agent: *\ndisallow: /\nallow: /this/*/exactly"
R19 = "user-agent: *\ndisallow: /foo/bar/ツ\ndisallow: /foo/bar/baz"
R20 = "user-agent: *\ndisallow: /path/file-with-a-%2A.html\ndisallow: /path/foo-%24"
R21 = "user-agent: *\ndisallow: /x/"
R22 = "User-agent: a\nCrawl-delay: 5\nUser-agent: b\nDisallow: /x"

# (id with RFC 9309 section, robots.txt, product token, path, expected allowed)
CASES = [
    ("R1-sec5.1-foobot-own-allow", E51, "foobot", "/example/page.html", True),
    ("R2-sec5.1-foobot-allowed-gif", E51, "foobot", "/example/allowed.gif", True),
    ("R3-sec5.1+2.2.1-no-fallback-to-star", E51, "foobot", "/publications/a.html", False),
    ("R4-sec2.2.1-token-case-insensitive", E51, "FooBot", "/example/page.html", True),
    ("R5-sec2.2.2-robots-txt-implicit", E51, "foobot", "/robots.txt", True),
    ("R6a-sec5.1-barbot-denied", E51, "barbot", "/example/page.html", False),
    ("R6b-sec5.1-bazbot-prefix-match", E51, "bazbot", "/example/page.html.bak", False),
    ("R7-sec5.1-barbot-other-allowed", E51, "barbot", "/example/other.html", True),
    ("R8-sec5.1+2.1-empty-last-group", E51, "quxbot", "/example/x.html", True),
    ("R9a-sec5.1-star-allow", E51, "otherbot", "/publications/a.html", True),
    ("R9b-sec5.1-star-deny", E51, "otherbot", "/example/x.html", False),
    ("R10a-sec2.2.3-dollar-anchor", E51, "otherbot", "/img/cat.gif", False),
    ("R10b-sec2.2.3-query-counts", E51, "otherbot", "/img/cat.gif?s=2", True),
    ("R11a-sec5.2-erratum7124-deny", R11, "foobot", "/example/page/disallowed.gif", False),
    ("R11b-sec5.2-allow", R11, "foobot", "/example/page/other.gif", True),
    ("R12a-sec2.2.1-groups-merged", R12, "ExampleBot", "/baz", False),
    ("R12b-sec2.2.1-merged-unlisted", R12, "ExampleBot", "/qux", True),
    ("R13a-sec2.2.1-star-group", R13, "ExampleBot", "/foo", False),
    ("R13b-sec2.2.1-other-group-ignored", R13, "ExampleBot", "/baz", True),
    ("R14-sec2.2.1-no-group-no-star", R14, "ExampleBot", "/anything", True),
    ("R15-sec2.2.2-tie-allow-wins", R15, "ExampleBot", "/x/y", True),
    ("R16-sec2.2.2-orphan-rule-ignored", R16, "collector", "/b", True),
    ("R17a-sec2.2.3-dollar-exact", R17, "collector", "/this/path/exactly", True),
    ("R17b-sec2.2.3-dollar-longer", R17, "collector", "/this/path/exactly/more", False),
    ("R18-sec2.2.3-star-crosses-slash", R18, "collector", "/this/a/b/exactly", True),
    ("R19a-sec2.2.2-utf8-encoded", R19, "collector", "/foo/bar/%E3%83%84", False),
    ("R19b-sec2.2.2-unreserved-decoded", R19, "collector", "/foo/bar/%62%61%7A", False),
    ("R20a-sec2.2.3-literal-star", R20, "collector", "/path/file-with-a-*.html", False),
    ("R20b-sec2.2.3-literal-dollar", R20, "collector", "/path/foo-$", False),
    ("R21-sec2.2.2-case-sensitive-path", R21, "collector", "/X/y", True),
    ("R22-sec2.2.4-other-record-keeps-group", R22, "a", "/x", False),
]


@pytest.mark.parametrize(
    ("robots", "token", "path", "expected"),
    [c[1:] for c in CASES],
    ids=[c[0] for c in CASES],
)
def test_rfc9309_check_values(robots: str, token: str, path: str, expected: bool) -> None:
    """Each standards.md §1.3 check value (RFC 9309 section in the id) gives the RFC's answer."""
    policy = policy_from_fetch(200, robots.encode(), fetched_at=0.0)
    assert policy.verdict(BASE + path, token).allowed is expected


def test_disallowed_url_reports_the_longest_matching_rule() -> None:
    """The ledger gets the most specific rule (RFC 9309 §2.2.2 "most octets")."""
    policy = policy_from_fetch(200, E51.encode(), fetched_at=0.0)
    verdict = policy.verdict(BASE + "/example/x.html", "otherbot")
    assert (verdict.verdict, verdict.rule) == ("disallowed", "Disallow: /example/")


def test_allowed_url_reports_the_allow_rule_that_won() -> None:
    """An allow that beats a shorter disallow is reported (RFC 9309 §2.2.2)."""
    policy = policy_from_fetch(200, E51.encode(), fetched_at=0.0)
    verdict = policy.verdict(BASE + "/example/page.html", "foobot")
    assert verdict.allowed and verdict.rule == "Allow: /example/page.html"


def test_allow_index_html_does_not_allow_the_directory() -> None:
    """RFC 9309 has no index.html rule: `Allow: /index.html` keeps `/` disallowed (libraries §1)."""
    body = b"user-agent: *\ndisallow: /\nallow: /index.html\n"
    policy = policy_from_fetch(200, body, fetched_at=0.0)
    assert policy.verdict(BASE + "/", "collector").allowed is False
    assert policy.verdict(BASE + "/index.html", "collector").allowed is True


def test_written_allow_dollar_rule_still_counts_next_to_index_html() -> None:
    """A real `Allow: /$` written in the file is kept even when `/index.html` is also allowed."""
    body = b"user-agent: *\ndisallow: /\nallow: /index.html\nallow: /$\n"
    policy = policy_from_fetch(200, body, fetched_at=0.0)
    assert policy.verdict(BASE + "/", "collector").allowed is True


STATUS_CASES = [
    ("sec2.3.1.1-200-parse", 200, RULES),
    ("sec2.3.1.3-404-allow-all", 404, ALLOW_ALL),
    ("sec2.3.1.3-401-allow-all", 401, ALLOW_ALL),
    ("sec2.3.1.3-403-allow-all", 403, ALLOW_ALL),
    ("sec2.3.1.3-429-allow-all", 429, ALLOW_ALL),
    ("sec2.3.1.4-500-disallow", 500, DISALLOW_ALL),
    ("sec2.3.1.4-503-disallow", 503, DISALLOW_ALL),
    ("sec2.3.1.4-unreachable-disallow", None, DISALLOW_ALL),
    ("sec2.3.1.2-too-many-redirects-unavailable", 301, ALLOW_ALL),
]


@pytest.mark.parametrize(
    ("status", "kind"), [c[1:] for c in STATUS_CASES], ids=[c[0] for c in STATUS_CASES]
)
def test_fetch_status_maps_to_rfc_policy(status: int | None, kind: str) -> None:
    """robots.txt status codes map to the RFC 9309 §2.3.1 outcome."""
    assert classify_status(status) == kind


def test_unavailable_robots_allows_everything_and_says_why() -> None:
    """A 404 robots.txt allows every URL (RFC 9309 §2.3.1.3) and names the reason."""
    policy = policy_from_fetch(404, b"<html>not found</html>", fetched_at=0.0)
    verdict = policy.verdict(BASE + "/private/x", "collector")
    assert verdict.allowed and verdict.rule == "unavailable (HTTP 404)"


def test_unreachable_robots_disallows_everything_except_robots_txt() -> None:
    """A 503 robots.txt means complete disallow (RFC 9309 §2.3.1.4), robots.txt still implicit."""
    policy = policy_from_fetch(503, b"", fetched_at=0.0)
    assert policy.verdict(BASE + "/a", "collector").verdict == "unreachable"
    assert policy.verdict(BASE + "/robots.txt", "collector").allowed


def test_cached_policy_is_fresh_for_less_than_24_hours() -> None:
    """A cached robots.txt is not used for more than 24 h (RFC 9309 §2.4)."""
    policy = policy_from_fetch(200, b"user-agent: *\ndisallow: /x", fetched_at=1000.0)
    assert policy.is_fresh(1000.0 + ROBOTS_TTL - 1)
    assert not policy.is_fresh(1000.0 + ROBOTS_TTL)


def test_unreachable_policy_is_retried_after_a_few_minutes() -> None:
    """An unreachable robots.txt is re-fetched later in the run (common practice, no source)."""
    policy = policy_from_fetch(None, b"", fetched_at=0.0)
    assert policy.is_fresh(299.0, unreachable_retry=300.0)
    assert not policy.is_fresh(300.0, unreachable_retry=300.0)


def test_rules_beyond_500_kib_are_still_parsed() -> None:
    """The parse limit is at least 500 KiB (RFC 9309 §2.5): a rule after byte 515,000 applies."""
    filler = b"# " + b"x" * 515_000 + b"\n"
    body = b"user-agent: *\n" + filler + b"disallow: /late\n"
    assert 512_000 < len(body) <= MAX_ROBOTS_BYTES
    policy = policy_from_fetch(200, body, fetched_at=0.0)
    assert policy.verdict(BASE + "/late/x", "collector").allowed is False


def test_bom_is_dropped_before_parsing() -> None:
    """A UTF-8 byte order mark does not hide the first line (libraries.md §1: utf-8-sig)."""
    body = b"\xef\xbb\xbfuser-agent: *\ndisallow: /x\n"
    assert decode_body(body).startswith("user-agent")
    assert policy_from_fetch(200, body, 0.0).verdict(BASE + "/x", "collector").allowed is False


def test_invalid_utf8_is_replaced_not_fatal() -> None:
    """Bad bytes are replaced and the rules that parse are used (RFC 9309 §2.3.1.5)."""
    body = b"user-agent: *\ndisallow: /\xff\xfe\ndisallow: /y\n"
    assert policy_from_fetch(200, body, 0.0).verdict(BASE + "/y", "collector").allowed is False


def test_stored_policy_gives_same_verdicts_as_fetched() -> None:
    """A policy rebuilt from the ledger's hosts row decides like the original."""
    fetched = policy_from_fetch(200, E51.encode(), fetched_at=5.0)
    stored = policy_from_stored(200, fetched.body, 5.0, fetched.sha256)
    for _, _, token, path, _ in CASES[:13]:
        assert stored.verdict(BASE + path, token) == fetched.verdict(BASE + path, token)


def test_pacing_hints_are_read_for_our_token() -> None:
    """Crawl-delay, Request-rate and Visit-time are exposed (not RFC 9309; standards.md §2)."""
    body = b"user-agent: *\ncrawl-delay: 2.5\nrequest-rate: 3/10s\nvisit-time: 0400-0845\n"
    hints = policy_from_fetch(200, body, 0.0).hints("collector")
    assert hints.crawl_delay == 2.5
    assert hints.request_interval == pytest.approx(10 / 3)
    assert hints.visit_window is not None and hints.visit_window[0].hour == 4


@pytest.mark.parametrize(
    ("token", "ok"), [("collector", True), ("Fern_bot-x", True), ("bot/1.0", False), ("", False)]
)
def test_product_token_characters_follow_rfc(token: str, ok: bool) -> None:
    """Product tokens allow only letters, '_' and '-' (RFC 9309 §2.2.1)."""
    assert valid_product_token(token) is ok
