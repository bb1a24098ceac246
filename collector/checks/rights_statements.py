"""RightsStatements.org statements: recognised from their URIs and English names.

The twelve statements of the RightsStatements.org vocabulary (version 1.0) say what is known
about an item's copyright status; they are not licences and have no SPDX ids, so they are kept
apart from the SPDX reading (the ledger's ``rights_statement`` column) and an allowlist names
them as ``rs:<id>`` (``rs:NoC-US``). No statement is allowed by default, and an ``InC*``
statement (in copyright) only when the recipe names it exactly. Reading a statement is not legal
advice: it repeats what the source declared.

URI forms (RightsStatements.org, "Statements" and "Implementation" pages): the machine URI is
``http://rightsstatements.org/vocab/<id>/1.0/``; the human page is
``http://rightsstatements.org/page/<id>/1.0/?language=en``. Both are accepted with http or
https, with or without the trailing slash, with query strings (``?language=de``) and fragments.
"""

from __future__ import annotations

import re
from dataclasses import dataclass

__all__ = [
    "ALLOW_PREFIX",
    "STATEMENTS",
    "RightsStatement",
    "allow_entry_problem",
    "find_statement",
    "statement_allowed",
]

ALLOW_PREFIX = "rs:"


@dataclass(frozen=True)
class RightsStatement:
    """One RightsStatements.org statement."""

    code: str
    name: str

    @property
    def vocab_url(self) -> str:
        """The statement's machine URI (what an archive should write)."""
        return f"http://rightsstatements.org/vocab/{self.code}/1.0/"

    @property
    def page_url(self) -> str:
        """The statement's human-readable page, for links in trace and the datasheet."""
        return f"http://rightsstatements.org/page/{self.code}/1.0/?language=en"

    @property
    def in_copyright(self) -> bool:
        """Whether the statement says the item is in copyright (the InC family)."""
        return self.code.startswith("InC")


# The twelve statements and their English names (rightsstatements.org/page/<id>/1.0/).
STATEMENTS: dict[str, RightsStatement] = {s.code: s for s in (
    RightsStatement("InC", "In Copyright"),
    RightsStatement("InC-OW-EU", "In Copyright - EU Orphan Work"),
    RightsStatement("InC-EDU", "In Copyright - Educational Use Permitted"),
    RightsStatement("InC-NC", "In Copyright - Non-Commercial Use Permitted"),
    RightsStatement("InC-RUU", "In Copyright - Rights-holder(s) Unlocatable or Unidentifiable"),
    RightsStatement("NoC-CR", "No Copyright - Contractual Restrictions"),
    RightsStatement("NoC-NC", "No Copyright - Non-Commercial Use Only"),
    RightsStatement("NoC-OKLR", "No Copyright - Other Known Legal Restrictions"),
    RightsStatement("NoC-US", "No Copyright - United States"),
    RightsStatement("CNE", "Copyright Not Evaluated"),
    RightsStatement("UND", "Copyright Undetermined"),
    RightsStatement("NKC", "No Known Copyright"),
)}

_BY_LOWER = {code.lower(): s for code, s in STATEMENTS.items()}
_URI = re.compile(
    r"^\s*(?:https?:)?//(?:www\.)?rightsstatements\.org/(?:vocab|page)/"
    r"(?P<code>[A-Za-z-]+)/(?P<ver>\d\.\d)/?(?:[?#].*)?\s*$", re.I)
_URI_IN_TEXT = re.compile(
    r"(?:https?:)?//(?:www\.)?rightsstatements\.org/(?:vocab|page)/(?P<code>[A-Za-z-]+)/1\.0\b",
    re.I)


def _name_key(text: str) -> str:
    """A name compared without case, dash style or spacing ("In Copyright – EU Orphan Work")."""
    text = re.sub(r"[\u2010-\u2015-]", " ", text.lower())
    return re.sub(r"[^a-z0-9()]+", " ", text).strip()


_BY_NAME = {_name_key(s.name): s for s in STATEMENTS.values()}
# "No known copyright restrictions" is the wording many archives (and Flickr Commons) use for
# NKC; the statement's own name is "No Known Copyright" (issue 15: maps to NKC, not a licence).
_BY_NAME[_name_key("No known copyright restrictions")] = STATEMENTS["NKC"]


def _from_uri(value: str) -> RightsStatement | None:
    m = _URI.match(value)
    if m is None or m["ver"] != "1.0":
        return None
    return _BY_LOWER.get(m["code"].lower())


def find_statement(text: str | None, url: str | None = None) -> RightsStatement | None:
    """The statement a declared rights text and/or URL names, or None.

    A whole-string URI or English name is recognised, and a statement URI inside a sentence;
    a bare code ("InC") is not, since short codes also occur in unrelated text.
    """
    for value in (url, text):
        if not value or not value.strip():
            continue
        found = _from_uri(value) or _BY_NAME.get(_name_key(value))
        if found is None:
            inside = _URI_IN_TEXT.search(value)
            found = _BY_LOWER.get(inside["code"].lower()) if inside else None
        if found is not None:
            return found
    return None


def allow_entry_problem(entry: str) -> str | None:
    """Why an ``rs:`` allowlist entry is wrong, or None when it names a statement."""
    code = entry[len(ALLOW_PREFIX):]
    if code in STATEMENTS:
        return None
    known = ", ".join(f"{ALLOW_PREFIX}{c}" for c in STATEMENTS)
    lower = _BY_LOWER.get(code.lower())
    hint = f' (did you mean "{ALLOW_PREFIX}{lower.code}"?)' if lower else ""
    return f"{entry!r} is not a RightsStatements.org statement{hint}; known: {known}"


def statement_allowed(statement: RightsStatement, allow: list[str] | tuple[str, ...]) -> bool:
    """Whether the allowlist names this statement exactly (``rs:<id>``, case as published).

    There is no wildcard: an in-copyright statement passes only when its own id is listed.
    """
    return f"{ALLOW_PREFIX}{statement.code}" in allow
