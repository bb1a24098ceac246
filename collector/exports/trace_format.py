"""How ``collector trace`` shows what it found: the provenance record, the folder table, CSV,
JSON, the summary with its cautions, and the ready-to-paste attribution line.

Pure formatting of the records built by :mod:`collector.exports.trace`; no I/O. Text from the
ledger is made safe where it is shown (:mod:`collector.safe_text`).
"""

from __future__ import annotations

import csv
import io
import json
from collections.abc import Iterable
from dataclasses import asdict, dataclass
from typing import TYPE_CHECKING, Any

from collector.checks.likeness import KIND_WORDS
from collector.checks.rights_statements import STATEMENTS
from collector.safe_text import csv_row, shown_name
from collector.storage.ledger_repair import RECOVERED_FLAG

if TYPE_CHECKING:  # trace.py imports this module at run time for attribution_line
    from collector.exports.trace import FileRecord, ItemRecord, TraceResult

__all__ = [
    "CAUTION",
    "CSV_COLUMNS",
    "PERSONAL_CAUTION",
    "TABLE_COLUMNS",
    "TraceSummary",
    "attribution_line",
    "format_record",
    "format_summary",
    "format_table",
    "licence_label",
    "licence_words",
    "recovered_words",
    "summarise",
    "table_row",
    "to_csv",
    "to_json",
]

CAUTION = ("Licence facts are as declared by the sources and recorded in the ledger; "
           "this is not legal advice.")
PERSONAL_CAUTION = ("Some files carry personal data (GPS position, camera serial, owner name); "
                    "images may also show faces or names. Check before publishing.")

_LICENCE_NAMES = {"CC0-1.0": "CC0 1.0", "CC-PDM-1.0": "Public Domain Mark 1.0"}
_PUBLIC_DOMAIN = frozenset({"CC0-1.0", "CC-PDM-1.0", "CC-PDDC"})


def licence_label(spdx_id: str | None) -> str | None:
    """The short name CC uses for a licence (``CC-BY-SA-4.0`` -> ``CC BY-SA 4.0``)."""
    if not spdx_id:
        return None
    if spdx_id in _LICENCE_NAMES:
        return _LICENCE_NAMES[spdx_id]
    parts = spdx_id.split("-")
    if spdx_id.startswith("CC-BY") and len(parts) >= 3:
        # CC-<elements>-<version>[-<port>] (standards.md section 7)
        idx = next((i for i, p in enumerate(parts) if p[:1].isdigit()), None)
        if idx is not None:
            elements = "-".join(parts[1:idx])
            rest = " ".join(parts[idx:])
            return f"CC {elements} {rest}"
    return spdx_id


def attribution_line(item: ItemRecord | None, *, modified: bool = False,
                     copyright_notice: str | None = None) -> str:
    """A ready-to-paste credit line following CC's recommended practice "TASL" (standards.md
    section 8): Title, Author, Source, Licence with a link to its deed; "modified" when the
    file is a changed copy; a copyright notice is kept when the file carried one."""
    if item is None:
        return "No attribution: the file's origin is unknown."
    title = f'"{item.title}"' if item.title else "Untitled image"
    author = f"by {item.creator}" if item.creator else "by an author the source did not name"
    scan = item.scan.local_path if item.scan and item.scan.local_path else None
    local = item.local_path or (f"cut from {scan}" if scan else None)
    source = item.page_url or item.image_url or (
        f"{item.source} ({local})" if local else item.source)
    parts = [f"{title} {author}"]
    if source:
        parts.append(source)
    label = licence_label(item.spdx_id)
    if label:
        deed = item.deed_url or item.licence_url
        verb = "marked with" if item.spdx_id in _PUBLIC_DOMAIN else "licensed under"
        parts.append(f"{verb} {label}" + (f" ({deed})" if deed else ""))
    elif item.rights_statement in STATEMENTS:
        st = STATEMENTS[item.rights_statement or ""]
        parts.append(f"rights statement {st.name} ({st.page_url}): not a licence, read the "
                     "statement before reusing this image")
    else:
        raw = f" (the source said {item.licence_raw!r})" if item.licence_raw else ""
        parts.append(f"licence unknown{raw}: find the licence before reusing this image")
    if copyright_notice:
        parts.append(copyright_notice)
    if modified:
        parts.append("modified")
    return ", ".join(parts)


def licence_words(item: ItemRecord) -> str:
    """What the source gave (its text, else its licence URL) -> the SPDX id it normalises to,
    and the deed to read: never an arrow with nothing before it."""
    given = repr(item.licence_raw) if item.licence_raw else item.licence_url
    statement = STATEMENTS.get(item.rights_statement or "") if not item.spdx_id else None
    spdx = item.spdx_id or (f"rights statement {statement.code} ({statement.name}; not a "
                            "licence)" if statement else "no SPDX id (unknown licence)")
    deed = statement.page_url if statement else item.deed_url or item.licence_url
    link = f" {deed}" if deed and deed != given else ""
    return f"{given} -> {spdx}{link}" if given else f"none given -> {spdx}"


def recovered_words(record: FileRecord) -> str:
    """How a file registered by rebuild-ledger is described."""
    return f"stored, provenance unknown (recovered on {(record.stored_at or '?')[:10]})"


@dataclass(frozen=True)
class TraceSummary:
    """Counts over a set of traced files: the check before training on or publishing them."""

    files: int
    exact: int
    near: int
    untraced: int  # none + unreadable + not_a_file
    outside_allowlist: int
    personal_data: int
    unreadable: int = 0
    not_a_file: int = 0

    def line(self) -> str:
        """The one-line summary."""
        why = ", ".join(p for p in (
            f"{self.unreadable} unreadable" if self.unreadable else "",
            f"{self.not_a_file} not a file" if self.not_a_file else "") if p)
        files = f"{self.files} file" + ("" if self.files == 1 else "s")
        return (f"{files}: {self.exact} exact, {self.near} near, {self.untraced} "
                f"without known provenance{f' ({why})' if why else ''}, "
                f"{self.outside_allowlist} with licences outside "
                f"the allowlist, {self.personal_data} with personal-data flags")


def summarise(results: Iterable[TraceResult]) -> TraceSummary:
    """Count exact, near and untraced files, disallowed licences and personal-data flags."""
    rs = list(results)
    return TraceSummary(
        files=len(rs), exact=sum(r.kind == "exact" for r in rs),
        near=sum(r.kind == "near" for r in rs),
        untraced=sum(r.kind not in ("exact", "near") for r in rs),
        outside_allowlist=sum(r.allowed == "no" for r in rs),
        personal_data=sum(r.personal_data for r in rs),
        unreadable=sum(r.kind == "unreadable" for r in rs),
        not_a_file=sum(r.kind == "not_a_file" for r in rs))


TABLE_COLUMNS = ("file", "match", "distance", "source", "spdx_id", "allowed", "flags",
                 "matched_sha256", "copy_kind", "note")
_SHOWN_COLUMNS = ("file", "match", "distance", "source", "spdx_id", "allowed", "flags",
                  "copy_kind", "note")
# How a near match was made, as the second look found it (collector.checks.likeness).
COPY_KINDS = KIND_WORDS


def table_row(result: TraceResult) -> dict[str, Any]:
    """One row of the folder table / CSV."""
    item = result.item
    best = result.best
    return {
        "file": shown_name(str(result.path)), "match": result.kind,
        "distance": "" if result.distance is None else result.distance,
        "source": (item.source or "") if item else "",
        "spdx_id": (item.spdx_id or "") if item else "",
        "allowed": result.allowed,
        "flags": " ".join([*result.flags, *(["withdrawn"] if best and best.withdrawn else []),
                           *(["set_aside"] if best and best.set_aside else [])]),
        "matched_sha256": best.sha256 if best else "",
        "copy_kind": COPY_KINDS.get(result.near[0].how, "") if result.kind == "near" else "",
        "note": result.note or "",
    }


# The CSV adds what a reuse check needs beside the table: who made it, under which licence
# (as written and as an SPDX id), and the credit line to paste.
CSV_COLUMNS = (*TABLE_COLUMNS, "title", "creator", "licence", "attribution")


def csv_table_row(result: TraceResult) -> dict[str, Any]:
    """One CSV row: the table row plus title, creator, licence and attribution."""
    item = result.item
    return {**table_row(result),
            "title": (item.title or "") if item else "",
            "creator": (item.creator or "") if item else "",
            "licence": (item.licence_raw or item.licence_url or "") if item else "",
            "attribution": result.attribution or ""}


def to_csv(results: Iterable[TraceResult]) -> str:
    """The table as CSV text (RFC 4180 quoting by the csv module)."""
    out = io.StringIO()
    writer = csv.DictWriter(out, fieldnames=CSV_COLUMNS, lineterminator="\n")
    writer.writeheader()
    for r in results:
        writer.writerow(csv_row(csv_table_row(r)))  # OWASP CSV Injection: cells neutralised
    return out.getvalue()


def to_json(results: list[TraceResult]) -> str:
    """Every result with its full provenance record, plus the summary and the caution."""
    data = {
        # a path's undecodable bytes as \xNN, never as a lone surrogate (RFC 8259 §8.2)
        "results": [{**asdict(r), "path": shown_name(r.path), "distance": r.distance}
                    for r in results],
        "summary": asdict(summarise(results)),
        "caution": CAUTION,
    }
    return json.dumps(data, indent=2, default=str)


def format_table(results: list[TraceResult]) -> list[str]:
    """The folder table as aligned plain-text lines."""
    rows = [table_row(r) for r in results]
    cols = _SHOWN_COLUMNS
    cells = [[str(row[c]) if row[c] != "" else "-" for c in cols] for row in rows]
    widths = [max([len(c)] + [len(line[i]) for line in cells]) for i, c in enumerate(cols)]
    lines = ["  ".join(c.ljust(w) for c, w in zip(cols, widths, strict=True)).rstrip()]
    lines += ["  ".join(v.ljust(w) for v, w in zip(line, widths, strict=True)).rstrip()
              for line in cells]
    return lines


def _size_words(req: dict[str, Any]) -> str:
    """How the image's size was chosen: the size asked for, of which full size, and why."""
    def dims(value: Any) -> str:
        return "x".join(str(v) for v in value) if isinstance(value, list) else "?"
    if "size" not in req:
        return str(req.get("why", "?"))
    return (f"asked {req['size']} ({dims(req.get('asked_size'))}) of "
            f"{dims(req.get('full_size'))} from {req.get('service', '?')}: {req.get('why', '?')}")



def _copy_words(how: str) -> str:
    return f"a {COPY_KINDS.get(how, 'resized/re-encoded')} copy"


def _turn_words(how: str) -> str:
    """Which turn the second look found, in words ("turned 90 degrees counter-clockwise")."""
    if how.startswith("rotate"):
        degrees = how[6:].split("+", 1)[0]
        return (f" (turned {degrees} degrees counter-clockwise"
                + (", then mirrored)" if how.endswith("+mirror") else ")"))
    return ""


def _item_lines(item: ItemRecord, indent: str = "  ") -> list[str]:
    lines = [f"{indent}source:       {item.source or '?'} ({item.source_kind or '?'}), "
             f"item #{item.item_id} {item.source_key!r}, state {item.state}"]
    for label, value in (("title", item.title), ("creator", item.creator),
                         ("item page", item.page_url), ("image URL", item.image_url),
                         ("local file", item.local_path), ("date", item.date)):
        if value:
            lines.append(f"{indent}{label + ':':<13} {value}")
    lines.append(f"{indent}licence:      {licence_words(item)}")
    if item.not_unicode:
        lines.append(f"{indent}listed text:  {', '.join(item.not_unicode)} held text that is not "
                     "valid Unicode; kept with U+FFFD in its place")
    if item.size_request:
        lines.append(f"{indent}image size:   {_size_words(item.size_request)}")
    if item.fetch:
        f = item.fetch
        extra = ", ".join(p for p in (
            f"ETag {f.etag}" if f.etag else None,
            f"Last-Modified {f.last_modified}" if f.last_modified else None) if p)
        robots = f.robots_verdict or "not recorded"
        if f.robots_rule:
            robots += f" ({f.robots_rule})"
        lines.append(f"{indent}fetched at:   {f.fetched_at} HTTP {f.status}"
                     + (f", {extra}" if extra else "") + f"; robots.txt: {robots}")
    if item.reservation_checks:
        lines.append(f"{indent}reservations: {item.reservation_checks}")
    elif item.fetch or item.local_path:
        lines.append(f"{indent}reservations: not checked (gathered before collector read "
                     "reservations against text-and-data mining)")
    if item.run_id is not None:
        lines.append(f"{indent}run:          #{item.run_id}")
    if item.parent_sha256:
        box = item.crop_box or []
        box_text = (f"x={box[0]} y={box[1]} w={box[2]} h={box[3]}" if len(box) == 4
                    else "box not recorded")
        scan = item.scan
        where = f" ({scan.local_path or scan.source_key})" if scan else ""
        lines.append(f"{indent}cut from:     scan {item.parent_sha256[:12]}{where}, {box_text}")
    if item.near_of is not None:
        lines.append(f"{indent}ledger note:  stored as a near duplicate of item #{item.near_of}"
                     f" (distance {item.near_distance})")
    return lines


def _file_lines(record: FileRecord) -> list[str]:
    size = f"{record.size:,} bytes" if record.size is not None else "size ?"
    lines = [f"  stored file:  {record.sha256[:12]} ({record.format or '?'} "
             f"{record.width}×{record.height}, {size}, stored {record.stored_at})"]
    if record.origin:
        lines += _item_lines(record.origin)
    elif RECOVERED_FLAG in record.flags:
        lines.append(f"  provenance:   {recovered_words(record)}; no source, item or licence "
                     "is recorded")
    lines.append(f"  flags:        {', '.join(record.flags) if record.flags else 'none'}")
    if record.withdrawn:
        lines.append(f"  withdrawn:    {record.withdrawn}; left out of every release")
    if record.set_aside:
        lines.append(f"  set aside:    {record.set_aside}; kept in the store, left out of "
                     "releases")
    for other in record.others:
        where = other.page_url or other.image_url or other.local_path or other.source_key
        lines.append(f"  also from:    item #{other.item_id} ({other.source or '?'}, "
                     f"{other.state}) {where}")
    return lines


def format_record(result: TraceResult) -> list[str]:
    """The full human-readable provenance record of one traced file."""
    shown = shown_name(str(result.path))
    if result.kind == "exact" and result.file:
        lines = [f"{shown}: exact match (same bytes, sha256 {result.sha256})"]
        lines += _file_lines(result.file)
    elif result.kind == "near":
        best = result.near[0]
        score = f", thumbnails agree at {best.score:.2f}" if best.score is not None else ""
        lines = [f"{shown}: probably {_copy_words(best.how)} of "
                 f"{best.file.sha256[:12]}{_turn_words(best.how)} (pHash distance "
                 f"{best.distance} of 64 bits, threshold {result.threshold}{score}); not the "
                 "same bytes, so not certain"]
        lines += _file_lines(best.file)
        for other in result.near[1:]:
            lines.append(f"  also close:   {other.file.sha256[:12]} distance {other.distance}"
                         f" ({COPY_KINDS.get(other.how, other.how)})")
    elif result.kind in ("unreadable", "not_a_file"):
        what = "unreadable" if result.kind == "unreadable" else "not a file"
        return [f"{shown}: {what}: {result.note}. Not traced."]
    else:
        why = f" ({result.note})" if result.note else (
            f": no stored file has these bytes, and none is within {result.threshold} bits "
            "of its perceptual hash")
        return [f"{shown}: no match{why}. Its provenance is unknown to this collection."]
    lines.append(f"  allowed:      {result.allowed} (the recipe's licence allowlist)")
    lines.append(f"  attribution:  {result.attribution}")
    return lines


def format_summary(results: list[TraceResult]) -> list[str]:
    """The summary line and the cautions that go with it."""
    summary = summarise(results)
    lines = [summary.line(), CAUTION]
    if summary.personal_data:
        lines.append(PERSONAL_CAUTION)
    return lines
