"""What a reservation signal says (collector.checks.reservations) and how the run combines
them (collector.run.reservations.verdict, collector.fetching.tdmrep.classify).

Sources: W3C TDM Reservation Protocol, Community Group final report of May 2024 ("TDMRep"):
§2.1 the values, §3.1 the file and its matching, §3.2 the header fields, §3.3 the HTML meta
elements, §4 processing priority. IPTC Photo Metadata Standard 2023.1, "Data Mining" with the
PLUS Data Mining vocabulary (IPTC news of 4 October 2023). noai/noimageai: common practice, no
standard.
"""

from __future__ import annotations

import io
import json

import pytest
from PIL import Image

from collector.checks.embedded_metadata import read_xmp
from collector.checks.reservations import (
    HEADER,
    MAX_TDMREP_RULES,
    META,
    NOT_RESERVED,
    RESERVED,
    TDMREP_FILE,
    UNKNOWN,
    UNSET,
    Signal,
    TdmFileUnusable,
    file_signal,
    header_signals,
    meta_signals,
    parse_tdmrep,
    reservation_value,
    tdm_state,
    xmp_signals,
)
from collector.demo_site.tdm import xmp_packet
from collector.fetching.tdmrep import NO_FILE, NOT_READ, RULES, UNUSABLE, classify, tdmrep_url
from collector.fetching.tdmrep import UNKNOWN as FILE_UNKNOWN
from collector.run.reservations import verdict

# TDMRep §3.1, second example (three groups of files), verbatim apart from the host.
SPEC_EXAMPLE = [
    {"location": "/directory-a/", "tdm-reservation": 1},
    {"location": "/directory-b/html/", "tdm-reservation": 1,
     "tdm-policy": "https://provider.example/policies/policy.json"},
    {"location": "/directory-b/images/*.jpg", "tdm-reservation": 0},
]


def rules(data: object) -> object:
    return parse_tdmrep(json.dumps(data).encode())


@pytest.mark.parametrize(("raw", "meaning"), [
    (1, RESERVED), (0, NOT_RESERVED), ("1", RESERVED), (" 0 ", NOT_RESERVED),
    (2, UNSET), ("yes", UNSET), (True, UNSET), (None, UNSET), ("", UNSET),
])
def test_reservation_values_are_one_or_zero_else_unset(raw: object, meaning: str) -> None:
    """TDMRep §2.1: 1 reserved, 0 not reserved, any other value a protocol error (unset)."""
    assert reservation_value(raw) == meaning


@pytest.mark.parametrize(("path", "meaning"), [
    ("/directory-a/report.pdf", RESERVED),
    ("/directory-b/html/page.html", RESERVED),
    ("/directory-b/images/photo.jpg", NOT_RESERVED),
    ("/directory-b/images/photo.png", None),  # no rule: unset (§3.1)
    ("/Directory-a/report.pdf", None),  # matching SHOULD be case sensitive (§3.1)
])
def test_the_reports_example_file(path: str, meaning: str | None) -> None:
    """TDMRep §3.1's three-group example decides each path as the report describes."""
    rule = rules(SPEC_EXAMPLE).first_match("https://provider.example" + path)
    assert (rule.meaning if rule else None) == meaning


def test_the_first_matching_rule_decides() -> None:
    """TDMRep §3.1: "The most specific match is the first in sequence" - file order, not
    pattern length."""
    data = [{"location": "/img/", "tdm-reservation": 0},
            {"location": "/img/reserved/", "tdm-reservation": 1}]
    assert rules(data).first_match("http://h/img/reserved/a.png").meaning == NOT_RESERVED
    assert rules(list(reversed(data))).first_match(
        "http://h/img/reserved/a.png").meaning == RESERVED


def test_dollar_and_star_and_percent_encoding() -> None:
    """TDMRep §3.1: "$" ends a pattern, "*" is any run of characters, percent-encoded
    unreserved characters are decoded before comparing."""
    data = [{"location": "/exact$", "tdm-reservation": 1},
            {"location": "/a/*/b", "tdm-reservation": 1},
            {"location": "/%7Euser/", "tdm-reservation": 1}]
    parsed = rules(data)
    assert parsed.first_match("http://h/exact") is not None
    assert parsed.first_match("http://h/exactly") is None
    assert parsed.first_match("http://h/a/x/y/b/c") is not None
    assert parsed.first_match("http://h/~user/pic.png") is not None


def test_a_first_match_with_a_bad_value_is_unset_not_skipped() -> None:
    """A matching rule whose value is a protocol error is unset (§2.1); later rules are not
    consulted, since the first match is the one used (§3.1)."""
    data = [{"location": "/", "tdm-reservation": "maybe"},
            {"location": "/", "tdm-reservation": 1}, {"tdm-reservation": 1}]
    parsed = rules(data)
    assert len(parsed.rules) == 2  # the rule without a location cannot match
    assert parsed.first_match("http://h/x").meaning == UNSET


@pytest.mark.parametrize("body", [b"{not json", b'{"location": "/"}', b"\xff\xfe\x00",
                                  b"[" * 100_000])
def test_unusable_files_are_refused_with_a_reason(body: bytes) -> None:
    """Invalid JSON, an object instead of an array (§3.1 "an array of JSON objects") and
    deep nesting all raise TdmFileUnusable."""
    with pytest.raises(TdmFileUnusable):
        parse_tdmrep(body)


def test_too_many_rules_are_refused() -> None:
    """More rules than MAX_TDMREP_RULES are not read (common practice, no source)."""
    data = [{"location": f"/{n}/", "tdm-reservation": 1} for n in range(MAX_TDMREP_RULES + 1)]
    with pytest.raises(TdmFileUnusable, match="rules"):
        rules(data)


@pytest.mark.parametrize(("status", "body", "reason", "state"), [
    (200, json.dumps(SPEC_EXAMPLE).encode(), "", RULES),
    (200, b"<html>", "", UNUSABLE),
    (404, None, "http_404", NO_FILE),
    (410, None, "http_410", NO_FILE),
    (503, None, "http_503", FILE_UNKNOWN),
    (429, None, "http_429", FILE_UNKNOWN),
    (None, None, "timeout", FILE_UNKNOWN),
    (None, None, "too_large", UNUSABLE),
    (302, None, "redirect_blocked", UNUSABLE),
    (None, None, "robots_unreachable", NOT_READ),
    (None, None, "robots_disallowed", NOT_READ),
])
def test_fetch_outcomes(status: int | None, body: bytes | None, reason: str,
                        state: str) -> None:
    """404 = no rules (§3.1: no file, protocol not implemented); 5xx, 429 and network errors =
    unknown, asked again later (the project's rule); an unusable body = no file, recorded."""
    assert classify(status, body, reason, "http://h/.well-known/tdmrep.json", 0.0).state == state


def test_tdmrep_url_is_per_origin() -> None:
    """The file lives at /.well-known/tdmrep.json of the origin (TDMRep §3.1, RFC 8615)."""
    assert tdmrep_url("https://a.example:8443/x/y.png?q=1") == (
        "https://a.example:8443/.well-known/tdmrep.json")


def test_header_fields() -> None:
    """tdm-reservation and tdm-policy header fields (§3.2); X-Robots-Tag noimageai (common
    practice); header names are case-insensitive (RFC 9110 §5.1)."""
    from requests.structures import CaseInsensitiveDict

    found = header_signals("http://h/p", CaseInsensitiveDict({
        "TDM-Reservation": "1", "tdm-policy": "https://h/policy.json",
        "x-robots-tag": "noindex, noimageai"}), ["collector"])
    assert [(s.name, s.meaning, s.policy) for s in found] == [
        ("tdm-reservation", RESERVED, "https://h/policy.json"),
        ("X-Robots-Tag", RESERVED, None)]


def test_a_directive_for_another_agent_does_not_bind_us() -> None:
    """A user-agent prefix names who the directive is for; ours binds, another's does not
    (common practice, no source)."""
    assert header_signals("u", {"X-Robots-Tag": "otherbot: noai"}, ["collector"]) == []
    assert header_signals("u", {"X-Robots-Tag": "collector: noai"}, ["collector"])
    assert header_signals("u", {"X-Robots-Tag": "otherbot: noindex, noai"}, ["collector"]) == []
    assert header_signals("u", {"X-Robots-Tag": "max-image-preview: none, noimageai"},
                          ["collector"])


def test_meta_elements() -> None:
    """<meta name="tdm-reservation"> and tdm-policy (§3.3) and robots noai; only the head is
    read, so a body that quotes the tag does not count."""
    html = ('<html><head><meta name="tdm-reservation" content="1">'
            '<meta name="tdm-policy" content="https://h/p.json">'
            '<META NAME="robots" CONTENT="noai"></head>'
            '<body><meta name="tdm-reservation" content="0"></body></html>')
    found = meta_signals("http://h/d/1", html, ["collector"])
    assert [(s.place, s.name, s.meaning) for s in found] == [
        (META, "tdm-reservation", RESERVED), (META, "robots", RESERVED)]
    assert found[0].policy == "https://h/p.json"


def test_processing_priority() -> None:
    """TDMRep §4: a header value supersedes the file's, a meta value supersedes both, and an
    absent value never resets the current one."""
    file_1 = file_signal("http://h/a", "http://h/.well-known/tdmrep.json",
                         rules([{"location": "/", "tdm-reservation": 1}]))
    header_0 = Signal(HEADER, "http://h/a", "tdm-reservation", "0", NOT_RESERVED)
    meta_1 = Signal(META, "http://h/a", "tdm-reservation", "1", RESERVED)
    bad = Signal(HEADER, "http://h/a", "tdm-reservation", "x", UNSET)
    assert tdm_state([file_1, header_0]) is header_0
    assert tdm_state([file_1, header_0, meta_1]) is meta_1
    assert tdm_state([file_1, bad]) is file_1


def test_unknown_is_never_no_reservation() -> None:
    """An unreadable tdmrep.json keeps the item "unknown" until a header or meta value of
    the same resource settles it (the project's rule over TDMRep §4)."""
    unknown = Signal(TDMREP_FILE, "http://h/.well-known/tdmrep.json", "file", "http_503",
                     UNKNOWN)
    assert verdict([[unknown]])[0] == UNKNOWN
    header_0 = Signal(HEADER, "http://h/a", "tdm-reservation", "0", NOT_RESERVED)
    assert verdict([[unknown, header_0]])[0] == NOT_RESERVED
    reserved = Signal(HEADER, "http://h/b", "tdm-reservation", "1", RESERVED)
    assert verdict([[unknown], [reserved]]) == (RESERVED, reserved)


@pytest.mark.parametrize(("term", "meaning"), [
    ("DMI-PROHIBITED-AIMLTRAINING", RESERVED),
    ("DMI-PROHIBITED-GENAIMLTRAINING", RESERVED),
    ("DMI-PROHIBITED", RESERVED),
    ("DMI-PROHIBITED-SEECONSTRAINT", RESERVED),
    ("DMI-ALLOWED", NOT_RESERVED),
    ("DMI-UNSPECIFIED", NOT_RESERVED),
    ("DMI-SOMETHING-ELSE", UNSET),
])
def test_iptc_data_mining_read_from_a_real_jpeg(term: str, meaning: str) -> None:
    """IPTC Photo Metadata 2023.1 Data Mining: the PLUS vocabulary URI
    http://ns.useplus.org/ldf/vocab/<term> in XMP plus:DataMining, read back from a JPEG
    Pillow wrote; Other Constraints comes along as text."""
    buf = io.BytesIO()
    Image.new("RGB", (32, 32), "teal").save(buf, "JPEG", xmp=xmp_packet(term))
    flags: list[str] = []
    rights = read_xmp(Image.open(io.BytesIO(buf.getvalue())), flags)
    found = xmp_signals("http://h/x.jpg", rights)
    assert [(s.name, s.meaning) for s in found] == [
        ("plus:DataMining", meaning), ("plus:OtherConstraints", UNSET)]
    assert found[1].value == "Ask the archive first"


RECIPE = ('contact = "me@example.org"\n[[sources]]\nname = "desk"\nkind = "scans"\n'
          'path = "in"\n')


def test_reservations_recipe_defaults_and_errors() -> None:
    """Honouring is the default; a permission must name a source and carry a reference; a
    robots token must be a product token (RFC 9309 §2.2.1)."""
    from pathlib import Path

    from collector.config.recipe import parse_recipe
    from collector.errors import RecipeError

    plain = parse_recipe(RECIPE, Path("r.toml")).reservations
    assert (plain.when_unknown, plain.robots_tokens, plain.permission) == ("defer", [], {})
    with pytest.raises(RecipeError) as caught:
        parse_recipe(RECIPE + '[reservations]\nwhen_unknown = "ignore"\nrobots_tokens = '
                     '["Bad Token"]\n[reservations.permission]\n"dsek" = "Agreement 7"\n'
                     '"desk" = "  "\n', Path("r.toml"))
    shown = {p.key_path: p.message for p in caught.value.problems}
    assert "reservations.when_unknown" in shown
    assert "product tokens" in shown["reservations.robots_tokens"]
    assert "did you mean 'desk'" in shown['reservations.permission."dsek"']
    assert "needs a reference" in shown["reservations.permission"]
