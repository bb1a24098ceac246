"""Licence normalisation to SPDX ids, the allow-list decision, and rights conflicts.

Licence output is a best-effort reading of what a source declared; it is not legal advice.

The SPDX index comes from license-expression (bundled ScanCode data). That index has no licence
names and no URLs (libraries.md section 4), so this module adds a small, documented mapping for
Creative Commons URLs and names, and only ever returns an id the index knows.

Decisions:
* Unversioned inputs ("CC BY-SA", "public domain") map to None on purpose: the version decides
  the terms, and a guessed version is worse than an honest "unknown" (libraries.md section 4).
  CC0 is the exception: it has only ever had version 1.0 (SPDX License List: CC0-1.0 is its
  only id), so a bare "CC0" is not ambiguous and maps to CC0-1.0 (issue 15).
* A licence named inside a sentence ("Licensed under CC BY 2.0", "Namensnennung 4.0
  International (CC BY 4.0)") is read when the sentence names exactly one licence; two different
  ones leave it unknown (method "in-text").
* RightsStatements.org statements are not licences: collector.checks.rights_statements reads
  them, and ``licence_allowed`` decides them by the ``rs:<id>`` entries of the allowlist.
* Jurisdiction ports map to their own SPDX id (e.g. CC-BY-SA-3.0-DE) when the list has one; an
  unlisted port is never mapped to the unported id (standards.md section 7) and gives None.
* When both a text and a URL are given and they disagree, the text's reading wins and the
  disagreement is kept in ``LicenceInfo.conflict`` for the user to decide.
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from functools import cache, lru_cache

import license_expression as le

from collector.checks.rights_statements import ALLOW_PREFIX, RightsStatement, statement_allowed

__all__ = [
    "DEFAULT_ALLOW",
    "LicenceInfo",
    "licence_allowed",
    "licence_conditions",
    "licence_deed_url",
    "licences_in_text",
    "normalise_licence",
    "rights_conflict",
]


@dataclass(frozen=True)
class LicenceInfo:
    """The SPDX reading of a declared licence text and/or URL."""

    spdx_id: str | None
    raw: str | None
    url: str | None
    method: str | None  # "spdx-id" | "cc-url" | "cc-name" | "expression" | "alias" | "in-text"
    conflict: str | None = None  # text and URL name different licences
    note: str | None = None  # why nothing was mapped (unlisted port, unversioned, ...)


@cache
def _licensing() -> le.Licensing:
    """The SPDX licensing object, built once (about 20-30 ms)."""
    return le.get_spdx_licensing()


@cache
def _index() -> dict[str, str]:
    """Lower-case SPDX id or alias -> canonical SPDX id."""
    out: dict[str, str] = {}
    for key, sym in _licensing().known_symbols.items():
        out[key.lower()] = sym.key
        for alias in getattr(sym, "aliases", ()) or ():
            out.setdefault(alias.lower(), sym.key)
    return out


def _known(spdx_id: str) -> str | None:
    """Canonical spelling of an id if the SPDX index knows it, else None."""
    return _index().get(spdx_id.lower())


# --- Creative Commons URLs (standards.md section 7, "URL forms") -------------------------------
_CC_CODES = "by|by-sa|by-nd|by-nc|by-nc-sa|by-nc-nd|by-nd-nc|sa"
_CC_URL = re.compile(
    r"^(?:(?:https?:)?//)?(?:www\.)?creativecommons\.org(?::\d+)?/"
    r"(?:licenses/(?P<code>" + _CC_CODES + r")/(?P<ver>\d\.\d)"
    r"(?:/(?!legalcode|deed)(?P<port>[a-z][a-z-]{1,15}))?"
    r"|publicdomain/(?P<pd>zero|mark)/1\.0"
    r"|licenses/(?P<pddc>publicdomain))"
    r"(?:/(?:legalcode(?:\.[a-z-]+)?|deed\.[a-z-]+|rdf)?)?/?(?:[?#].*)?$",
    re.IGNORECASE,
)
# Unanchored form, to find licence URLs inside free text (rights metadata).
_CC_URL_IN_TEXT = re.compile(
    r"(?:(?:https?:)?//)?(?:www\.)?creativecommons\.org/[^\s\"'<>),;]+", re.I)


def _cc_id(code: str, ver: str, port: str | None) -> str:
    code = code.lower()
    if code == "by-nd-nc":  # CC 1.0 spelled it by-nd-nc; SPDX uses BY-NC-ND (standards.md 7)
        code = "by-nc-nd"
    cand = f"CC-{code.upper()}-{ver}"
    return f"{cand}-{port.upper()}" if port else cand


def _from_url(url: str) -> tuple[str | None, str | None]:
    """(SPDX id, note) for a creativecommons.org licence URL."""
    m = _CC_URL.match(url.strip())
    if not m:
        return None, None
    if m["pd"]:
        return ("CC0-1.0" if m["pd"].lower() == "zero" else "CC-PDM-1.0"), None
    if m["pddc"]:
        return _known("CC-PDDC"), None
    cand = _cc_id(m["code"], m["ver"], m["port"])
    found = _known(cand)
    if found is None:
        what = f"port '{m['port']}'" if m["port"] else "licence"
        return None, f"creativecommons.org {what} {cand} has no SPDX id"
    return found, None


# --- Creative Commons names ----------------------------------------------------------------
# Jurisdiction names seen in CC port titles, mapped to the suffix SPDX uses (standards.md 7).
_PORT_NAMES = {
    "germany": "DE", "austria": "AT", "netherlands": "NL", "australia": "AU",
    "united states": "US", "igo": "IGO", "england and wales": "UK", "uk": "UK",
    "japan": "JP", "france": "FR",
}  # fmt: skip
_UNPORTED = {"", "international", "unported", "generic", "universal"}
_ELEMENT_NAMES = {
    "attribution": "BY", "noncommercial": "NC", "sharealike": "SA",
    "noderivatives": "ND", "noderivs": "ND",
}  # fmt: skip
# A version ends there: no letter, digit or further ".digit" glued to it ("4.0x", "4.0.1" name
# no licence; a sentence's full stop after "4.0" is fine).
_VERSION_END = r"(?!\w|\.\d)"
_LONG_ELEMENTS = (
    r"(?P<els>attribution(?:[\s-]*(?:non[\s-]?commercial|share[\s-]?alike"
    r"|no[\s-]?derivatives|no[\s-]?derivs))*)[\s-]+(?P<ver>\d\.\d)" + _VERSION_END +
    r"(?P<rest>[\w\s&:-]*)")
_LONG_NAME = re.compile(r"creative\s+commons\s+" + _LONG_ELEMENTS, re.I)
# CC's deeds title a licence without the words "Creative Commons" ("Attribution-NonCommercial-
# ShareAlike 4.0 International"): read only as a whole string, where nothing else can be meant.
_TITLE_NAME = re.compile(_LONG_ELEMENTS, re.I)
_SHORT_NAME = re.compile(
    r"\bcc[\s-]+(?P<els>by(?:[\s-]+(?:nc|sa|nd)\b)*)[\s-]+(?P<ver>\d\.\d)" + _VERSION_END +
    r"(?P<rest>(?:[\s-]+[a-z]{2,13})?)",
    re.I,
)
# CC0 and the Public Domain Mark have version 1.0 only: a name followed by another version
# ("CC0 2.0", "CC0-1.0x") names nothing that exists.
_ONLY_V1 = r"(?:(?P<ver>[\s-]+v?1\.0)" + _VERSION_END + r"|(?![\s-]+v?\d))"
_CC0_NAME = re.compile(
    r"\b(?:cc[\s-]?(?:0|zero)|creative\s+commons\s+zero)\b" + _ONLY_V1, re.I)
_PDM_NAME = re.compile(r"\bpublic[\s-]+domain[\s-]+mark\b" + _ONLY_V1, re.I)
_RESERVED = re.compile(r"\ball\s+rights\s+reserved\b", re.I)


def _elements_to_code(words: list[str]) -> str:
    order = ["BY", "NC", "SA", "ND"]  # SPDX spells BY-NC-SA / BY-NC-ND
    found = {w for w in words if w}
    return "-".join(e for e in order if e in found)


def _port_suffix(rest: str) -> tuple[bool, str | None]:
    """(ok, port) from the words after the version; ok False for an unknown jurisdiction."""
    words = re.sub(r"[\s:&-]+", " ", rest.replace("&", " and ")).strip().lower()
    words = re.sub(r"\b(?:public|licen[cs]e|deed)\b", " ", words)
    words = re.sub(r"\s+", " ", words).strip()
    if words in _UNPORTED:
        return True, None
    if words in _PORT_NAMES:
        return True, _PORT_NAMES[words]
    if len(words) in (2, 3) and words.isalpha():  # "CC BY-SA 3.0 DE"
        return True, words.upper()
    return False, None


def _name_match(m: re.Match[str], long: bool, loose: bool = False) -> tuple[str | None, str | None]:
    if long:
        parts = re.findall(
            r"attribution|non[\s-]?commercial|share[\s-]?alike|no[\s-]?derivatives|no[\s-]?derivs",
            m["els"],
            re.I,
        )
        words = [_ELEMENT_NAMES[re.sub(r"[\s-]+", "", p.lower())] for p in parts]
    else:
        words = [w.upper() for w in re.split(r"[\s-]+", m["els"])]
    ok, port = _port_suffix(m["rest"])
    base = f"CC-{_elements_to_code(words)}-{m['ver']}"
    if loose and m["ver"] == "4.0":
        ok, port = True, None  # 4.0 has no ports: words after it in free text are no jurisdiction
    if not ok:
        return None, f"'{m['rest'].strip()}' is not a jurisdiction with an SPDX id for {base}"
    cand = f"{base}-{port}" if port else base
    found = _known(cand)
    return found, None if found else f"{cand} has no SPDX id"


def _from_name(text: str) -> tuple[str | None, str | None]:
    """(SPDX id, note) for a whole-string CC licence name."""
    t = text.strip()
    for rx, long in ((_LONG_NAME, True), (_TITLE_NAME, True), (_SHORT_NAME, False)):
        m = rx.fullmatch(t)
        if m:
            return _name_match(m, long)
    if _CC0_NAME.fullmatch(re.sub(r"\s+universal$", "", t, flags=re.I)):
        return "CC0-1.0", None  # CC0 has one version only (SPDX License List: CC0-1.0)
    m = _PDM_NAME.fullmatch(re.sub(r"\s+universal$", "", t, flags=re.I))
    if m:
        return ("CC-PDM-1.0", None) if m["ver"] else (None, "Public Domain Mark without a version")
    return None, None


def _from_text(text: str) -> tuple[str | None, str | None, str | None]:
    """(SPDX id, method, note) for a licence text."""
    t = text.strip()
    if not t or _RESERVED.search(t):
        return None, None, ("all rights reserved" if t else None)
    direct = _index().get(t.lower())
    if direct is not None:
        is_alias = direct.lower() != t.lower()
        return direct, ("alias" if is_alias else "spdx-id"), None
    if _CC_URL.match(t):
        spdx, note = _from_url(t)
        return spdx, ("cc-url" if spdx else None), note
    spdx, note = _from_name(t)
    if spdx or note:
        return spdx, ("cc-name" if spdx else None), note
    # Compound expressions; validate() crashes with AttributeError on URL-like input
    # (libraries.md section 4), so any exception means "not an expression".
    try:
        result = _licensing().validate(t)
    except Exception:
        return _from_sentence(t)
    if not result.errors and result.normalized_expression:
        return str(result.normalized_expression), "expression", None
    return _from_sentence(t)


def _from_sentence(text: str) -> tuple[str | None, str | None, str | None]:
    """(SPDX id, method, note) for a licence named inside a sentence: exactly one licence."""
    found = _ids_in_text(text)
    if len(found) == 1:
        return found.pop(), "in-text", None
    if found:
        return None, None, f"the text names several licences ({', '.join(sorted(found))})"
    return None, None, None


@lru_cache(maxsize=4096)  # archives repeat the same few licence strings
def normalise_licence(text: str | None, url: str | None) -> LicenceInfo:
    """Map a licence text and/or URL to an SPDX id the index knows, or None."""
    t_id = t_method = t_note = None
    u_id = u_note = None
    if text and text.strip():
        t_id, t_method, t_note = _from_text(text)
    if url and url.strip():
        u_id, u_note = _from_url(url)
    conflict = None
    if text and url and u_id and t_id != u_id and (t_id or t_note == "all rights reserved"):
        conflict = f"licence text reads {t_id or repr(text.strip())} but the URL reads {u_id}"
    if t_id is not None or conflict:
        return LicenceInfo(t_id, text, url, t_method, conflict, t_note)
    if u_id is not None:
        return LicenceInfo(u_id, text, url, "cc-url", None, None)
    return LicenceInfo(None, text, url, None, None, t_note or u_note)


# --- allow-list ------------------------------------------------------------------------------
def _default_allow() -> tuple[str, ...]:
    # Public-domain tools plus CC BY and CC BY-SA in every unported version the SPDX index has.
    # Ports (CC-BY-3.0-DE, ...) are left out: they carry national terms, so users add them by name.
    rx = re.compile(r"^CC-BY(?:-SA)?-\d\.\d$")
    versions = sorted({k for k in _index().values() if rx.match(k)})
    return ("CC0-1.0", "CC-PDM-1.0", *versions)


DEFAULT_ALLOW: tuple[str, ...] = _default_allow()


def _evaluate(node: object, allowed: set[str]) -> bool:
    if isinstance(node, le.LicenseWithExceptionSymbol):
        return node.license_symbol.key.lower() in allowed
    if isinstance(node, le.LicenseSymbol):
        return node.key.lower() in allowed
    args = getattr(node, "args", ())
    if isinstance(node, le.OR):
        return any(_evaluate(a, allowed) for a in args)
    if isinstance(node, le.AND):
        return all(_evaluate(a, allowed) for a in args)
    return False


def licence_allowed(
    spdx_id: str | None, allow: list[str] | tuple[str, ...], allow_unknown: bool,
    statement: RightsStatement | None = None,
) -> tuple[bool, str | None]:
    """Decide whether a licence passes the allow-list: (ok, ledger reason or None).

    An item with no SPDX licence but a RightsStatements.org statement is decided by the
    statement alone: allowed only when the allowlist names it (``rs:NoC-US``); ``allow_unknown``
    does not let a statement through, because the statement is known and says what it says.
    """
    if not spdx_id and statement is not None:
        ok = statement_allowed(statement, allow)
        return (True, None) if ok else (False, "rights_statement_not_allowed")
    if not spdx_id:
        return (True, None) if allow_unknown else (False, "licence_unknown")
    return _spdx_allowed(spdx_id, tuple(allow), allow_unknown)


@lru_cache(maxsize=4096)  # a run asks about the same few ids with the same allowlist
def _spdx_allowed(spdx_id: str, allow: tuple[str, ...], allow_unknown: bool,
                  ) -> tuple[bool, str | None]:
    """:func:`licence_allowed` for an SPDX id (pure: parsed and decided once per id)."""
    try:
        expr = _licensing().parse(spdx_id, validate=False)
    except Exception:
        expr = None
    if expr is None:
        return (True, None) if allow_unknown else (False, "licence_unknown")
    allowed = {(_known(a) or a).lower() for a in allow if not a.startswith(ALLOW_PREFIX)}
    if _evaluate(expr, allowed):
        return True, None
    if _licensing().unknown_license_keys(expr):
        # An id outside the SPDX index might be acceptable; it is unknown, not refused.
        return (True, None) if allow_unknown else (False, "licence_unknown")
    return False, "licence_not_allowed"


def licence_detail(raw: str | None, url: str | None, spdx_id: str | None) -> str:
    """Why an item's licence kept it out, in words: "no licence given", "licence 'All rights
    reserved' could not be recognised", "licence 'CC BY-NC 4.0' is CC-BY-NC-4.0, not in the
    allowlist" (the allowlist is recipe.toml's [licences] allow)."""
    given = raw or url
    if not given:
        return "no licence given (neither a licence text nor a licence URL)"
    if spdx_id:
        return f"licence {given!r} is {spdx_id}, not in the allowlist ([licences] allow)"
    return (f"licence {given!r} could not be recognised; add its SPDX id to [licences] allow "
            "or set allow_unknown = true if you accept it")


# --- conditions and deed URLs ------------------------------------------------------------------
_PD_IDS = {"CC0-1.0", "CC-PDM-1.0", "CC-PDDC"}
_CC_ID = re.compile(
    r"^CC-(?P<els>(?:BY|SA)(?:-(?:NC|SA|ND))*)-(?P<ver>\d\.\d)(?:-(?P<port>[A-Z]+))?$"
)
_CONDITION = {
    "BY": "attribution required",
    "SA": "share-alike",
    "NC": "non-commercial",
    "ND": "no-derivatives",
}


def licence_conditions(spdx_id: str | None) -> list[str]:
    """Plain-language conditions of a single CC/public-domain licence (for the datasheet)."""
    if not spdx_id:
        return []
    if spdx_id in _PD_IDS:
        return ["public domain"]
    m = _CC_ID.match(spdx_id)
    if not m:
        return []
    out = [_CONDITION[e] for e in m["els"].split("-")]
    if m["port"]:
        out.append(f"jurisdiction port: {m['port']}")
    return out


def licence_deed_url(spdx_id: str | None) -> str | None:
    """The creativecommons.org deed URL for a CC/public-domain SPDX id, else None."""
    if not spdx_id:
        return None
    fixed = {
        "CC0-1.0": "https://creativecommons.org/publicdomain/zero/1.0/",
        "CC-PDM-1.0": "https://creativecommons.org/publicdomain/mark/1.0/",
        "CC-PDDC": "https://creativecommons.org/licenses/publicdomain/",
    }
    if spdx_id in fixed:
        return fixed[spdx_id]
    m = _CC_ID.match(spdx_id)
    if not m:
        return None
    code = m["els"].lower()
    if code == "by-nc-nd" and m["ver"] == "1.0":
        code = "by-nd-nc"  # the 1.0 URL quirk, standards.md section 7
    port = f"{m['port'].lower()}/" if m["port"] else ""
    return f"https://creativecommons.org/licenses/{code}/{m['ver']}/{port}"


# --- embedded rights metadata vs declared licence ------------------------------------------------
_RIGHTS_TEXT_KEYS = (
    "xmp_license", "xmp_web_statement", "xmp_rights", "xmp_usage_terms",
    "exif_copyright", "iptc_copyright",
)  # fmt: skip


def licences_in_text(text: str) -> set[str]:
    """SPDX ids of every CC licence URL or name found inside free text."""
    found: set[str] = set()
    whole, _, _ = _from_text(text) if text.strip() else (None, None, None)
    if whole and " " not in whole:
        found.add(whole)
    return found | _ids_in_text(text)


def _ids_in_text(text: str) -> set[str]:
    """SPDX ids of the CC licence URLs and names inside free text (whole strings aside)."""
    found: set[str] = set()
    for m in _CC_URL_IN_TEXT.finditer(text):
        spdx, _ = _from_url(m.group(0))
        if spdx:
            found.add(spdx)
    for rx, long in ((_LONG_NAME, True), (_SHORT_NAME, False)):
        for m in rx.finditer(text):
            spdx, _ = _name_match(m, long, loose=True)
            if spdx:
                found.add(spdx)
    if _CC0_NAME.search(text):
        found.add("CC0-1.0")  # one version only (SPDX License List)
    for m in _PDM_NAME.finditer(text):
        if m["ver"]:
            found.add("CC-PDM-1.0")
    return found


def rights_conflict(spdx_id: str | None, rights: dict) -> str | None:
    """Describe how embedded rights metadata contradicts the declared licence, or None."""
    if not spdx_id or not rights:
        return None
    problems: list[str] = []
    declared_pd = spdx_id in _PD_IDS
    for key in _RIGHTS_TEXT_KEYS:
        value = rights.get(key)
        if not value:
            continue
        text = str(value)
        ids = licences_in_text(text)
        others = sorted(i for i in ids if i != spdx_id)
        if others and spdx_id not in ids:
            problems.append(f"{key} names {', '.join(others)} but the source declared {spdx_id}")
        if _RESERVED.search(text):
            problems.append(f"{key} says 'All rights reserved' but the source declared {spdx_id}")
    marked = rights.get("xmp_marked")
    # XMP Rights Management: Marked True = rights-managed, False = public domain
    # (standards.md section 6.3).
    if marked is True and declared_pd:
        problems.append(f"xmpRights:Marked=True (rights-managed) but the source declared {spdx_id}")
    if marked is False and not declared_pd:
        problems.append(f"xmpRights:Marked=False (public domain) but the source declared {spdx_id}")
    return "; ".join(problems) or None
