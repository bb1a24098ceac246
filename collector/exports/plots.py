"""Plots for datasheet.html, drawn with matplotlib (Agg-free Figure API) as inline SVG.

matplotlib is imported inside the drawing functions so that importing the datasheet modules stays
light. Every plot is drawn from the aggregated facts (never from per-file rows), so the cost does
not grow with the collection. Text is drawn as paths, so the SVG needs no fonts and makes no
requests.
"""

from __future__ import annotations

import io
import re
from typing import TYPE_CHECKING, Any

from collector.safe_text import for_document

if TYPE_CHECKING:
    from collector.exports.facts import DatasheetFacts, ResolutionBins, Timeline

PLOT_TITLES = {
    "licences": "Licences of the files in this release",
    "sources": "Accepted files per source",
    "resolution": "Resolution of accepted files (width × height, px)",
    "timeline": "Requests per host over time (politeness budgets are per host); each lane "
                "is scaled to its own peak",
}
MAX_LANES = 8  # hosts drawn in their own lane; the rest share one


def _svg(fig: Any, salt: str, *, tight: bool = True) -> str:
    """The figure as inline SVG; ``tight=False`` keeps the figure's own margins (one draw
    less: the tight box is found by drawing first)."""
    import matplotlib

    buf = io.StringIO()
    # A per-plot salt keeps the SVG element ids of several inline plots distinct in one page.
    with matplotlib.rc_context({"svg.hashsalt": salt, "svg.fonttype": "path"}):
        fig.savefig(buf, format="svg", bbox_inches="tight" if tight else None,
                    metadata={"Date": None})
    text = buf.getvalue()
    text = for_document(text[text.index("<svg"):])  # a label's controls: not XML characters
    # Glyph and clip-path ids repeat across plots (DejaVuSans-31 in each): prefix every id and
    # every reference to one, so the ids of the page stay unique (HTML: an id is unique).
    text = re.sub(r'\bid="([^"]+)"', rf'id="{salt}-\1"', text)
    text = re.sub(r'(xlink:href|href)="#([^"]+)"', rf'\1="#{salt}-\2"', text)
    return re.sub(r"url\(#([^)]+)\)", rf"url(#{salt}-\1)", text)


def _barh(labels: list[str], values: list[int], colour: str, xlabel: str) -> Any:
    from matplotlib.figure import Figure

    fig = Figure(figsize=(6.4, 0.45 * max(3, len(labels)) + 0.8))
    ax = fig.add_subplot()
    pos = list(range(len(labels)))[::-1]
    ax.barh(pos, values, color=colour)
    ax.set_yticks(pos, [for_document(label) for label in labels])
    ax.set_xlabel(xlabel)
    for y, v in zip(pos, values, strict=True):
        ax.annotate(str(v), (v, y), xytext=(3, 0), textcoords="offset points", va="center",
                    fontsize=8)
    ax.spines[["top", "right"]].set_visible(False)
    return fig


def _top(pairs: dict[str, int], n: int = 15) -> tuple[list[str], list[int]]:
    items = sorted(pairs.items(), key=lambda kv: (-kv[1], kv[0]))
    if len(items) > n:
        rest = sum(v for _, v in items[n - 1:])
        items = [*items[:n - 1], (f"{len(items) - n + 1} others", rest)]
    return [k for k, _ in items], [v for _, v in items]


def render_plots(facts: DatasheetFacts) -> dict[str, str]:
    """Inline SVG for each plot name in PLOT_TITLES and in the diversity panel's
    PANEL_TITLES ('' where there is nothing to draw)."""
    out: dict[str, str] = dict.fromkeys(PLOT_TITLES, "")
    licences = facts["release"]["by_licence"]
    if licences:
        out["licences"] = _svg(_barh(*_top(licences), "#4c72b0", "files"), "licences")
    by_source = facts["accepted"]["by_source"]
    if by_source:
        out["sources"] = _svg(_barh(*_top(by_source), "#55a868", "files"), "sources")
    if facts["resolution_bins"]["cells"]:
        out["resolution"] = _svg(_resolution_figure(facts["resolution_bins"]), "resolution")
    timeline = facts["timeline"]
    if set(timeline["requests"]) | set(timeline["stored"]):
        out["timeline"] = _svg(_timeline_figure(timeline, facts["host_sources"]), "timeline")
    if "diversity" in facts:  # the diversity panel's own plots, drawn beside its tables
        from collector.exports.diversity_plots import render_panel_plots

        out.update(render_panel_plots(facts["diversity"]))
    return out


def _resolution_figure(bins: ResolutionBins) -> Any:
    """Accepted files by width and height: one dot per grid cell, its area the count."""
    from matplotlib.figure import Figure

    cells = bins["cells"]
    fig = Figure(figsize=(6.4, 4.2))
    ax = fig.add_subplot()
    step = bins["step"]
    top = max(c[2] for c in cells)
    def area(n: float) -> float:
        return 12 + 250 * n / top

    ax.scatter([c[0] + step / 2 for c in cells], [c[1] + step / 2 for c in cells],
               s=[area(c[2]) for c in cells], c="#c44e52", alpha=0.6)
    # A legend for the dot sizes: one file, the largest count, and one between.
    sizes = sorted({1, max(1, round(top / 2)), top})
    handles = [ax.scatter([], [], s=area(n), c="#c44e52", alpha=0.6) for n in sizes]
    ax.legend(handles, [f"{n} file{'' if n == 1 else 's'}" for n in sizes], title="per dot",
              frameon=False, fontsize=8, title_fontsize=8, loc="upper left",
              bbox_to_anchor=(1.0, 1.0), labelspacing=1.2, borderpad=1.0)
    ax.set_xlabel("width (px)")
    ax.set_ylabel("height (px)")
    ax.set_xlim(left=0)
    ax.set_ylim(bottom=0)
    ax.set_title(f"grid cells of {step} px; dot area grows with the number of files",
                 fontsize=9)
    ax.spines[["top", "right"]].set_visible(False)
    return fig


UNIT_FORMAT = {"second": "%Y-%m-%dT%H:%M:%S", "minute": "%Y-%m-%dT%H:%M", "hour": "%Y-%m-%dT%H",
               "day": "%Y-%m-%d"}


def _lanes(timeline: Timeline, host_sources: dict[str, list[str]]
           ) -> list[tuple[str, dict[str, int]]]:
    """One lane per host (the busiest MAX_LANES - 1 if there are more, the rest together),
    named by the sources that used it; then the files stored."""
    hosts = sorted(timeline["by_host"].items(), key=lambda kv: (-sum(kv[1].values()), kv[0]))
    if len(hosts) > MAX_LANES:
        rest: dict[str, int] = {}
        for _, counts in hosts[MAX_LANES - 1:]:
            for slot, n in counts.items():
                rest[slot] = rest.get(slot, 0) + n
        hosts = [*hosts[:MAX_LANES - 1], (f"{len(hosts) - MAX_LANES + 1} other hosts", rest)]
    lanes = []
    for host, counts in hosts:
        names = host_sources.get(host, [])
        label = ", ".join(names[:2]) + (f" +{len(names) - 2}" if len(names) > 2 else "")
        lanes.append((f"{label}\n{host}" if label else host, counts))
    return [*lanes, ("files stored\n(all hosts)", timeline["stored"])]


def _timeline_figure(timeline: Timeline, host_sources: dict[str, list[str]]) -> Any:
    """Requests per host and stored files per time bucket: one lane each on one shared true
    date-time axis (UTC), so quiet periods show as gaps. Each lane is scaled to its own peak,
    written at its right end (one Axes: several would cost seconds to draw)."""
    from datetime import datetime, timedelta

    from matplotlib import dates as mdates
    from matplotlib.figure import Figure

    unit = timeline["unit"]
    lanes = _lanes(timeline, host_sources)
    when = {b: datetime.strptime(b, UNIT_FORMAT[unit])
            for _, counts in lanes for b in counts}
    fig = Figure(figsize=(6.4, 0.55 * len(lanes) + 1.0))
    ax = fig.add_subplot()
    span = {"second": timedelta(seconds=1), "minute": timedelta(minutes=1),
            "hour": timedelta(hours=1), "day": timedelta(days=1)}[unit]
    right = max(when.values()) + span
    for i, (_, counts) in enumerate(lanes):
        base = len(lanes) - 1 - i
        pts = sorted((when[b], n) for b, n in counts.items() if n)
        if not pts:
            continue
        peak = max(n for _, n in pts)
        colour = "#dd8452" if i == len(lanes) - 1 else "#4c72b0"
        xs = [float(mdates.date2num(x)) for x, _ in pts]
        ys = [base + 0.8 * n / peak for _, n in pts]
        ax.vlines(xs, base, ys, colors=colour, alpha=0.6)
        ax.plot(xs, ys, "o", ms=2.5, color=colour)
        ax.annotate(f"peak {peak}", (float(mdates.date2num(right)), base + 0.4),
                    xytext=(4, 0), textcoords="offset points", va="center", fontsize=7,
                    annotation_clip=False)
    ax.set_yticks([len(lanes) - 1 - i + 0.4 for i in range(len(lanes))],
                  [label for label, _ in lanes], fontsize=7)
    ax.set_ylim(-0.2, len(lanes))
    # Frame the data with one bucket either side; a single bucket would otherwise get
    # matplotlib's default span of years.
    ax.set_xlim(float(mdates.date2num(min(when.values()) - span)),
                float(mdates.date2num(right)))
    locator = mdates.AutoDateLocator()
    ax.xaxis.set_major_locator(locator)
    ax.xaxis.set_major_formatter(mdates.ConciseDateFormatter(locator))
    ax.set_xlabel(f"time (UTC), counts per {unit}", fontsize=8, loc="left")
    ax.tick_params(axis="x", labelsize=8)
    ax.spines[["top", "right"]].set_visible(False)
    return fig
