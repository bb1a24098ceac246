"""The diversity panel's plots for datasheet.html (matplotlib, inline SVG like
:mod:`collector.exports.plots`): shares per source, creator, licence and decade; a hue wheel
(polar bars, each bar in its own hue); lightness and chroma; size and aspect.

Drawn from the panel's aggregated numbers (:class:`collector.exports.diversity.DiversityFacts`),
never from per-file rows; matplotlib is imported inside the drawing functions.
"""

from __future__ import annotations

import colorsys
import math
from typing import TYPE_CHECKING, Any

from collector.exports import diversity as dv
from collector.exports.plots import _svg
from collector.safe_text import for_document

if TYPE_CHECKING:
    from collector.exports.diversity import DiversityFacts, Share

PANEL_TITLES = {
    "div-shares": "Share of the release per source, creator, licence and decade",
    "div-hues": "Hue wheel of the dominant colours (HSV hue, weighted by each colour's share "
                "of its picture; greyscale apart)",
    "div-tones": "Lightness and chroma of the dominant colours (CIELAB)",
    "div-sizes": "Size and aspect of the files of the release",
}
SHOWN = 8  # bars per shares panel; the rest are summed into one


def _shares_axes(ax: Any, rows: list[Share], title: str, colour: str) -> None:
    if len(rows) > SHOWN:
        rest = rows[SHOWN - 1:]
        rows = [*rows[:SHOWN - 1], {"name": f"{len(rest)} more rows", "files": sum(
            r["files"] for r in rest), "share": sum(r["share"] for r in rest)}]
    pos = list(range(len(rows)))[::-1]
    ax.barh(pos, [100 * r["share"] for r in rows], color=colour)
    ax.set_yticks(pos, [for_document(r["name"])[:28] for r in rows], fontsize=7)
    ax.set_xlim(0, 100)
    ax.axvline(50, color="#999999", lw=0.8, ls="--")  # "more than half" warns
    ax.set_title(title, fontsize=9)
    ax.tick_params(axis="x", labelsize=7)
    ax.spines[["top", "right"]].set_visible(False)


def _shares_figure(d: DiversityFacts) -> Any:
    from matplotlib.figure import Figure

    fig = Figure(figsize=(7.2, 5.6))
    # Fixed room for the y labels (28 characters at most): a layout engine or a tight box
    # would cost another draw.
    fig.subplots_adjust(left=0.22, right=0.98, top=0.95, bottom=0.06)
    axes = fig.subplots(2, 2, gridspec_kw={"wspace": 0.95, "hspace": 0.35})
    for ax, rows, title, colour in zip(
            axes.flat, (d["by_source"], d["by_creator"], d["by_licence"], d["by_decade"]),
            ("source (% of files)", "creator (% of files)", "licence (% of files)",
             "decade (% of files)"), ("#55a868", "#4c72b0", "#8172b3", "#c44e52"),
            strict=True):
        _shares_axes(ax, rows, title, colour)
    return fig


def hue_colour(index: int) -> tuple[float, float, float]:
    """The sRGB colour a hue bin is drawn in: its centre hue, HSV saturation 0.85, value 0.9."""
    return colorsys.hsv_to_rgb(index * dv.HUE_WIDTH / 360, 0.85, 0.9)


def _hue_figure(d: DiversityFacts) -> Any:
    """Polar bars: bin i at i * 30 degrees counter-clockwise from 0 (red) at the right."""
    from matplotlib.figure import Figure

    fig = Figure(figsize=(4.6, 4.6))
    fig.subplots_adjust(left=0.1, right=0.9, top=0.86, bottom=0.06)
    ax = fig.add_subplot(projection="polar")
    width = math.radians(dv.HUE_WIDTH)
    angles = [math.radians(i * dv.HUE_WIDTH) for i in range(dv.HUE_BINS)]
    ax.bar(angles, d["hues"], width=width * 0.95,
           color=[hue_colour(i) for i in range(dv.HUE_BINS)], edgecolor="#333333", lw=0.4)
    ax.set_xticks(angles, [f"{i * dv.HUE_WIDTH}°" for i in range(dv.HUE_BINS)], fontsize=7)
    ax.tick_params(axis="y", labelsize=6)
    ax.set_title(f"pictures' worth of colour; greyscale files apart: {d['greyscale_files']}",
                 fontsize=8)
    return fig


def _bars_figure(left: tuple[str, list[str], list[float], str],
                 right: tuple[str, list[str], list[float], str]) -> Any:
    from matplotlib.figure import Figure

    fig = Figure(figsize=(7.2, 3.0))
    fig.subplots_adjust(left=0.07, right=0.99, top=0.9, bottom=0.3)
    for ax, (title, labels, values, colour) in zip(
            fig.subplots(1, 2, gridspec_kw={"wspace": 0.25}), (left, right), strict=True):
        pos = list(range(len(values)))
        ax.bar(pos, values, color=colour)
        ax.set_xticks(pos, labels, rotation=45, ha="right", fontsize=7)
        ax.set_title(title, fontsize=9)
        ax.tick_params(axis="y", labelsize=7)
        ax.spines[["top", "right"]].set_visible(False)
    return fig


def render_panel_plots(d: DiversityFacts) -> dict[str, str]:
    """Inline SVG for each name in PANEL_TITLES ('' where there is nothing to draw)."""
    out = dict.fromkeys(PANEL_TITLES, "")
    if not d["files"]:
        return out
    out["div-shares"] = _svg(_shares_figure(d), "div-shares", tight=False)
    if sum(d["hues"]):
        out["div-hues"] = _svg(_hue_figure(d), "div-hues", tight=False)
    if sum(d["lightness"]):
        out["div-tones"] = _svg(_bars_figure(
            ("lightness L* (pictures' worth)", dv.bin_labels(dv.LIGHTNESS_EDGES),
             d["lightness"], "#777777"),
            ("chroma C*ab (pictures' worth)", dv.bin_labels(dv.CHROMA_EDGES), d["chroma"],
             "#dd8452")), "div-tones", tight=False)
    out["div-sizes"] = _svg(_bars_figure(
        ("size (files)", dv.bin_labels(dv.PIXEL_EDGES, " MP"), [float(n) for n in d["pixels"]],
         "#4c72b0"),
        ("aspect, width / height (files)", dv.bin_labels(dv.ASPECT_EDGES),
         [float(n) for n in d["aspect"]], "#55a868")), "div-sizes", tight=False)
    return out
