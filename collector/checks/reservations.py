"""Machine-readable reservations against text-and-data mining and AI training: what a signal
says. Pure functions, no I/O: the fetcher hands over bodies and headers, the run applies the
policy (:mod:`collector.run.reservations`).

Sources of each rule:

- TDMRep: W3C TDM Reservation Protocol, Community Group final report (May 2024), "TDMRep"
  below. ``tdm-reservation`` is 1 (reserved) or 0 (not reserved); any other value is a
  protocol error and the property counts as unset (TDMRep §2.1). ``/.well-known/tdmrep.json``
  is a JSON array of rules ``{location, tdm-reservation, tdm-policy}``; the first rule in the
  file whose location matches is the "most specific match" and the only one used (TDMRep §3.1);
  locations use the robots.txt pattern syntax, ``*`` and a final ``$`` (TDMRep §3.1, "Use of
  regular expressions"); matching is case-sensitive, percent-encoded unreserved characters
  are decoded first. Processing priority (TDMRep §4): the file, then the HTTP header fields,
  then the HTML ``<meta>`` elements, each later value superseding an earlier one; an absent
  value never resets the current one.
- ``noai`` / ``noimageai`` in ``X-Robots-Tag`` response headers and in ``<meta name="robots">``:
  common practice, no standard. Read as directives in the comma-separated lists these fields
  use; a directive prefixed with a user-agent name (``somebot: noai``) binds us only when the
  name is one of our product tokens.
- IPTC Photo Metadata Standard 2023.1 "Data Mining" (XMP ``plus:DataMining``, namespace
  ``http://ns.useplus.org/ldf/xmp/1.0/``) with the PLUS Data Mining vocabulary
  (``http://ns.useplus.org/ldf/vocab/DMI-...``), and "Other Constraints"
  (``plus:OtherConstraints``, free text), as published by IPTC on 4 October 2023.
"""

from __future__ import annotations

import json
import re
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, field
from html.parser import HTMLParser
from urllib.parse import urlsplit

from collector.safe_text import valid_unicode

# The file is read up to this many bytes (TDMRep sets no limit; we borrow RFC 9309 §2.5's
# 500 KiB floor for robots.txt, common practice, no source) and at most this many rules.
MAX_TDMREP_BYTES = 512 * 1024
MAX_TDMREP_RULES = 10_000
MAX_SHOWN_VALUE = 300  # characters of a raw value kept in the ledger

RESERVED, NOT_RESERVED, UNSET, UNKNOWN = "reserved", "not reserved", "unset", "unknown"
# IPTC Photo Metadata 2023.1, PLUS Data Mining vocabulary (IPTC news of 4 October 2023).
PLUS_VOCAB = "http://ns.useplus.org/ldf/vocab/"
DMI_ALLOWED = frozenset({"DMI-ALLOWED", "DMI-UNSPECIFIED"})
DMI_PROHIBITED = frozenset({
    "DMI-PROHIBITED-AIMLTRAINING", "DMI-PROHIBITED-GENAIMLTRAINING",
    "DMI-PROHIBITED-EXCEPTSEARCHENGINEINDEXING", "DMI-PROHIBITED",
    "DMI-PROHIBITED-SEECONSTRAINT", "DMI-PROHIBITED-SEEEMBEDDEDRIGHTSEXPR",
    "DMI-PROHIBITED-SEELINKEDRIGHTSEXPR"})
NOAI_DIRECTIVES = frozenset({"noai", "noimageai"})  # common practice, no standard
# Robots directives that carry a value after a colon, so "name: value" is not an agent prefix.
VALUED_DIRECTIVES = frozenset({"unavailable_after", "max-snippet", "max-image-preview",
                               "max-video-preview"})

# The items' reasons, one per mechanism (status and the datasheet count them).
TDMREP_REASON, NOAI_REASON, XMP_REASON, UNKNOWN_REASON, ROBOTS_TOKEN_REASON = (
    "tdmrep_reserved", "noai_directive", "xmp_data_mining", "tdmrep_unknown",
    "robots_token_disallowed")
RESERVATION_REASONS = (TDMREP_REASON, NOAI_REASON, XMP_REASON, UNKNOWN_REASON,
                       ROBOTS_TOKEN_REASON)

# The mechanisms checked, as trace and the datasheet name them.
C2PA_NOT_READ = "C2PA content credentials not read (c2pa-python not installed)"
PAGE_CHECKS = ("tdmrep.json", "tdm-reservation header", "tdm-reservation meta",
               "X-Robots-Tag noai/noimageai", "robots meta noai/noimageai")
FILE_CHECKS = ("XMP plus:DataMining", C2PA_NOT_READ)

# Where a signal was seen (the ledger's ``place``) and the mechanism names trace shows.
TDMREP_FILE, HEADER, META, XMP, C2PA, ROBOTS_TXT = (
    "tdmrep.json", "HTTP header", "HTML meta", "XMP", "C2PA", "robots.txt")


@dataclass(frozen=True)
class Signal:
    """One reservation signal as seen: where, which field, its raw value, what it means."""

    place: str  # TDMREP_FILE | HEADER | META | XMP | C2PA | ROBOTS_TXT
    url: str
    name: str  # "tdm-reservation", "X-Robots-Tag", "plus:DataMining", ...
    value: str
    meaning: str  # RESERVED | NOT_RESERVED | UNSET | UNKNOWN
    policy: str | None = None  # tdm-policy, when one came with a reservation

    @property
    def shown_value(self) -> str:
        """The raw value as the ledger keeps it (at most MAX_SHOWN_VALUE characters)."""
        return self.value if len(self.value) <= MAX_SHOWN_VALUE else (
            self.value[:MAX_SHOWN_VALUE] + "...")


class TdmFileUnusable(ValueError):
    """tdmrep.json was fetched but cannot be used as rules (not a JSON array, too many
    rules); ``str(exc)`` says why."""


# --- TDMRep values and rules ------------------------------------------------------------------
def reservation_value(raw: object) -> str:
    """RESERVED, NOT_RESERVED or UNSET for a ``tdm-reservation`` value (TDMRep §2.1: 1 or 0;
    anything else is a protocol error, i.e. unset). JSON numbers and header text both count;
    JSON ``true``/``false`` are not 1/0."""
    if isinstance(raw, bool):
        return UNSET
    if isinstance(raw, int | float) and raw in (0, 1):
        return RESERVED if raw == 1 else NOT_RESERVED
    if isinstance(raw, str) and raw.strip() in ("0", "1"):
        return RESERVED if raw.strip() == "1" else NOT_RESERVED
    return UNSET


_UNRESERVED = re.compile(r"%([0-9A-Fa-f]{2})")


def _decode_unreserved(text: str) -> str:
    """Decode %XX when XX is an unreserved character (RFC 3986 §2.3), as TDMRep §3.1 asks;
    other escapes are kept (upper-cased, so either spelling compares equal)."""
    def one(m: re.Match[str]) -> str:
        char = chr(int(m.group(1), 16))
        if char.isascii() and (char.isalnum() or char in "-._~"):
            return char
        return "%" + m.group(1).upper()
    return _UNRESERVED.sub(one, text)


@dataclass
class TdmRule:
    """One rule of tdmrep.json: the location pattern and its values."""

    location: str
    meaning: str
    raw: str
    policy: str | None = None
    _pattern: str = field(default="", init=False, repr=False)
    _regex: re.Pattern[str] | None = field(default=None, init=False, repr=False)

    def __post_init__(self) -> None:
        self._pattern = _decode_unreserved(self.location)

    def matches(self, target: str) -> bool:
        """Whether the path (and query) ``target`` is under this rule (robots.txt syntax)."""
        pattern = self._pattern
        if "*" not in pattern and not pattern.endswith("$"):
            return target.startswith(pattern)
        if self._regex is None:  # compiled when first needed: most rules are plain prefixes
            anchored = pattern.endswith("$")
            body = pattern[:-1] if anchored else pattern
            self._regex = re.compile(".*".join(re.escape(p) for p in body.split("*"))
                                     + ("$" if anchored else ""))
        return self._regex.match(target) is not None


@dataclass(frozen=True)
class TdmRules:
    """The rules of one origin's tdmrep.json, in file order."""

    rules: tuple[TdmRule, ...]

    def first_match(self, url: str) -> TdmRule | None:
        """The rule that decides for ``url``: the first whose location matches (TDMRep §3.1,
        "the most specific match is the first in sequence"), or None (unset)."""
        parts = urlsplit(url)
        target = _decode_unreserved(parts.path or "/") + (f"?{parts.query}" if parts.query
                                                          else "")
        for rule in self.rules:
            if rule.matches(target):
                return rule
        return None


def parse_tdmrep(body: bytes) -> TdmRules:
    """The rules of a tdmrep.json body (already capped at MAX_TDMREP_BYTES by the fetcher).

    A body that is not a JSON array, or that holds more than MAX_TDMREP_RULES rules, raises
    TdmFileUnusable. A rule without a string ``location`` cannot match and is dropped; a
    rule whose ``tdm-reservation`` is not 1 or 0 stays, with the value unset (TDMRep §2.1), so
    it still stops the search when it is the first match.
    """
    try:
        data = json.loads(body.decode("utf-8-sig"))
    except (UnicodeDecodeError, ValueError, RecursionError) as exc:
        raise TdmFileUnusable(f"not valid JSON ({type(exc).__name__})") from None
    # JSON's "\ud800" escapes make lone surrogates (RFC 8259 §8.2): U+FFFD in their place, so
    # the rules' locations, values and policies can be recorded.
    data, _ = valid_unicode(data)
    if not isinstance(data, list):
        raise TdmFileUnusable("not a JSON array of rules (TDMRep §3.1)")
    if len(data) > MAX_TDMREP_RULES:
        raise TdmFileUnusable(f"{len(data):,} rules, more than the {MAX_TDMREP_RULES:,} "
                              "read")
    rules: list[TdmRule] = []
    for entry in data:
        if not isinstance(entry, dict) or not isinstance(entry.get("location"), str):
            continue
        raw = entry.get("tdm-reservation")
        policy = entry.get("tdm-policy")
        rules.append(TdmRule(entry["location"], reservation_value(raw), json.dumps(raw),
                             policy if isinstance(policy, str) else None))
    return TdmRules(tuple(rules))


def file_signal(url: str, file_url: str, rules: TdmRules) -> Signal:
    """What tdmrep.json says about ``url``: the first matching rule, or no rule (unset)."""
    rule = rules.first_match(url)
    if rule is None:
        return Signal(TDMREP_FILE, file_url, "location", f"no rule matches {url}", UNSET)
    return Signal(TDMREP_FILE, file_url, "location",
                  f"{rule.location} -> tdm-reservation {rule.raw}", rule.meaning,
                  rule.policy if rule.meaning == RESERVED else None)


# --- headers and HTML ------------------------------------------------------------------------
def _robots_directives(value: str, tokens: Iterable[str]) -> set[str]:
    """The directives in an X-Robots-Tag or robots meta value that bind us: unprefixed ones
    and those prefixed with one of our product tokens (case-insensitive)."""
    ours = {t.lower() for t in tokens}
    found: set[str] = set()
    agent: str | None = None
    for part in value.split(","):
        word = part.strip().lower()
        if ":" in word:
            head, _, rest = word.partition(":")
            head = head.strip()
            if head not in NOAI_DIRECTIVES | VALUED_DIRECTIVES and " " not in head:
                agent, word = head, rest.strip()
        if agent is None or agent in ours:
            found.add(word)
    return found


def noai_signal(place: str, url: str, name: str, value: str,
                tokens: Iterable[str]) -> Signal | None:
    """A ``noai``/``noimageai`` directive (common practice, no standard), or None."""
    hits = _robots_directives(value, tokens) & NOAI_DIRECTIVES
    if not hits:
        return None
    return Signal(place, url, name, value, RESERVED)


def header_signals(url: str, headers: Mapping[str, str], tokens: Iterable[str]) -> list[Signal]:
    """Signals in one response's header fields: ``tdm-reservation`` (with ``tdm-policy``,
    TDMRep §3.2) and ``X-Robots-Tag`` noai/noimageai."""
    out: list[Signal] = []
    raw = headers.get("tdm-reservation")
    if raw is not None:
        meaning = reservation_value(raw)
        out.append(Signal(HEADER, url, "tdm-reservation", raw, meaning,
                          headers.get("tdm-policy") if meaning == RESERVED else None))
    tag = headers.get("X-Robots-Tag")
    if tag:
        signal = noai_signal(HEADER, url, "X-Robots-Tag", tag, tokens)
        if signal is not None:
            out.append(signal)
    return out


class _MetaReader(HTMLParser):
    """Collects ``<meta name=... content=...>`` of the names we read; stops at ``<body>``."""

    NAMES = ("tdm-reservation", "tdm-policy", "robots")

    def __init__(self) -> None:
        super().__init__(convert_charrefs=True)
        self.found: list[tuple[str, str]] = []
        self.done = False

    def handle_starttag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        if tag == "body":
            self.done = True
        if tag != "meta" or self.done:
            return
        values = {k.lower(): v or "" for k, v in attrs}
        name = values.get("name", "").strip().lower()
        if name in self.NAMES and "content" in values:
            self.found.append((name, values["content"]))


def meta_signals(url: str, html: str, tokens: Iterable[str]) -> list[Signal]:
    """Signals in an HTML page's ``<meta>`` elements: ``tdm-reservation`` / ``tdm-policy``
    (TDMRep §3.3) and ``robots`` noai/noimageai (common practice). Only the part before
    ``<body>`` is read; a page that does not parse yields what was found until then."""
    reader = _MetaReader()
    head = html[:MAX_TDMREP_BYTES]
    end = head.lower().find("<body")
    reader.feed(head if end < 0 else head[:end])
    values = dict(reader.found)
    out: list[Signal] = []
    if "tdm-reservation" in values:
        meaning = reservation_value(values["tdm-reservation"])
        out.append(Signal(META, url, "tdm-reservation", values["tdm-reservation"], meaning,
                          values.get("tdm-policy") if meaning == RESERVED else None))
    for name, content in reader.found:
        if name == "robots":
            signal = noai_signal(META, url, "robots", content, tokens)
            if signal is not None:
                out.append(signal)
    return out


def tdm_state(signals: Sequence[Signal]) -> Signal | None:
    """The TDMRep signal that decides for one resource, given its TDMRep signals in
    processing order (file, header, meta; TDMRep §4): the last one that is set. An unknown
    file stays in force until a header or meta value settles the question."""
    current: Signal | None = None
    for signal in signals:
        if signal.name in ("file", "location", "tdm-reservation") and signal.meaning != UNSET:
            current = signal
    return current


# --- embedded metadata -------------------------------------------------------------------------
def xmp_signals(url: str, rights: Mapping[str, object]) -> list[Signal]:
    """The IPTC "Data Mining" and "Other Constraints" values read from a file's XMP
    (``xmp_data_mining``, ``xmp_other_constraints`` of the rights summary). A Data Mining value
    outside the PLUS vocabulary is kept as unset: we do not guess what it means."""
    out: list[Signal] = []
    value = rights.get("xmp_data_mining")
    if value:
        text = str(value).strip()
        term = text.removeprefix(PLUS_VOCAB)
        meaning = (RESERVED if term in DMI_PROHIBITED else
                   NOT_RESERVED if term in DMI_ALLOWED else UNSET)
        out.append(Signal(XMP, url, "plus:DataMining", text, meaning))
    other = rights.get("xmp_other_constraints")
    if other:
        out.append(Signal(XMP, url, "plus:OtherConstraints", str(other), UNSET))
    return out
