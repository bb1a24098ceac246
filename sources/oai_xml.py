"""Reading OAI-PMH 2.0 answers: the envelope, Identify, records, resumption tokens, errors,
and the small namespaced path syntax that maps metadata fields. Pure functions, no I/O; no
``KIND`` here (the kind is :mod:`sources.oai_pmh`).

XML is parsed with defusedxml with DTDs refused: an OAI-PMH answer never needs one (its
schema is XML Schema, OAI-PMH 2.0 §2.2), and a DTD is how entity-expansion bombs and
external entities arrive.

Field paths are ElementTree paths (the ``ElementPath`` subset of XPath the standard library
documents) whose prefixes the recipe declares, optionally ending in ``/@name`` or
``/@prefix:name`` for an attribute, e.g. ``mods:location/mods:url[@usage='primary']`` or
``dc:identifier``. They start at the metadata format's root element (``oai_dc:dc`` for
``oai_dc``).
"""

from __future__ import annotations

import re
from dataclasses import dataclass, field
from typing import Any
from xml.etree.ElementTree import Element, ParseError

from defusedxml import DefusedXmlException
from defusedxml.ElementTree import fromstring

# OAI-PMH 2.0 §2.1 (namespace of the protocol's own elements) and the oai_dc schema
# (http://www.openarchives.org/OAI/2.0/oai_dc.xsd: dc elements from DCMES 1.1).
OAI_NS = "http://www.openarchives.org/OAI/2.0/"
OAI_DC_NS = "http://www.openarchives.org/OAI/2.0/oai_dc/"
DC_NS = "http://purl.org/dc/elements/1.1/"
OAI_DC_NAMESPACES = {"oai_dc": OAI_DC_NS, "dc": DC_NS}
# OAI-PMH 2.0 §3.6: the error codes a repository may answer with.
ERROR_CODES = frozenset({"badArgument", "badResumptionToken", "badVerb",
                         "cannotDisseminateFormat", "idDoesNotExist", "noRecordsMatch",
                         "noMetadataFormats", "noSetHierarchy"})
# OAI-PMH 2.0 §3.3.2 / §4.2: the two granularities a repository may support.
DAY, SECONDS = "YYYY-MM-DD", "YYYY-MM-DDThh:mm:ssZ"
_NAME = re.compile(r"^(?:[A-Za-z_][\w.-]*:)?[A-Za-z_][\w.-]*$")


class NotOai(ValueError):
    """The answer is not a readable OAI-PMH 2.0 response; the message says why."""


@dataclass(frozen=True)
class OaiError:
    """One <error code="..."> of a response (OAI-PMH 2.0 §3.6)."""

    code: str
    message: str


@dataclass(frozen=True)
class Record:
    """One <record>: its header (§2.5) and the metadata format's root element."""

    identifier: str
    datestamp: str
    deleted: bool
    sets: tuple[str, ...]
    metadata: Element | None


@dataclass(frozen=True)
class Token:
    """A <resumptionToken> (§3.5): an empty value ends the list."""

    value: str
    complete_list_size: int | None = None
    cursor: int | None = None
    expiration: str | None = None


@dataclass
class Answer:
    """One OAI-PMH response, read."""

    response_date: str
    errors: list[OaiError] = field(default_factory=list)
    records: list[Record] = field(default_factory=list)
    token: Token | None = None
    identify: dict[str, str] = field(default_factory=dict)


def _q(name: str) -> str:
    return f"{{{OAI_NS}}}{name}"


def _text(el: Element | None) -> str:
    return "".join(el.itertext()).strip() if el is not None else ""


def _int(value: str | None) -> int | None:
    try:
        return int(value) if value is not None else None
    except ValueError:
        return None


def parse_answer(body: bytes) -> Answer:
    """Read one response body; NotOai when it is not well-formed, declares a DTD or entities
    or an encoding the parser cannot read (UTF-7, UTF-32, Shift_JIS, an unknown name), or is
    not in the OAI-PMH 2.0 namespace."""
    try:
        root = fromstring(body, forbid_dtd=True)
    except DefusedXmlException as exc:
        raise NotOai(f"refused: the answer declares a DTD or XML entities "
                     f"({type(exc).__name__}); OAI-PMH answers never need them") from exc
    except ParseError as exc:
        raise NotOai(f"the answer is not well-formed XML ({exc})") from exc
    except (ValueError, LookupError) as exc:  # expat: "multi-byte encodings are not supported"
        raise NotOai(f"the answer declares an encoding the XML parser cannot read ({exc}); "
                     "OAI-PMH 2.0 answers are UTF-8 (§3.1.2.1)") from exc
    if root.tag != _q("OAI-PMH"):
        raise NotOai(f"the answer's root element is {root.tag!r}, not OAI-PMH in the "
                     f"namespace {OAI_NS} (OAI-PMH 2.0 §3.2); is the url the repository's "
                     "base URL?")
    answer = Answer(response_date=_text(root.find(_q("responseDate"))))
    for err in root.findall(_q("error")):
        answer.errors.append(OaiError(err.get("code", ""), _text(err)))
    identify = root.find(_q("Identify"))
    if identify is not None:
        answer.identify = {child.tag.removeprefix(f"{{{OAI_NS}}}"): _text(child)
                           for child in identify if isinstance(child.tag, str)}
    listing = root.find(_q("ListRecords"))
    if listing is not None:
        answer.records = [_record(r) for r in listing.findall(_q("record"))]
        tok = listing.find(_q("resumptionToken"))
        if tok is not None:
            answer.token = Token(_text(tok), _int(tok.get("completeListSize")),
                                 _int(tok.get("cursor")), tok.get("expirationDate"))
    return answer


def _record(el: Element) -> Record:
    header = el.find(_q("header"))
    if header is None:
        return Record("", "", False, (), None)
    metadata = el.find(_q("metadata"))
    root = (next((c for c in metadata if isinstance(c.tag, str)), None)
            if metadata is not None else None)
    return Record(
        identifier=_text(header.find(_q("identifier"))),
        datestamp=_text(header.find(_q("datestamp"))),
        # §2.5: status="deleted" is the only status value the protocol defines
        deleted=header.get("status") == "deleted",
        sets=tuple(_text(s) for s in header.findall(_q("setSpec"))),
        metadata=root,
    )


def harvest_from(response_date: str, granularity: str) -> str:
    """The ``from`` argument for the next harvest: a previous ``responseDate`` (always
    seconds in UTC, §3.2) cut to the repository's granularity (§3.3.2: finer than supported
    is badArgument)."""
    return response_date[:10] if granularity == DAY else response_date


# ---------------------------------------------------------------------------------------------
# Field paths


@dataclass(frozen=True)
class FieldPath:
    """A compiled field path: an ElementPath and an optional attribute (Clark notation)."""

    text: str
    path: str
    attribute: str | None


def compile_path(text: str, namespaces: dict[str, str]) -> FieldPath:
    """Compile ``text`` (see the module docstring); ValueError says what is wrong."""
    path, _, attr = text.rpartition("/@") if "/@" in text else (text, "", "")
    if text.startswith("@"):
        path, attr = ".", text[1:]
    attribute = None
    if attr:
        if not _NAME.match(attr):
            raise ValueError(f'"@{attr}" is not an attribute name')
        prefix, _, local = attr.rpartition(":")
        if prefix and prefix not in namespaces:
            raise ValueError(f'the prefix "{prefix}" is not declared in namespaces')
        attribute = f"{{{namespaces[prefix]}}}{local}" if prefix else local
    if path.startswith("/"):
        raise ValueError("starts at the format's root element; leave off the leading /")
    try:
        Element("probe").findall(path, namespaces)
    except (SyntaxError, KeyError, TypeError) as exc:  # TypeError: e.g. an unclosed "[@"
        raise ValueError(f"is not a valid path ({exc or type(exc).__name__})") from exc
    return FieldPath(text, path, attribute)


def path_values(root: Element, fp: FieldPath, namespaces: dict[str, str]) -> list[str]:
    """Every non-empty value the path finds under ``root``, in document order."""
    found: list[Any] = root.findall(fp.path, namespaces)
    if fp.attribute is not None:
        values = [el.get(fp.attribute) or "" for el in found]
    else:
        values = [_text(el) for el in found]
    return [v.strip() for v in values if v and v.strip()]
