"""Local scans adapter: image files in a folder, described by the recipe, optionally split into
the separate items lying on the scanner bed (see sources.splitter)."""

from __future__ import annotations

import errno
import os
import re
import stat
from collections.abc import Callable, Iterator, Mapping
from dataclasses import dataclass
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

from PIL import Image, UnidentifiedImageError

from collector.safe_text import shown_name
from collector.schema import (
    Key,
    Problems,
    at_least,
    between,
    check_str_list,
    check_table,
    date_text,
    http_url,
    not_blank,
)
from collector.sources.base import Candidate, NoteSink, OnceNotes, PageFetcher, SourceKind

DEFAULT_INCLUDE = ("**/*.png", "**/*.jpg", "**/*.jpeg", "**/*.tif", "**/*.tiff", "**/*.webp",
                   "**/*.bmp")

KEYS: dict[str, Key] = {
    "path": Key("str", required=True, check=not_blank,
                hint='the folder of scans, relative to the collection folder, e.g. "scans"'),
    "include": Key("list"),
    "title": Key("str"),
    "creator": Key("str"),
    "licence": Key("str"),
    "licence_url": Key("str", check=http_url),
    "device": Key("str"),
    "date": Key("date"),
    "split": Key("table"),
    "allow_outside_links": Key("bool"),
}


def _check_background(value: Any) -> str | None:
    """The bed as the curator states it: "light", "dark" or a colour "#rrggbb"."""
    if value in ("light", "dark") or re.fullmatch(r"#[0-9A-Fa-f]{6}", str(value)):
        return None
    return f'must be "light", "dark" or a colour written "#rrggbb", got {value!r}'


SPLIT_KEYS: dict[str, Key] = {
    "min_area": Key("int", check=at_least(1)),
    "padding": Key("int", check=at_least(0)),
    "deskew": Key("bool"),
    "threshold": Key("int", check=between(0, 254)),
    "min_solidity": Key("float", check=between(0, 1, open_low=True)),
    "background": Key("str", check=_check_background),
}



# Baseline TIFF / Exif IFD0 tags a scanner writes (standards.md §6.1 for 271, 272, 306; TIFF 6.0
# for 282, 283, 296, 305 — from memory).
SCANNER_TAGS = {271: "Make", 272: "Model", 305: "Software", 306: "DateTime",
                282: "XResolution", 283: "YResolution", 296: "ResolutionUnit"}

_DATE = re.compile(r"^\d{4}(-\d{2}(-\d{2}([T ][0-9:.]+(Z|[+-]\d{2}:?\d{2})?)?)?)?$")


def check(table: Mapping[str, Any], prefix: str, problems: Problems) -> None:
    """The checks inside one scans source table (KEYS are checked first)."""
    include = table.get("include")
    if check_str_list(include, f"{prefix}.include", problems):
        for i, pattern in enumerate(include):
            if pattern.startswith("/") or ".." in Path(pattern).parts:
                problems.add(f"{prefix}.include[{i}]", f'"{pattern}" must be a pattern relative '
                             'to the folder, like "**/*.png"')
    date = table.get("date")
    if isinstance(date, str) and not _DATE.match(date.strip()):
        problems.add(f"{prefix}.date", f'must be an ISO 8601 date like "2026-03-01", got "{date}"')
    split = table.get("split")
    if isinstance(split, dict):
        check_table(split, SPLIT_KEYS, f"{prefix}.split", problems)


def glob_regex(pattern: str) -> re.Pattern[str]:
    """A case-insensitive regex for a glob over relative POSIX paths.

    "**/" matches zero or more folders, "**" anything, "*" and "?" stay within one folder.
    """
    out, i = "", 0
    while i < len(pattern):
        if pattern.startswith("**/", i):
            out, i = out + "(?:.*/)?", i + 3
        elif pattern.startswith("**", i):
            out, i = out + ".*", i + 2
        elif pattern[i] == "*":
            out, i = out + "[^/]*", i + 1
        elif pattern[i] == "?":
            out, i = out + "[^/]", i + 1
        else:
            out, i = out + re.escape(pattern[i]), i + 1
    return re.compile(out + r"\Z", re.IGNORECASE)


Skipped = Callable[[str, str, str], None]  # (note kind, shown relative path, message)


def _why_skipped(path: Path, root: Path, allow_outside_links: bool) -> tuple[str, str] | None:
    """(note kind, reason) when ``path`` must not be read, else None. Nothing is opened:
    a FIFO would block the run, a device could be anything."""
    try:
        st = path.lstat()
        if stat.S_ISLNK(st.st_mode):
            target = path.resolve(strict=True)
            if not allow_outside_links and not target.is_relative_to(root.resolve()):
                return "link_outside", (f"is a symlink to {shown_name(str(target))}, outside the "
                                        "scans folder; skipped (allow_outside_links = true in "
                                        "the source reads such links)")
            st = target.stat()
    except RuntimeError:  # Path.resolve(strict=True) on a symlink loop (Python < 3.13)
        return "link_loop", "is a symlink loop; skipped"
    except OSError as exc:
        if exc.errno == errno.ELOOP:
            return "link_loop", "is a symlink loop; skipped"
        return "unreadable_file", f"cannot be read ({exc.strerror or exc}); skipped"
    if not stat.S_ISREG(st.st_mode):
        kind = ("a FIFO" if stat.S_ISFIFO(st.st_mode) else "a socket" if stat.S_ISSOCK(st.st_mode)
                else "a device" if stat.S_ISCHR(st.st_mode) or stat.S_ISBLK(st.st_mode)
                else "not a regular file")
        return "not_a_file", f"is {kind}, not a regular file; skipped without opening it"
    return None


def list_files(root: Path, include: list[str] | tuple[str, ...], *,
               skipped: Skipped | None = None,
               allow_outside_links: bool = False) -> list[tuple[str, Path]]:
    """(relative POSIX path, path) of regular files under root matching any pattern, in
    sorted order. The relative path shows undecodable name bytes as ``\\xNN``. Symlinked
    folders are not entered; symlinks leaving ``root`` (unless allowed), symlink loops,
    FIFOs, sockets and devices are left out and reported to ``skipped``."""
    regexes = [glob_regex(p) for p in include]
    found: list[tuple[str, Path]] = []
    for folder, dirs, files in os.walk(root):
        dirs.sort()
        for name in sorted(files):
            path = Path(folder) / name
            rel = shown_name(path.relative_to(root).as_posix())
            if not any(r.match(rel) for r in regexes):
                continue
            why = _why_skipped(path, root, allow_outside_links)
            if why is None:
                found.append((rel, path))
            elif skipped is not None:
                skipped(why[0], rel, f"{rel} {why[1]}")
    return sorted(found)


def _tag_value(value: Any) -> Any:
    if isinstance(value, bytes):
        value = value.decode("utf-8", "replace")
    if isinstance(value, str):
        return value.strip("\x00 ").strip() or None
    if isinstance(value, int):
        return value
    try:
        return round(float(value), 4)  # IFDRational and friends
    except (TypeError, ValueError):
        return str(value)


def scanner_facts(im: Image.Image) -> dict[str, Any]:
    """The scanner's own EXIF/TIFF tags (Make, Model, Software, DateTime, resolution)."""
    facts: dict[str, Any] = {}
    exif = im.getexif()
    for tag, name in SCANNER_TAGS.items():
        if tag in exif:
            value = _tag_value(exif[tag])
            if value is not None:
                facts[name] = value
    dpi = im.info.get("dpi")
    if dpi and "XResolution" not in facts:
        facts["dpi"] = [round(float(d), 2) for d in dpi]
    return facts


def _exif_date(value: Any) -> str | None:
    # Exif DateTime is "YYYY:MM:DD HH:MM:SS" (standards.md §6.1, format from memory).
    if not isinstance(value, str):
        return None
    m = re.match(r"^(\d{4}):(\d{2}):(\d{2})[ T](\d{2}:\d{2}:\d{2})", value)
    return f"{m.group(1)}-{m.group(2)}-{m.group(3)}T{m.group(4)}" if m else None


def iter_candidates(source: Mapping[str, Any], fetcher: PageFetcher | None, notes: NoteSink,
                    base_dir: Path) -> Iterator[Candidate]:
    """Yield one Candidate per matching file, then (with [split]) one per item on that scan."""
    del fetcher  # local files: no network
    once = OnceNotes(notes, str(source.get("name", "")))
    root = Path(os.path.expanduser(str(source["path"])))
    if not root.is_absolute():
        root = Path(base_dir) / root
    if not root.is_dir():
        once.add("missing_folder", str(root), f"the scans folder {root} does not exist or is not "
                 "a folder; check path (relative paths start at the collection folder)")
        return
    include = source.get("include") or DEFAULT_INCLUDE
    files = list_files(root, include, allow_outside_links=bool(source.get("allow_outside_links")),
                       skipped=lambda kind, rel, message: once.add(kind, rel, message,
                                                                   once_key=rel))
    if not files:
        once.add("no_files", str(root), f"no files in {root} match include = {list(include)}")
        return
    split = source.get("split")
    for rel, path in files:
        yield from _one_file(source, rel, path, split if isinstance(split, Mapping) else None,
                             once)


@dataclass
class _ScanFile:
    """One file of the folder and what the recipe and the file system say about it."""

    rel: str
    path: Path
    title: str | None
    date: str | None
    metadata: dict[str, Any]
    common: dict[str, Any]  # creator and licence, the same for every candidate of the source

    @classmethod
    def of(cls, source: Mapping[str, Any], rel: str, path: Path) -> _ScanFile:
        """The recipe's title, date, creator, licence and device; the file's mtime and size."""
        st = path.stat()
        metadata: dict[str, Any] = {
            "file": {"mtime": datetime.fromtimestamp(st.st_mtime, UTC).isoformat()
                     .replace("+00:00", "Z"), "size": st.st_size},
        }
        if source.get("device"):
            metadata["device"] = source["device"]
        common = {"creator": source.get("creator"), "licence_raw": source.get("licence"),
                  "licence_url": source.get("licence_url")}
        return cls(rel, path, source.get("title"), date_text(source.get("date")), metadata,
                   common)

    def whole(self, metadata: dict[str, Any] | None = None) -> Candidate:
        """The candidate for the file itself (the scan, when it is split)."""
        return Candidate(source_key=self.rel, local_path=self.path, title=self.title,
                         date=self.date, metadata=self.metadata if metadata is None else metadata,
                         **self.common)


def _one_file(source: Mapping[str, Any], rel: str, path: Path,
              split: Mapping[str, Any] | None, notes: OnceNotes) -> Iterator[Candidate]:
    """The file as one candidate; with [split], also one candidate per item found on it."""
    scan = _ScanFile.of(source, rel, path)
    try:
        im = Image.open(path)
    except (UnidentifiedImageError, OSError, Image.DecompressionBombError) as exc:
        # Still yielded: the ingest checks reject it with a ledger reason.
        if split is not None:
            notes.add("unreadable_scan", rel, f"{rel} could not be opened as an image ({exc}); "
                      "not split")
        yield scan.whole()
        return
    with im:
        scanner = scanner_facts(im)
        if scanner:
            scan.metadata["scanner"] = scanner
        scan.date = scan.date or _exif_date(scanner.get("DateTime"))
        if split is None:
            yield scan.whole()
            return
        try:
            im.load()
        except (OSError, SyntaxError) as exc:
            notes.add("unreadable_scan", rel, f"{rel} could not be decoded ({exc}); not split")
            yield scan.whole()
            return
        yield from _split(scan, im, split, notes)


def _split(scan: _ScanFile, im: Image.Image, split: Mapping[str, Any],
           notes: OnceNotes) -> Iterator[Candidate]:
    """The scan (with the split's facts), then one cropped candidate per item on the bed."""
    from collector.sources import (
        splitter,  # the splitter (and scipy) only for scans that are split
    )

    rel = scan.rel
    result = splitter.analyse_scan(
        im, min_area=int(split.get("min_area", splitter.DEFAULT_MIN_AREA)),
        threshold=split.get("threshold"),
        min_solidity=float(split.get("min_solidity", splitter.DEFAULT_MIN_SOLIDITY)),
        background=split.get("background"))
    yield scan.whole({**scan.metadata, "role": "scan", "items": len(result.items),
                      "split": {"threshold": result.threshold,
                                "contrast": round(result.contrast, 1), "scale": result.scale,
                                "background": result.background}})
    if not result.sure:
        notes.add("unsure_background", rel, f"{rel}: the edges of the scan disagree about the "
                  f"bed's colour; split as a {result.background} bed. If that is wrong, state "
                  'it: [sources.split] background = "light", "dark" or "#rrggbb"')
    if result.blank:
        notes.add("blank_scan", rel, f"{rel}: no items found on the scanner bed (contrast "
                  f"{result.contrast:.0f} grey levels); the scan is kept without crops")
        return
    icc = im.info.get("icc_profile")
    padding = int(split.get("padding", 0))
    deskew = bool(split.get("deskew", False))
    for n, item in enumerate(result.items, start=1):
        if item.touching:
            x, y, w, h = item.box
            notes.add("touching_items", rel,
                      f"{rel}: the item at box (x={x}, y={y}, w={w}, h={h}) looks like "
                      f"several items touching (solidity {item.solidity:.2f}, area "
                      f"{item.area} px); it is kept as one crop (#crop{n}); lay the items "
                      "apart and rescan, or crop by hand")
        crop, box = splitter.crop_item(im, item, padding=padding, deskew=deskew)
        yield Candidate(
            source_key=f"{rel}#crop{n}", title=f"{scan.title} ({n})" if scan.title else None,
            date=scan.date, content=splitter.png_bytes(crop, icc), parent_key=rel, crop_box=box,
            metadata={**scan.metadata, "role": "crop", "index": n,
                      "angle": round(item.angle, 2),
                      "deskewed": deskew and abs(item.angle) >= splitter.MIN_DESKEW_DEGREES,
                      "solidity": round(item.solidity, 3), "touching": item.touching},
            **scan.common)


KIND = SourceKind(
    name="scans",
    keys=KEYS,
    check=check,
    list_candidates=iter_candidates,
    uses_network=False,
    mechanism="local scans of physical items, read from a folder",
    # croissant-rai-spec.md, dataCollectionType recommended terms: scans are made by a person
    # with a scanner.
    collection_type="Manual Human Curator",
)
