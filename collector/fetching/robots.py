"""robots.txt policy (RFC 9309) around protego: fetch outcome -> policy -> verdict per URL.

This module is pure: the fetcher downloads ``/robots.txt`` (through its own polite path) and
hands the outcome to :func:`policy_from_fetch`. Matching and group selection are protego's;
this module adds what protego leaves to the caller (libraries.md §1): status-code handling,
the size limit, the 24 h freshness, the matching rule for the ledger, and one correction where
protego departs from the RFC.
"""

from __future__ import annotations

import hashlib
from dataclasses import dataclass, field
from datetime import time as dtime
from typing import Any

from protego import Protego

# RFC 9309 §2.5: a parsing limit, if any, MUST be at least 500 KiB; we read 512 KiB.
MAX_ROBOTS_BYTES = 512 * 1024
# RFC 9309 §2.4: SHOULD NOT use a cached copy for more than 24 hours.
ROBOTS_TTL = 24 * 3600.0
# RFC 9309 §2.3.1.2: follow at least five redirects; more MAY be treated as unavailable.
MAX_ROBOTS_REDIRECTS = 5
# While robots.txt is unreachable (§2.3.1.4, complete disallow) we try it again after this long
# in the same run (common practice, no source: a few minutes).
UNREACHABLE_RETRY = 300.0

RULES, ALLOW_ALL, DISALLOW_ALL = "rules", "allow_all", "disallow_all"


@dataclass(frozen=True)
class Verdict:
    """Outcome for one URL: ``verdict`` is the ledger's robots_verdict, ``rule`` its robots_rule."""

    allowed: bool
    verdict: str  # "allowed" | "disallowed" | "unreachable" | "implicit"
    rule: str | None = None


@dataclass(frozen=True)
class Hints:
    """Non-standard pacing records (standards.md §2): only ever used to slow down."""

    crawl_delay: float | None = None
    request_interval: float | None = None  # from Request-rate n/m -> m/n seconds
    visit_window: tuple[dtime, dtime] | None = None  # UTC start, end


@dataclass
class RobotsPolicy:
    """What one robots.txt fetch means for one authority (scheme+host+port)."""

    kind: str  # RULES | ALLOW_ALL | DISALLOW_ALL
    status: int | None  # final HTTP status; None = network error
    fetched_at: float  # epoch seconds
    body: str = ""
    sha256: str | None = None
    parser: Any = field(default=None, repr=False)

    def verdict(self, url: str, token: str) -> Verdict:
        """Decide whether ``url`` (on this authority) may be fetched by ``token``."""
        if _is_robots_path(url):
            # RFC 9309 §2.2.2: /robots.txt is implicitly allowed.
            return Verdict(True, "implicit", None)
        if self.kind == DISALLOW_ALL:
            # §2.3.1.4: unreachable -> MUST assume complete disallow.
            return Verdict(False, "unreachable", "unreachable")
        if self.kind == ALLOW_ALL:
            # §2.3.1.3 unavailable (4xx, or more than 5 redirects, §2.3.1.2): MAY access anything.
            return Verdict(True, "allowed", f"unavailable (HTTP {self.status})")
        allowed, rule = matching_rule(self.parser, token, url)
        return Verdict(allowed, "allowed" if allowed else "disallowed", rule)

    def binding_verdict(self, url: str, token: str,
                        extra: tuple[str, ...] = ()) -> tuple[Verdict, str | None]:
        """The verdict for our own ``token``, then for each further product token the recipe
        lists (``[reservations] robots_tokens``): a path disallowed for any of them is not
        fetched. Returns the verdict and the extra token that disallowed (None: our own)."""
        verdict = self.verdict(url, token)
        if not verdict.allowed:
            return verdict, None
        for other in extra:
            if self.kind != RULES or not names_group(self.parser, other):
                continue  # only a group that names the token binds us, never "*" again
            theirs = self.verdict(url, other)
            if not theirs.allowed:
                return theirs, other
        return verdict, None

    def hints(self, token: str) -> Hints:
        """Crawl-delay, Request-rate and Visit-time for ``token`` (none unless rules parsed)."""
        if self.kind != RULES or self.parser is None:
            return Hints()
        delay = self.parser.crawl_delay(token)
        rate = self.parser.request_rate(token)
        visit = self.parser.visit_time(token)
        interval = None
        if rate is not None and rate.requests > 0 and rate.seconds > 0:
            interval = rate.seconds / rate.requests
        return Hints(
            crawl_delay=float(delay) if delay is not None and delay > 0 else None,
            request_interval=interval,
            visit_window=(visit.start_time, visit.end_time) if visit is not None else None,
        )

    def is_fresh(self, now: float, ttl: float = ROBOTS_TTL,
                 unreachable_retry: float = UNREACHABLE_RETRY) -> bool:
        """Whether this policy may still be used at epoch ``now`` (§2.4 cache limit)."""
        age = now - self.fetched_at
        if age < 0:
            return False
        if self.kind == DISALLOW_ALL:
            return age < unreachable_retry
        return age < ttl


def _is_robots_path(url: str) -> bool:
    from urllib.parse import urlsplit

    return urlsplit(url).path == "/robots.txt"


def decode_body(body: bytes) -> str:
    """Decode at most MAX_ROBOTS_BYTES as UTF-8 (§2.3), dropping a BOM, replacing bad bytes."""
    return body[:MAX_ROBOTS_BYTES].decode("utf-8-sig", errors="replace")


def classify_status(status: int | None) -> str:
    """Map a robots.txt fetch outcome to a policy kind (RFC 9309 §2.3.1).

    ``status`` is the final HTTP status after redirects; a 3xx here means the redirect limit
    was exceeded (or there was no Location) and counts as unavailable.
    """
    if status is None:
        return DISALLOW_ALL  # §2.3.1.4 network error: unreachable
    if 200 <= status < 300:
        return RULES  # §2.3.1.1
    if 300 <= status < 400:
        return ALLOW_ALL  # §2.3.1.2: > 5 redirects MAY be treated as unavailable
    if 400 <= status < 500:
        # §2.3.1.3: 400-499 (401, 403 and 429 included) is "unavailable": MAY access anything.
        return ALLOW_ALL
    # §2.3.1.4: 5xx is unreachable; anything else is not a final answer, so be cautious.
    return DISALLOW_ALL


def policy_from_fetch(status: int | None, body: bytes, fetched_at: float) -> RobotsPolicy:
    """Build the policy for a robots.txt fetch outcome."""
    kind = classify_status(status)
    if kind != RULES:
        return RobotsPolicy(kind, status, fetched_at)
    text = decode_body(body)
    # §2.3.1.5: parse every line and use the rules that parse — protego is tolerant.
    parser = Protego.parse(regroup_other_records(text))
    digest = hashlib.sha256(body[:MAX_ROBOTS_BYTES]).hexdigest()
    return RobotsPolicy(RULES, status, fetched_at, body=text, sha256=digest, parser=parser)


def policy_from_stored(status: int | None, body: str | None, fetched_at: float,
                       sha256: str | None = None) -> RobotsPolicy:
    """Rebuild a policy persisted in the ledger's ``hosts`` table."""
    kind = classify_status(status)
    if kind != RULES:
        return RobotsPolicy(kind, status, fetched_at)
    text = body or ""
    return RobotsPolicy(RULES, status, fetched_at, body=text, sha256=sha256,
                        parser=Protego.parse(regroup_other_records(text)))


def _record_key(line: str) -> str | None:
    key, sep, _ = line.split("#", 1)[0].partition(":")
    return key.strip().lower() if sep else None


def regroup_other_records(text: str) -> str:
    """Move non-standard records out of a group's run of ``user-agent`` lines.

    RFC 9309 §2.2.4: parsing other records (Crawl-delay, Sitemap, ...) MUST NOT interfere with
    the defined ones. protego ends the group's user-agent list at such a record, so
    ``User-agent: a / Crawl-delay: 5 / User-agent: b / Disallow: /x`` would leave ``a`` with no
    rules (standards.md R22). Within each header (the lines between a group's first
    ``user-agent`` and its first rule) we put the user-agent lines first; other records then
    still belong to the same group.
    """
    out: list[str] = []
    agents: list[str] = []
    others: list[str] = []
    in_header = False
    for line in text.splitlines():
        key = _record_key(line)
        if key == "user-agent":
            in_header = True
            agents.append(line)
        elif in_header and key in ("allow", "disallow"):
            out.extend(agents + others + [line])
            agents, others, in_header = [], [], False
        elif in_header:
            others.append(line)
        else:
            out.append(line)
    out.extend(agents + others)
    return "\n".join(out)


def names_group(parser: Any, token: str) -> bool:
    """Whether robots.txt has a group written for ``token`` itself (not only ``*``); product
    tokens compare case-insensitively (RFC 9309 §2.2.1). Reads protego's ``_user_agents``; if
    that vanishes, every token counts as named (the stricter reading)."""
    try:
        return token.lower() in parser._user_agents
    except AttributeError:
        return True


def matching_rule(parser: Any, token: str, url: str) -> tuple[bool, str | None]:
    """(allowed, rule) for ``url``: the most specific matching rule of ``token``'s group.

    Group selection (case-insensitive token, merged groups, fallback to ``*``, §2.2.1) and
    pattern matching (``*``, ``$``, percent-encoding, §2.2.2-§2.2.3) are protego's. protego does
    not expose the rule that decided, so we walk its rule set in its own precedence order
    (longest pattern first, ``allow`` first on ties — §2.2.2 "most octets", and the SHOULD that
    allow wins a tie). Where "most octets" is ambiguous with wildcards (standards.md §1.4) we
    therefore use protego's choice: pattern length.

    One correction: protego adds an implicit ``allow: <dir>/$`` for every ``allow:
    <dir>/index.html`` (libraries.md §1). RFC 9309 has no such rule, so we skip those added
    rules and follow the RFC. They are recognised because protego creates them outside its
    pattern cache, while every rule written in the file comes from that cache.

    This reads protego internals (``_get_matching_rule_set``, ``_rules``, ``_url_patterns``);
    tests/test_robots.py pins the behaviour, and if the internals vanish we fall back to
    protego's public verdict with the rule unknown.
    """
    try:
        from protego._utils import _quote_path

        rule_set = parser._get_matching_rule_set(token)
        if rule_set is None:
            return True, None  # §2.2.1: no group matches and no "*" group
        written = {id(p) for p in parser._url_patterns.values() if p is not None}
        target = _quote_path(url)
        for rule in rule_set._rules:
            if id(rule.value) not in written:
                continue  # protego's index.html extension, not in RFC 9309
            if rule.value.match(target):
                allowed = rule.field == "allow"
                return allowed, f"{rule.field.capitalize()}: {rule.value._pattern}"
        return True, None  # §2.2.2: no matching rule -> allowed
    except AttributeError:  # protego changed its internals
        return bool(parser.can_fetch(url, token)), "(rule not available)"
