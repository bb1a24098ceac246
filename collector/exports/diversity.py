"""The datasheet's diversity panel: how evenly the release is spread, computed from counts.

Pure functions over the aggregated counts of :mod:`collector.storage.diversity_queries`
(never over per-file rows), so the panel costs the same for 100 files and for 100,000.

- **Effective numbers** of creators and of sources: Hill numbers of order 1 (the exponential
  of Shannon's entropy) and of order 2 (the inverse of Simpson's index). Sources: M. O. Hill,
  "Diversity and evenness: a unifying notation and its consequences", Ecology 54(2):427-432
  (1973); L. Jost, "Entropy and diversity", Oikos 113:363-375 (2006). With shares p_i,
  ``1D = exp(-sum p_i ln p_i)`` and ``2D = 1 / sum p_i^2``: N equally common creators give N
  for both orders, one creator holding nearly everything gives nearly 1. Order 1 weighs
  creators by their share, order 2 mostly counts the common ones. Files without a creator are
  left out of the creators' numbers (nobody can tell whether they are one person or many)
  and shown as their own row of the table.
- **Decades** from an item's date as :func:`collector.checks.dates.year_range` reads it. Our
  rule for ranges: a range inside one decade counts there; a range of at most
  :data:`MAX_SPAN_YEARS` years that crosses a decade boundary ("c. 1850" is 1845-1855,
  "1895-1905") counts in the decade of its middle year (the lower middle for an even
  width); a wider range ("19th century", "1800s", "before 1900") is counted apart, never
  spread over decades it may not touch.
- **Hues**: the HSV hue (Smith 1978, as Python's colorsys computes it: red 0 degrees, green
  120, blue 240) of each file's dominant colours, weighted by their share of the picture, in
  :data:`HUE_BINS` bins of 30 degrees centred on 0, 30, ... 330. Greyscale files and grey
  clusters (chroma below :data:`collector.checks.colour_facts.GREY_CHROMA`) have no hue worth
  drawing and are counted apart. A weight of 1 is one whole picture's worth of colour.
- **Lightness and chroma**: CIELAB L* and C*ab (CIE 15:2004) of the same dominant colours,
  weighted the same way, greyscale files included.
- **Warnings** in plain words: one creator or one source holding more than half of the
  release, near duplicates above the recipe's ``[datasheet] near_duplicate_warning`` share.
"""

from __future__ import annotations

import itertools
import math
from collections.abc import Iterable, Mapping
from typing import TYPE_CHECKING, TypedDict

from collector.checks.dates import year_range

if TYPE_CHECKING:
    from collector.storage.diversity_queries import PanelCounts
    from collector.storage.ledger import Ledger

__all__ = [
    "ASPECT_EDGES", "CHROMA_EDGES", "HUE_BINS", "HUE_WIDTH", "LIGHTNESS_EDGES", "PIXEL_EDGES",
    "DiversityFacts", "decade_of", "decades", "hill_numbers", "hue_bin", "hue_histogram",
    "warnings",
]

HUE_WIDTH = 30  # degrees per bin; the bin edges (15, 45, ...) are whole degrees
HUE_BINS = 360 // HUE_WIDTH
# The twelve hues of the RGB colour wheel at 30-degree steps (common practice, no source).
HUE_NAMES = ("red", "orange", "yellow", "yellow-green", "green", "spring green", "cyan",
             "azure", "blue", "violet", "magenta", "rose")
MAX_SPAN_YEARS = 20  # a wider date range is not given a decade (our rule, see above)
WIDE_RANGE = f"range wider than {MAX_SPAN_YEARS} years"
NO_DATE = "no date"
NOT_READ = "date not understood"
NO_CREATOR = "(no creator)"
TOP_ROWS = 12  # rows of a shares table; the rest are summed into one "others" row
# Histogram edges (a value below edges[0] is bin 0, at or above edges[-1] the last bin).
LIGHTNESS_EDGES = (10, 20, 30, 40, 50, 60, 70, 80, 90)  # L*, 0-100
CHROMA_EDGES = (6, 15, 30, 45, 60, 80, 100)  # C*ab; 6 = colour_facts.GREY_CHROMA
PIXEL_EDGES = (0.01, 0.1, 0.25, 0.5, 1, 2, 4, 8, 16, 32)  # megapixels (10^6 pixels)
# width / height: tall 1:2, 2:3, 4:5, near square, 5:4, 3:2, 2:1 and wider
ASPECT_EDGES = (0.5, 0.67, 0.8, 0.95, 1.05, 1.25, 1.5, 2.0)
# Colour distributions read from at most about this many files, evenly spread (SQLite reads
# JSON at about 1 us a value: 100,000 files of 5 colours would take seconds). A bin holding
# a tenth of the weight is then known to about +-0.4 percentage points (the binomial standard
# error sqrt(0.1 * 0.9 / 5000); common practice, no source).
MAX_COLOUR_FILES = 5_000
MORE_THAN_HALF = 0.5  # "more than half of the release" (strictly more)


class Share(TypedDict):
    """One row of a shares table: a name, its files and their share of the release."""

    name: str
    files: int
    share: float


class Effective(TypedDict):
    """Effective numbers (Hill numbers of order 1 and 2) over the ``counted`` files that
    name one of ``distinct`` values."""

    distinct: int
    counted: int
    order1: float
    order2: float


class NearClusters(TypedDict):
    """Near-duplicate groups in the release: how many, the largest (files, the original
    included), and the near copies among the release's files."""

    clusters: int
    largest: int
    files: int


class DiversityFacts(TypedDict):
    """The diversity panel of the datasheet (all over the files of the release)."""

    files: int
    by_source: list[Share]
    by_creator: list[Share]
    by_licence: list[Share]
    by_decade: list[Share]
    creators: Effective
    sources: Effective
    hues: list[float]  # HUE_BINS weights, in pictures' worth of colour
    grey_weight: float  # grey clusters of colour pictures
    greyscale_files: int
    measured_files: int  # files with colour facts (older files have none)
    colour_files_read: int  # of those, the files whose colours were read (a sample above
    # MAX_COLOUR_FILES), the weights scaled up to all measured files
    lightness: list[float]  # len(LIGHTNESS_EDGES) + 1 weights
    chroma: list[float]  # len(CHROMA_EDGES) + 1 weights
    pixels: list[int]  # len(PIXEL_EDGES) + 1 counts
    aspect: list[int]  # len(ASPECT_EDGES) + 1 counts
    near: NearClusters
    near_threshold: float
    warnings: list[str]


def hill_numbers(counts: Iterable[float]) -> tuple[float, float]:
    """Hill numbers of order 1 (exp of Shannon entropy, natural log) and 2 (inverse Simpson
    index) of the abundances ``counts`` (Hill 1973; Jost 2006); (0, 0) when all are zero."""
    values = [float(c) for c in counts if c > 0]
    total = sum(values)
    if total <= 0:
        return 0.0, 0.0
    shares = [v / total for v in values]
    entropy = -math.fsum(p * math.log(p) for p in shares)
    return math.exp(entropy), 1.0 / math.fsum(p * p for p in shares)


def effective(counts: Mapping[str, int]) -> Effective:
    """The effective numbers of the names in ``counts``."""
    order1, order2 = hill_numbers(counts.values())
    return {"distinct": sum(1 for n in counts.values() if n > 0),
            "counted": sum(counts.values()), "order1": order1, "order2": order2}


def hue_bin(hue: float) -> int:
    """The bin of an HSV hue in degrees: bin i is centred on i * 30 degrees, so 345-15 is
    bin 0 (red), 105-135 bin 4 (green), 225-255 bin 8 (blue)."""
    return int(((hue + HUE_WIDTH / 2) % 360) // HUE_WIDTH)


def hue_histogram(weighted: Iterable[tuple[float, float]]) -> list[float]:
    """(hue in degrees, weight) pairs summed into :data:`HUE_BINS` bins."""
    out = [0.0] * HUE_BINS
    for hue, weight in weighted:
        out[hue_bin(hue)] += weight
    return out


def hue_label(index: int) -> str:
    """A hue bin in words: '0° red (345–15°)'."""
    centre = index * HUE_WIDTH
    low, high = (centre - HUE_WIDTH // 2) % 360, (centre + HUE_WIDTH // 2) % 360
    return f"{centre}° {HUE_NAMES[index]} ({low}–{high}°)"


def bin_index(value: float, edges: tuple[float, ...]) -> int:
    """The histogram bin of ``value``: below edges[0] is 0, at or above edges[-1] the last."""
    return sum(1 for edge in edges if value >= edge)


def bin_labels(edges: tuple[float, ...], unit: str = "") -> list[str]:
    """Words for the len(edges) + 1 bins: '< 10', '10–20', ..., '≥ 90'."""
    def num(x: float) -> str:
        return f"{x:g}"

    inner = [f"{num(a)}–{num(b)}{unit}" for a, b in itertools.pairwise(edges)]
    return [f"< {num(edges[0])}{unit}", *inner, f"≥ {num(edges[-1])}{unit}"]


def decade_of(text: str | None) -> str:
    """The decade ('1850s') an item's date counts in, by the rule in the module docstring,
    or NO_DATE, NOT_READ or WIDE_RANGE."""
    if not text or not text.strip():
        return NO_DATE
    found = year_range(text)
    if found is None:
        return NOT_READ
    low, high = found
    if high - low > MAX_SPAN_YEARS:
        return WIDE_RANGE
    return f"{(low + high) // 2 // 10 * 10}s"


def decades(date_counts: Mapping[str, int]) -> dict[str, int]:
    """Files per decade from files per date text: decades in time order, then the ranges
    wider than :data:`MAX_SPAN_YEARS`, the dates not understood and the undated."""
    out: dict[str, int] = {}
    for text, n in date_counts.items():
        key = decade_of(text)
        out[key] = out.get(key, 0) + n
    rest = (WIDE_RANGE, NOT_READ, NO_DATE)
    dated = sorted((k for k in out if k not in rest), key=lambda k: int(k[:-1]))
    return {k: out[k] for k in [*dated, *rest] if k in out}


def shares(counts: Mapping[str, int], total: int, *, top: int = TOP_ROWS,
           ordered: bool = False) -> list[Share]:
    """Rows of a shares table: the largest first (or in the given order with ``ordered``);
    beyond ``top`` rows the rest are one row, 'N others'."""
    items = list(counts.items()) if ordered else sorted(
        counts.items(), key=lambda kv: (-kv[1], kv[0]))
    if len(items) > top:
        rest = sum(n for _, n in items[top - 1:])
        items = [*items[:top - 1], (f"{len(items) - top + 1} others", rest)]
    return [{"name": k, "files": n, "share": n / total if total else 0.0} for k, n in items]


def warnings(files: int, by_creator: Mapping[str, int], by_source: Mapping[str, int],
             near_files: int, near_threshold: float) -> list[str]:
    """The panel's warnings in plain words: one creator or source holding more than half of
    the ``files`` of the release; near copies making up more than ``near_threshold`` of it."""
    if not files:
        return []
    out = []
    for what, counts in (("creator", by_creator), ("source", by_source)):
        named = {k: n for k, n in counts.items() if k != NO_CREATOR}
        if named:
            name, n = max(named.items(), key=lambda kv: (kv[1], kv[0]))
            if n / files > MORE_THAN_HALF:
                out.append(f"One {what}, {name}, holds {n} of the {files} files of this "
                           f"release ({100 * n / files:.0f} %), more than half: a model "
                           f"trained on it will lean towards this {what}.")
    if near_files / files > near_threshold:
        out.append(f"Near duplicates make up {near_files} of the {files} files of this release "
                   f"({100 * near_files / files:.0f} %), more than the recipe's "
                   f"[datasheet] near_duplicate_warning of {100 * near_threshold:g} %: "
                   "repeated pictures weigh more in training than single ones.")
    return out


def panel(counts: PanelCounts, near_threshold: float) -> DiversityFacts:
    """The panel's facts from the ledger's counts (:func:`collector.storage.diversity_queries.
    panel_counts`, asked with this module's edges)."""
    files = counts.files
    creators = {(k or NO_CREATOR): n for k, n in counts.by_creator.items()}
    named = {k: n for k, n in creators.items() if k != NO_CREATOR}
    lightness = [0.0] * (len(LIGHTNESS_EDGES) + 1)
    chroma = [0.0] * (len(CHROMA_EDGES) + 1)
    clusters, largest, near_files = counts.near
    colours = counts.colours
    # Weights of a sample count for every file it stands for (pictures' worth of the release).
    scale = colours.measured_files / colours.files_read if colours.files_read else 0.0
    for l_bin, c_bin, weight in colours.tones:
        lightness[l_bin] += weight * scale
        chroma[c_bin] += weight * scale
    return {
        "files": files,
        "by_source": shares(counts.by_source, files),
        "by_creator": shares(creators, files),
        "by_licence": shares(counts.by_licence, files),
        "by_decade": shares(decades(counts.by_date), files, top=10**6, ordered=True),
        "creators": effective(named), "sources": effective(counts.by_source),
        "hues": hue_histogram((float(d), w * scale) for d, w in colours.hues),
        "grey_weight": colours.grey_weight * scale,
        "greyscale_files": colours.greyscale_files, "measured_files": colours.measured_files,
        "colour_files_read": colours.files_read, "lightness": lightness, "chroma": chroma,
        "pixels": list(counts.pixels), "aspect": list(counts.aspect),
        "near": {"clusters": clusters, "largest": largest, "files": near_files},
        "near_threshold": near_threshold,
        "warnings": warnings(files, creators, counts.by_source, near_files, near_threshold),
    }


def panel_from_ledger(ledger: Ledger, near_threshold: float) -> DiversityFacts:
    """Read the counts with this module's bins and compute the panel."""
    from collector.checks.colour_facts import GREY_CHROMA
    from collector.storage.diversity_queries import panel_counts

    return panel(panel_counts(ledger, grey_chroma=GREY_CHROMA,
                              lightness_edges=LIGHTNESS_EDGES, chroma_edges=CHROMA_EDGES,
                              pixel_edges=PIXEL_EDGES, aspect_edges=ASPECT_EDGES,
                              max_colour_files=MAX_COLOUR_FILES),
                 near_threshold)
