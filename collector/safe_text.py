"""Untrusted text made safe for where it is shown: terminals and spreadsheets.

Titles, creators, licence texts, URLs and error messages come from archives' servers and from
files. Shown raw, an escape sequence can move the cursor, erase lines or retitle the terminal
(ECMA-48 §5: C0 and C1 control functions; ESC starts every control sequence), and a bidi
override can make text read backwards (Unicode TR 9 §2, explicit directional formatting
characters). In a spreadsheet, a cell that starts with ``=``, ``+``, ``-``, ``@``, a tab or a
carriage return is run as a formula (OWASP "CSV Injection": prefix such cells with a single
quote). The pages and CSV files collector writes show control characters as escapes
(:func:`for_document`, :func:`csv_cell`). The ledger keeps the raw text; only what is shown or
exported is changed.

One change is made where text enters collector, before anything keeps it: a surrogate code
point (U+D800..U+DFFF) is no Unicode scalar value, so no UTF can encode it (Unicode 15.0
§3.9 D76 and D92; RFC 3629 §3), yet JSON's ``"\\ud800"`` escape makes one (RFC 8259 §8.2:
such strings are allowed, their behaviour unpredictable). :func:`valid_unicode` replaces each
with U+FFFD REPLACEMENT CHARACTER, so the ledger (UTF-8), the exports and the terminal never
meet one.
"""

from __future__ import annotations

import json
import re
from typing import Any

# DEL, C1 controls, and the directional formatting characters of Unicode TR 9 (ALM, LRM, RLM,
# LRE..RLO, LRI..PDI); with the C0 controls, all of them, or all but the line feed.
_DEL_C1_BIDI = "\x7f-\x9f\u061c\u200e\u200f\u202a-\u202e\u2066-\u2069"
_UNSAFE_ANY = re.compile(f"[\x00-\x1f{_DEL_C1_BIDI}]")
_UNSAFE_BUT_NEWLINE = re.compile(f"[\x00-\x09\x0b-\x1f{_DEL_C1_BIDI}]")
# In a page collector writes (HTML, inline SVG, Markdown): the C0 controls but TAB, LF and CR,
# which XML 1.0 §2.2 leaves out of Char, with DEL and the C1 controls, which an HTML parser
# reports as control-character-in-input-stream (HTML Standard §13.2.3.5); U+0000 it even
# drops from text (§13.2.6.4.7, "in body"), and CommonMark §2.3 turns it into U+FFFD.
_NOT_IN_DOCUMENTS = re.compile("[\x00-\x08\x0b\x0c\x0e-\x1f\x7f-\x9f]")
# OWASP CSV Injection: the characters that make a spreadsheet read a cell as a formula.
FORMULA_STARTS = ("=", "+", "-", "@", "\t", "\r")
# Surrogate code points: in a Python str they are never part of valid Unicode text (a JSON
# surrogate pair is decoded to the one character it encodes).
_SURROGATE = re.compile("[\ud800-\udfff]")
REPLACEMENT = "\ufffd"


# The key, in an item's metadata, naming the fields that held text that was not valid
# Unicode (written where candidates enter: sources.base.valid_candidate; shown by trace).
NOT_UNICODE = "invalid_unicode"


def valid_unicode(value: Any) -> tuple[Any, bool]:
    """``value`` with every surrogate code point replaced by U+FFFD, and whether there was one.

    Strings are cleaned; lists, tuples and dicts (keys too) are cleaned through their JSON
    form, which is what the ledger keeps of them (tuples come back as lists; two keys that
    differ only in their surrogates both stay, the later one numbered: ``"a\ufffd (2)"``);
    other values are returned as they are.
    """
    if isinstance(value, str):
        if _SURROGATE.search(value) is None:
            return value, False
        return _SURROGATE.sub(REPLACEMENT, value), True
    if not isinstance(value, list | tuple | dict):
        return value, False
    text = json.dumps(value, ensure_ascii=False, default=str)
    if _SURROGATE.search(text) is None:
        return value, False
    return json.loads(_SURROGATE.sub(REPLACEMENT, text), object_pairs_hook=_every_key), True


def escaped_surrogates(text: str) -> tuple[str, bool]:
    """``text`` with every surrogate code point written as its escape (``\\ud800``), and
    whether there was one: for identifiers, which must stay distinct and the same from run to
    run (two ids differing only in their surrogates would be one id with U+FFFD)."""
    if _SURROGATE.search(text) is None:
        return text, False
    return _SURROGATE.sub(lambda m: f"\\u{ord(m.group()):04x}", text), True


def _every_key(pairs: list[tuple[str, Any]]) -> dict[str, Any]:
    """A JSON object whose repeated keys (made alike by the replacement) are all kept."""
    out: dict[str, Any] = {}
    for key, value in pairs:
        name, n = key, 1
        while name in out:
            n += 1
            name = f"{key} ({n})"
        out[name] = value
    return out


def _escaped(match: re.Match[str]) -> str:
    code = ord(match.group())
    return f"\\x{code:02x}" if code < 0x100 else f"\\u{code:04x}"


def one_line(text: Any) -> str:
    """``text`` with every control and bidi character shown as an escape (``\\x1b``,
    ``\\u202e``), newlines included: for a value inside one line of output."""
    return _UNSAFE_ANY.sub(_escaped, str(text))


def for_terminal(text: Any) -> str:
    """Like :func:`one_line` but keeps line breaks: for a paragraph of output."""
    return _UNSAFE_BUT_NEWLINE.sub(_escaped, str(text))


def for_document(text: Any) -> str:
    """``text`` for an HTML, SVG or Markdown page: control characters shown as escapes
    (``\\x00``), so no parser drops or refuses them; tabs and line breaks kept."""
    return _NOT_IN_DOCUMENTS.sub(_escaped, str(text))


def document_value(value: Any) -> Any:
    """A value put into an HTML page by a template (Jinja2's ``finalize``): text through
    :func:`for_document`; markup (it has ``__html__``) and other values as they are."""
    if isinstance(value, str) and not hasattr(value, "__html__"):
        return for_document(value)
    return value


def shown_name(text: str) -> str:
    """A file name or path as text that can be shown and stored: bytes that are not UTF-8
    (kept by Python as surrogate escapes, PEP 383) appear as ``\\xNN``."""
    return text.encode("utf-8", "surrogateescape").decode("utf-8", "backslashreplace")


def csv_cell(value: Any) -> Any:
    """A CSV cell as collector writes it: text gets the page rule of :func:`for_document`,
    then, when it starts with ``=``, ``+``, ``-``, ``@``, tab or CR, a leading ``'`` (OWASP
    CSV Injection); numbers and None are returned as they are.

    Escaped (``\\x00``, ``\\x85``): the C0 controls but TAB, LF and CR, DEL and the C1
    controls, as in the datasheet and the review sheet, so a text reads the same in every file
    collector writes. RFC 4180 §2 has no place for them (its TEXTDATA is printable ASCII, CR and
    LF stand only inside a quoted field, rule 6), and a spreadsheet may cut a cell at a NUL
    (both from memory); NEL (U+0085), FF, VT and U+001C..U+001E end a line for Python's
    ``str.splitlines`` (Python docs, str.splitlines). Kept raw: TAB, and line breaks, which
    the csv module quotes (RFC 4180 §2 rule 6), so a title of two lines reads back from the
    csv module as the ledger holds it. An escape is shown, not undone: a title that spells
    ``\\x00`` itself reads the same as one that held a NUL (the ledger keeps which)."""
    if isinstance(value, str):
        if not value.isprintable():  # a control character is never printable (category Cc)
            value = for_document(value)
        if value.startswith(FORMULA_STARTS):
            return "'" + value
    return value


def csv_row(row: dict[str, Any]) -> dict[str, Any]:
    """Every cell of a CSV row passed through :func:`csv_cell`."""
    return {key: csv_cell(value) for key, value in row.items()}
