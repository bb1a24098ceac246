"""Partial releases: which stored files a release holds, and the readable names they get.

A selection is a list of conditions, all of which a file must meet (``--only``, repeatable):

    source=NAME[,NAME...]        the source's name in the recipe
    licence=SPDX[,SPDX...]       the decided SPDX id ("unknown" for none)
    creator=TEXT                 the creator contains TEXT (case-insensitive)
    state=stored|near_duplicate  the item's state
    date=FROM..TO                the item's own date (ISO 8601 text, either end may be empty)
    stored=FROM..TO              the day the file was stored (ISO 8601, either end may be empty)

and optionally a file of SHA-256s (``--sha256-file``: one hex digest per line, ``#`` starts
a comment). By default a release also leaves out: withdrawn files (always), whole scanner beds
whose crops are released (the crops stand for them), and blank scans (a scanner bed where no
item was found, or a file flagged ``blank``). Every file left out is counted under its reason
(:data:`EXCLUSION_REASONS`) for the datasheet.

Released files are named ``<source>-<source key>-<short hash>.<ext>``
(:func:`readable_name`), with characters that some file system refuses replaced, so the names
are valid on Linux, macOS and Windows alike; provenance.csv maps each name to its sha256.
"""

from __future__ import annotations

import functools
import json
import re
import unicodedata
from collections.abc import Iterator
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from collector.errors import CollectionError

FIELDS = ("source", "licence", "creator", "state", "date", "stored")
EXCLUSION_REASONS = {
    "withdrawn": "withdrawn",
    "whole_scan": "whole scanner beds whose crops are released",
    "blank_scan": "blank scans",
    "not_selected": "not in the selection",
}
BLANK_FLAG = "blank"  # the flag a flat, empty image may carry (images checks)

# Microsoft Learn, "Naming Files, Paths, and Namespaces": reserved device names (also with
# any extension), the characters < > : " / \ | ? * and 0-31, and no trailing dot or space.
WINDOWS_RESERVED = frozenset(
    {"CON", "PRN", "AUX", "NUL"} | {f"COM{n}" for n in range(1, 10)}
    | {f"LPT{n}" for n in range(1, 10)})
_UNSAFE = re.compile(r"[^A-Za-z0-9_-]+")  # dots too: one dot, before the extension
NAME_PART_MAX = 60  # per part; a whole name stays far below 255 bytes (ext4, NTFS, APFS)
SHORT_HASH = 12


def _part(text: str | None, fallback: str) -> str:
    """One part of a file name: ASCII letters, digits, '_' and '-' only (accents dropped by
    Unicode NFKD decomposition), runs of anything else as one '_', at most NAME_PART_MAX."""
    plain = text or ""
    if not plain.isascii():  # most keys are ASCII already: no decomposition needed
        plain = unicodedata.normalize("NFKD", plain).encode("ascii", "ignore").decode()
    cleaned = _UNSAFE.sub("_", plain).strip("_-")[:NAME_PART_MAX].strip("_-")
    return cleaned or fallback


_few_part = functools.lru_cache(maxsize=256)(_part)  # sources and extensions repeat


def readable_name(source: str | None, key: str | None, sha256: str, ext: str) -> str:
    """``<source>-<source key>-<short hash>.<ext>``, safe on every common file system."""
    stem = f"{_few_part(source, 'source')}-{_part(key, 'item')}-{sha256[:SHORT_HASH]}"
    if stem.split(".", 1)[0].upper() in WINDOWS_RESERVED:  # unreachable by shape; kept as a rule
        stem = "_" + stem
    extension = _few_part(ext, "bin").lower()
    return f"{stem}.{extension}"


@dataclass
class Selection:
    """What a release holds: conditions (all must hold), a set of SHA-256s, the defaults."""

    conditions: dict[str, list[str]] = field(default_factory=dict)
    sha256s: frozenset[str] | None = None
    keep_whole_scans: bool = False
    keep_blank_scans: bool = False

    def describe(self) -> list[str]:
        """The selection in words, for the datasheet."""
        words = [f"{name} = {' or '.join(values)}" for name, values in self.conditions.items()]
        if self.sha256s is not None:
            words.append(f"sha256 in a list of {len(self.sha256s)}")
        return words


def parse_selection(only: list[str], sha256_file: Path | None = None, *,
                    keep_whole_scans: bool = False, keep_blank_scans: bool = False
                    ) -> Selection:
    """The selection from ``--only`` conditions and a SHA-256 file; every problem at once."""
    conditions: dict[str, list[str]] = {}
    problems = []
    for text in only:
        name, sep, value = text.partition("=")
        name = name.strip().lower().replace("license", "licence")
        values = [v.strip() for v in value.split(",") if v.strip()]
        if not sep or name not in FIELDS or not values:
            problems.append(f"{text!r}: write NAME=VALUE with NAME one of {', '.join(FIELDS)}")
        elif name in ("date", "stored") and (len(values) != 1 or ".." not in values[0]):
            problems.append(f"{text!r}: write {name}=FROM..TO (either end may be empty)")
        else:
            conditions.setdefault(name, []).extend(values)
    sha256s = _read_sha256s(sha256_file, problems) if sha256_file is not None else None
    if problems:
        raise CollectionError("the release selection has problems:\n  - "
                              + "\n  - ".join(problems))
    return Selection(conditions, sha256s, keep_whole_scans, keep_blank_scans)


def _read_sha256s(path: Path, problems: list[str]) -> frozenset[str] | None:
    try:
        lines = path.read_text(encoding="utf-8").splitlines()
    except (OSError, UnicodeDecodeError) as exc:
        problems.append(f"--sha256-file {path}: cannot be read ({exc})")
        return None
    found = set()
    for number, line in enumerate(lines, start=1):
        text = line.split("#", 1)[0].strip().lower()
        if not text:
            continue
        if not re.fullmatch(r"[0-9a-f]{64}", text):
            problems.append(f"{path}:{number}: {line.strip()!r} is not a SHA-256 (64 hex digits)")
        found.add(text)
    return frozenset(found)


def _in_range(value: str | None, span: str) -> bool:
    low, _, high = span.partition("..")
    if not value:
        return False
    return (not low or value[:len(low)] >= low) and (not high or value[:len(high)] <= high)


def _matches(sel: Selection, row: dict[str, Any]) -> bool:
    """Whether a release row meets every condition of the selection."""
    c = sel.conditions
    if not c:
        return sel.sha256s is None or row["sha256"] in sel.sha256s
    checks = (
        ("source", lambda vs: row["source"] in vs),
        ("licence", lambda vs: (row["spdx_id"] or "unknown") in vs),
        ("creator", lambda vs: any(v.lower() in (row["creator"] or "").lower() for v in vs)),
        ("state", lambda vs: row["_state"] in vs),
        ("date", lambda vs: _in_range(row["_date"], vs[0])),
        ("stored", lambda vs: _in_range(row["_stored_at"], vs[0])),
    )
    if any(name in c and not test(c[name]) for name, test in checks):
        return False
    return sel.sha256s is None or row["sha256"] in sel.sha256s


def is_blank_scan(row: dict[str, Any]) -> bool:
    """A scanner bed where the splitter found no item, or a file flagged blank."""
    meta = row["_metadata"]
    if BLANK_FLAG in row["flags"] and BLANK_FLAG in row["flags"].split(";"):
        return True
    return bool(meta) and meta.get("role") == "scan" and meta.get("items") == 0


def select(rows: Iterator[dict[str, Any]], sel: Selection, withdrawn: set[str],
           excluded: dict[str, int]) -> Iterator[dict[str, Any]]:
    """The rows a release holds, with ``excluded`` counting the others by reason. Whole
    scans are held back until every crop is seen (scans are few), then released only when
    none of their crops was."""
    scans: list[dict[str, Any]] = []
    crop_parents: set[str] = set()
    for row in rows:
        reason = _exclusion(row, sel, withdrawn)
        if reason is not None:
            excluded[reason] = excluded.get(reason, 0) + 1
            continue
        meta = row["_metadata"]
        if meta and meta.get("role") == "scan" and not sel.keep_whole_scans:
            scans.append(row)
            continue
        if row["_parent_sha256"]:
            crop_parents.add(row["_parent_sha256"])
        yield row
    for row in scans:
        if row["sha256"] in crop_parents:
            excluded["whole_scan"] = excluded.get("whole_scan", 0) + 1
        else:
            yield row


def _exclusion(row: dict[str, Any], sel: Selection, withdrawn: set[str]) -> str | None:
    if row["sha256"] in withdrawn:
        return "withdrawn"
    if not sel.keep_blank_scans and is_blank_scan(row):
        return "blank_scan"
    if not _matches(sel, row):
        return "not_selected"
    return None


def metadata_of(text: str | None) -> dict[str, Any]:
    """An item's metadata column as a dict (empty when absent or not JSON). Only a role
    (scan or crop) is asked of it, so text without one is not parsed (large releases)."""
    if not text or '"role"' not in text:
        return {}
    try:
        value = json.loads(text) if text else {}
    except ValueError:
        return {}
    return value if isinstance(value, dict) else {}
