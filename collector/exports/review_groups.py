"""How the review sheet groups and pages the stored files; pure functions, no I/O.

Three views show every file that is neither withdrawn nor set aside: **by source**, **by main
colour** and **by near-duplicate cluster**; set-aside files are a fourth part of their own,
grouped by the rule they fail, each with its reason.

The main-colour cluster is a fixed binning of a file's first stored colour (the k-means cluster
with the largest share, ``files.colours``; :mod:`collector.checks.colour_facts`), not a second
clustering: the same picture always lands in the same bin, whatever else was gathered, and a
bin can be named in words.

- A colour whose CIELAB chroma C*ab = sqrt(a*^2 + b*^2) (CIE 15:2004, 8.2.1) is under
  ``GREY_CHROMA`` (the greyscale threshold of colour_facts) is neutral: ``black`` below
  L* 25, ``white`` from L* 75, ``grey`` between.
- Any other colour falls in one of twelve 30-degree sectors of its HSV hue, centred on red
  (0), orange (30), yellow (60), yellow-green (90), green (120), spring green (150), cyan
  (180), azure (210), blue (240), violet (270), magenta (300) and rose (330): the twelve hues
  of the RGB colour wheel (common practice, no source); each split into ``dark`` (L* below
  50) and ``light``.
- A file without colour facts (stored before they were computed, or not measurable) is in
  ``not measured``.

Bins are listed around the hue wheel, then the neutrals, then ``not measured``. A view is one
list of groups; pages hold ``per_page`` thumbnails, and a group that does not fit on one page
continues on the next (its heading repeated, marked continued). Each page is a file of its own
(:func:`page_file`), so a browser lays out and fetches the thumbnails of one page only.
"""

from __future__ import annotations

import colorsys
import json
import math
import re
from collections.abc import Iterable
from dataclasses import dataclass, field

from collector.checks.colour_facts import GREY_CHROMA

HUE_NAMES = ("red", "orange", "yellow", "yellow-green", "green", "spring green", "cyan",
             "azure", "blue", "violet", "magenta", "rose")
SECTOR = 360 / len(HUE_NAMES)
DARK_BELOW = 50.0  # L*: the middle of the lightness scale
BLACK_BELOW, WHITE_FROM = 25.0, 75.0  # L* of neutral colours (quarters of the scale)
NOT_MEASURED = "not measured"
UNKNOWN_SOURCE = "(no item: registered by rebuild-ledger)"
_HEX = re.compile(r"^#[0-9a-fA-F]{6}$")
SHEET = "review.html"  # the page a reader opens: the first page by source
FIRST_VIEW = "source"
# Every page file a review writes (a later review removes the ones it no longer writes).
PAGE_FILES = re.compile(r"^review-[a-z]+(-[0-9]+)?\.html$")


@dataclass(frozen=True)
class Entry:
    """One file as a thumbnail on the sheet (plain text; the template escapes it)."""

    sha256: str
    item_id: int | None
    title: str
    source: str
    licence: str
    state: str
    thumb: str | None  # the thumbnail's path relative to the sheet, None when not made
    width: int  # the thumbnail's size in CSS pixels (the img element's attributes)
    height: int
    href: str | None  # the stored file, relative to the sheet
    note: str = ""  # why there is no thumbnail
    colours: tuple[tuple[str, float], ...] = ()  # (hex, share), largest first
    colour_bin: tuple[int, str] = (100, NOT_MEASURED)  # (order, name): colour_bin()
    rule: str = ""  # the pixel rule a set-aside file fails
    reason: str = ""  # why, in the recipe's words

    @property
    def hover(self) -> str:
        """What the thumbnail says on hover: title, source, licence and state."""
        return f"{self.title} | source: {self.source} | licence: {self.licence} | {self.state}"


@dataclass
class Group:
    """One group of a view: a heading, an optional note and colour swatch, its entries."""

    key: str
    label: str
    entries: list[Entry] = field(default_factory=list)
    swatch: str | None = None  # a #rrggbb colour shown beside the heading
    note: str = ""


@dataclass(frozen=True)
class Section:
    """A group's part on one page."""

    group: Group
    entries: list[Entry]
    continued: bool


@dataclass(frozen=True)
class Page:
    """One page of a view, written as its own HTML file (``file``)."""

    file: str
    number: int
    sections: list[Section]


@dataclass
class View:
    """One way of grouping the files, paged."""

    key: str
    title: str
    intro: str
    groups: list[Group]
    pages: list[Page] = field(default_factory=list)
    first_page: dict[str, int] = field(default_factory=dict)  # group key -> page number

    @property
    def count(self) -> int:
        return sum(len(g.entries) for g in self.groups)

    @property
    def contents(self) -> str:
        return contents_file(self.key)


def parse_colours(text: str | None) -> list[dict[str, object]]:
    """The stored ``colours`` JSON as a list of colour objects ([] when absent or unusable)."""
    if not text:
        return []
    try:
        value = json.loads(text)
    except ValueError:
        return []
    return [c for c in value if isinstance(c, dict)] if isinstance(value, list) else []


def swatches(colours: list[dict[str, object]]) -> tuple[tuple[str, float], ...]:
    """(hex, share) of each colour whose hex is a plain ``#rrggbb`` (others are left out, so
    nothing but a colour reaches a style attribute)."""
    out = []
    for c in colours:
        hex_colour, share = c.get("hex"), c.get("share")
        if isinstance(hex_colour, str) and _HEX.match(hex_colour) and isinstance(
                share, (int, float)) and 0 <= share <= 1:
            out.append((hex_colour.lower(), float(share)))
    return tuple(out)


def colour_bin(colours: list[dict[str, object]]) -> tuple[int, str]:
    """(order, name) of the bin of the first colour (see the module docstring)."""
    if not colours:
        return 100, NOT_MEASURED
    first = colours[0]
    lab, hue = first.get("lab"), first.get("hue")
    if not (isinstance(lab, list) and len(lab) == 3
            and all(isinstance(v, (int, float)) for v in lab)):
        return 100, NOT_MEASURED
    lightness, a, b = (float(v) for v in lab)
    if math.hypot(a, b) < GREY_CHROMA or not isinstance(hue, (int, float)):
        if lightness < BLACK_BELOW:
            return 50, "black"
        return (52, "white") if lightness >= WHITE_FROM else (51, "grey")
    sector = int(((float(hue) + SECTOR / 2) % 360) // SECTOR)
    dark = lightness < DARK_BELOW
    return sector * 2 + (0 if dark else 1), f"{HUE_NAMES[sector]}, {'dark' if dark else 'light'}"


def _bin_swatch(order: int) -> str | None:
    """A colour to show beside a bin's heading: the sector's centre hue (HSV saturation 0.6,
    value 0.45 dark or 0.85 light), or a neutral grey level."""
    neutral = {50: "#202020", 51: "#808080", 52: "#f0f0f0"}
    if order in neutral or order >= 100:
        return neutral.get(order)
    red, green, blue = colorsys.hsv_to_rgb(order // 2 * SECTOR / 360, 0.6,
                                           0.45 if order % 2 == 0 else 0.85)
    return "#" + "".join(f"{round(v * 255):02x}" for v in (red, green, blue))


def by_source(entries: Iterable[Entry]) -> list[Group]:
    """One group per source, in the order the entries come (the query sorts by source)."""
    groups: dict[str, Group] = {}
    for e in entries:
        groups.setdefault(e.source, Group(f"s{len(groups) + 1}", e.source)).entries.append(e)
    return list(groups.values())


def by_colour(entries: Iterable[Entry]) -> list[Group]:
    """One group per main-colour bin, around the hue wheel, then neutrals, then not
    measured."""
    groups: dict[tuple[int, str], Group] = {}
    for e in entries:
        order, name = e.colour_bin
        if e.colour_bin not in groups:
            groups[e.colour_bin] = Group(f"c{order}", name, swatch=_bin_swatch(order))
        groups[e.colour_bin].entries.append(e)
    return [groups[k] for k in sorted(groups)]


def _root(item: int, parent: dict[int, int]) -> int:
    """The original at the end of a chain of ``duplicate_of`` links (a loop stops it)."""
    seen = {item}
    while item in parent and parent[item] not in seen:
        item = parent[item]
        seen.add(item)
    return item


def near_clusters(links: Iterable[tuple[int, int, str | None, str | None]],
                  shown: dict[str, Entry]) -> list[Group]:
    """One group per original with near duplicates: the original's file first, then each
    near duplicate's. ``links`` are (item, original item, file, original's file); files not
    in ``shown`` (set aside, withdrawn, or never stored) are counted in the group's note."""
    links = list(links)
    parent = {item: original for item, original, _, _ in links}
    members: dict[int, list[str | None]] = {}
    for item, original, sha, original_sha in links:
        root = _root(item, parent)
        files = members.setdefault(root, [])
        if original == root and original_sha not in files:
            files.insert(0, original_sha)
        if sha not in files:
            files.append(sha)
    groups = []
    for root, files in members.items():
        entries = [shown[s] for s in files if s is not None and s in shown]
        hidden = len(files) - len(entries)
        title = next((e.title for e in entries if e.item_id == root), None)
        label = f"item {root}" + (f": {title}" if title else "")
        note = (f"{hidden} more file(s) of this cluster not shown here (set aside, withdrawn "
                "or not stored)") if hidden else ""
        groups.append(Group(f"n{root}", label, entries, note=note))
    return groups


def set_aside_groups(entries: Iterable[Entry]) -> list[Group]:
    """One group per pixel rule, by rule name; each entry shows its own reason."""
    groups: dict[str, Group] = {}
    for e in entries:
        groups.setdefault(e.rule, Group("", e.rule)).entries.append(e)
    ordered = [groups[k] for k in sorted(groups)]
    for n, group in enumerate(ordered, 1):
        group.key = f"a{n}"
    return ordered


def paginate(view: View, per_page: int) -> View:
    """Cut the view into pages of at most ``per_page`` thumbnails (at least one page); note
    the page each group starts on."""
    pages: list[list[Section]] = [[]]
    room = per_page
    for group in view.groups:
        start = 0
        while True:
            if room == 0:
                pages.append([])
                room = per_page
            chunk = group.entries[start:start + room]
            view.first_page.setdefault(group.key, len(pages))
            pages[-1].append(Section(group, chunk, continued=start > 0))
            room -= len(chunk)
            start += len(chunk)
            if start >= len(group.entries):
                break
    view.pages = [Page(page_file(view.key, n), n, sections)
                  for n, sections in enumerate(pages, 1)]
    return view


def page_file(view: str, number: int) -> str:
    """The file of a view's page: the sheet itself for the first page by source."""
    return SHEET if (view, number) == (FIRST_VIEW, 1) else f"review-{view}-{number}.html"


def contents_file(view: str) -> str:
    """The file listing a view's groups."""
    return f"review-{view}.html"
