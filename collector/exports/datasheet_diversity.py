"""The datasheet's diversity panel as blocks (question ``composition.diversity``): the warnings
in plain words, the shares per source, creator, licence and decade, the effective numbers,
hues, lightness and chroma, sizes and aspect, near-duplicate groups.

The numbers come from :mod:`collector.exports.diversity`; the HTML draws them too
(``("plot", name)`` blocks, drawn by :mod:`collector.exports.diversity_plots`), the Markdown
shows the tables only.
"""

from __future__ import annotations

from typing import TYPE_CHECKING, Any

from collector.exports import diversity as dv

if TYPE_CHECKING:
    from collector.exports.diversity import DiversityFacts, Share
    from collector.exports.facts import DatasheetFacts

Block = tuple[Any, ...]

TABLES = {
    "t-div-sources": "Files of the release per source", "t-div-creators":
    "Files of the release per creator", "t-div-licences": "Files of the release per licence",
    "t-div-decades": "Files of the release per decade", "t-div-effective":
    "Effective numbers of creators and sources", "t-div-hues": "Hues of the dominant colours",
    "t-div-tones": "Lightness and chroma of the dominant colours",
    "t-div-sizes": "Files of the release by size and aspect",
    "t-div-near": "Near-duplicate groups in the release",
}
HILL_SOURCE = ("Hill numbers (M. O. Hill, \"Diversity and evenness: a unifying notation and "
               "its consequences\", Ecology 54(2):427-432, 1973; L. Jost, \"Entropy and "
               "diversity\", Oikos 113:363-375, 2006)")


def _files(n: int) -> str:
    return f"{n} file{'' if n == 1 else 's'}"


def _pct(share: float) -> str:
    return f"{100 * share:.1f} %"


def _share_table(rows: list[Share], what: str, tid: str) -> Block:
    return ("table", [what, "files", "share of the release"],
            [[r["name"], r["files"], _pct(r["share"])] for r in rows], tid)


def _effective(d: DiversityFacts) -> Block:
    rows = []
    for what, e in (("creators", d["creators"]), ("sources", d["sources"])):
        rows.append([what, e["distinct"], e["counted"], f"{e['order1']:.2f}",
                     f"{e['order2']:.2f}"])
    return ("table", ["of", "distinct", "files counted", "order 1: exp(Shannon entropy)",
                      "order 2: inverse Simpson index"], rows, "t-div-effective")


def _hues(d: DiversityFacts) -> Block:
    coloured = sum(d["hues"])
    rows = [[dv.hue_label(i), f"{w:.1f}", _pct(w / coloured) if coloured else "–"]
            for i, w in enumerate(d["hues"])]
    return ("table", ["hue (HSV)", "pictures' worth", "share of the hues"], rows, "t-div-hues")


def _tones(d: DiversityFacts) -> Block:
    rows: list[list[Any]] = []
    for name, edges, weights in (("lightness L*", dv.LIGHTNESS_EDGES, d["lightness"]),
                                 ("chroma C*ab", dv.CHROMA_EDGES, d["chroma"])):
        total = sum(weights)
        rows += [[name, label, f"{w:.1f}", _pct(w / total) if total else "–"]
                 for label, w in zip(dv.bin_labels(edges), weights, strict=True)]
    return ("table", ["scale", "range", "pictures' worth", "share"], rows, "t-div-tones")


def _sizes(d: DiversityFacts) -> Block:
    rows: list[list[Any]] = []
    for name, labels, counts in (
            ("size", dv.bin_labels(dv.PIXEL_EDGES, " MP"), d["pixels"]),
            ("aspect (width / height)", dv.bin_labels(dv.ASPECT_EDGES), d["aspect"])):
        rows += [[name, label, n, _pct(n / d["files"]) if d["files"] else "–"]
                 for label, n in zip(labels, counts, strict=True)]
    return ("table", ["measure", "range", "files", "share of the release"], rows,
            "t-div-sizes")


def _colour_words(d: DiversityFacts) -> str:
    read = d["colour_files_read"]
    sample = (f" (read from one file in every {round(d['measured_files'] / read)}, "
              f"{read} files, and scaled up: a distribution, not a count)"
              if read and read < d["measured_files"] else "")
    return (f"Colours: the dominant colours of {d['measured_files']} of {d['files']} files"
            f"{sample} (files stored before colour facts were kept have none), each weighted "
            "by its share of the picture, so one picture adds 1 in all. Hues are HSV hues in "
            f"bins of {dv.HUE_WIDTH}°; {_files(d['greyscale_files'])} in greyscale and grey "
            f"parts of colour pictures ({d['grey_weight']:.1f} pictures' worth) have no hue "
            "and are left out of the hue wheel. Lightness L* and chroma C*ab are CIELAB "
            "(CIE 15:2004).")


def panel_blocks(f: DatasheetFacts) -> list[Block]:
    """The panel: warnings first, then each measure with its table (and plot in HTML)."""
    d = f["diversity"]
    if not d["files"]:
        return [("p", "This release holds no files yet: the panel has nothing to show.")]
    near = d["near"]
    warn: list[Block] = [("p", f"Warning: {w}") for w in d["warnings"]] or [
        ("p", "No warning: no creator or source holds more than half of the release, and near "
              f"duplicates stay within the recipe's {100 * d['near_threshold']:g} %.")]
    return [
        *warn,
        ("p", f"Over the {d['files']} files of this release (withdrawn and set-aside files "
              "left out). Decades come from each item's date as the source wrote it; a range "
              f"of up to {dv.MAX_SPAN_YEARS} years counts in the decade of its middle year, a "
              "wider one is counted apart."),
        ("plot", "div-shares"),
        _share_table(d["by_source"], "source", "t-div-sources"),
        _share_table(d["by_creator"], "creator", "t-div-creators"),
        _share_table(d["by_licence"], "licence", "t-div-licences"),
        _share_table(d["by_decade"], "decade", "t-div-decades"),
        ("p", f"Effective numbers are {HILL_SOURCE}: as many equally large groups would "
              "give the same diversity. Order 1 weighs each by its share, order 2 mostly "
              "counts the large ones; files without a creator are left out of the creators'."),
        _effective(d),
        ("p", _colour_words(d)),
        ("plot", "div-hues"), _hues(d), ("plot", "div-tones"), _tones(d),
        ("plot", "div-sizes"), _sizes(d),
        ("table", ["near-duplicate groups", "count"], [
            ["groups (an original and its near copies)", near["clusters"]],
            ["files in the largest group", near["largest"]],
            ["near copies in the release", near["files"]],
            ["share of the release", _pct(near["files"] / d["files"]) if d["files"] else "–"]],
         "t-div-near"),
    ]
