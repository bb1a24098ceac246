"""Plots for datasheet.html, drawn with matplotlib (Agg-free Figure API) as inline SVG.

matplotlib is imported inside the drawing functions so that importing the datasheet modules stays
light. Every plot is drawn from the aggregated facts (never from per-file rows), so the cost does
not grow with the collection. Text is drawn as paths, so the SVG needs no fonts and makes no
requests.
"""

from __future__ import annotations

import io
from typing import TYPE_CHECKING, Any

if TYPE_CHECKING:
    from collector.exports.facts import DatasheetFacts, ResolutionBins, Timeline

PLOT_TITLES = {
    "licences": "Licences of the files in this release",
    "hosts": "Accepted files per host",
    "resolution": "Resolution of accepted files (width × height, px)",
    "timeline": "Gathering timeline",
}


def _svg(fig: Any, salt: str) -> str:
    import matplotlib

    buf = io.StringIO()
    # A per-plot salt keeps the SVG element ids of several inline plots distinct in one page.
    with matplotlib.rc_context({"svg.hashsalt": salt, "svg.fonttype": "path"}):
        fig.savefig(buf, format="svg", bbox_inches="tight", metadata={"Date": None})
    text = buf.getvalue()
    return text[text.index("<svg"):]


def _barh(labels: list[str], values: list[int], colour: str, xlabel: str) -> Any:
    from matplotlib.figure import Figure

    fig = Figure(figsize=(6.4, 0.45 * max(3, len(labels)) + 0.8))
    ax = fig.add_subplot()
    pos = list(range(len(labels)))[::-1]
    ax.barh(pos, values, color=colour)
    ax.set_yticks(pos, labels)
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
    """Inline SVG for each plot name in PLOT_TITLES ('' where there is nothing to draw)."""
    out: dict[str, str] = dict.fromkeys(PLOT_TITLES, "")
    licences = facts["release"]["by_licence"]
    if licences:
        out["licences"] = _svg(_barh(*_top(licences), "#4c72b0", "files"), "licences")
    hosts = facts["accepted"]["by_host"]
    if hosts:
        out["hosts"] = _svg(_barh(*_top(hosts), "#55a868", "files"), "hosts")
    if facts["resolution_bins"]["cells"]:
        out["resolution"] = _svg(_resolution_figure(facts["resolution_bins"]), "resolution")
    timeline = facts["timeline"]
    if set(timeline["requests"]) | set(timeline["stored"]):
        out["timeline"] = _svg(_timeline_figure(timeline), "timeline")
    return out


def _resolution_figure(bins: ResolutionBins) -> Any:
    """Accepted files by width and height: one dot per grid cell, its area the count."""
    from matplotlib.figure import Figure

    cells = bins["cells"]
    fig = Figure(figsize=(6.4, 4.2))
    ax = fig.add_subplot()
    step = bins["step"]
    top = max(c[2] for c in cells)
    ax.scatter([c[0] + step / 2 for c in cells], [c[1] + step / 2 for c in cells],
               s=[12 + 250 * c[2] / top for c in cells], c="#c44e52", alpha=0.6)
    ax.set_xlabel("width (px)")
    ax.set_ylabel("height (px)")
    ax.set_xlim(left=0)
    ax.set_ylim(bottom=0)
    ax.set_title(f"grid cells of {step} px; dot area ~ number of files", fontsize=9)
    ax.spines[["top", "right"]].set_visible(False)
    return fig


def _timeline_figure(timeline: Timeline) -> Any:
    """HTTP requests and stored files per time bucket, as stems on a true time axis."""
    from datetime import datetime, timedelta

    from matplotlib import dates as mdates
    from matplotlib.figure import Figure

    buckets = sorted(set(timeline["requests"]) | set(timeline["stored"]))
    fmt = {"second": "%Y-%m-%dT%H:%M:%S", "minute": "%Y-%m-%dT%H:%M", "hour": "%Y-%m-%dT%H",
           "day": "%Y-%m-%d"}
    when = [datetime.strptime(b, fmt[timeline["unit"]]) for b in buckets]
    fig = Figure(figsize=(6.4, 3.4))
    ax = fig.add_subplot()
    # Stems on a true time axis: quiet periods show as gaps, not as a compressed axis.
    for counts, colour, marker, label in (
            (timeline["requests"], "#4c72b0", "o", "HTTP requests"),
            (timeline["stored"], "#dd8452", "s", "files stored")):
        pts = [(w, counts[b]) for w, b in zip(when, buckets, strict=True)
               if counts.get(b)]
        if not pts:
            continue
        xs, ys = zip(*pts, strict=True)
        ax.vlines(xs, 0, ys, colors=colour, alpha=0.5)
        ax.plot(xs, ys, marker, ms=4, color=colour, label=label)
    ax.set_ylim(bottom=0)
    # Frame the data with one bucket either side; a single bucket would otherwise get
    # matplotlib's default span of years.
    span = {"second": timedelta(seconds=1), "minute": timedelta(minutes=1),
            "hour": timedelta(hours=1),
            "day": timedelta(days=1)}[timeline["unit"]]
    ax.set_xlim(float(mdates.date2num(min(when) - span)),
                float(mdates.date2num(max(when) + span)))
    locator = mdates.AutoDateLocator()
    ax.xaxis.set_major_locator(locator)
    ax.xaxis.set_major_formatter(mdates.ConciseDateFormatter(locator))
    ax.set_ylabel(f"per {timeline['unit']} (UTC)")
    ax.legend(frameon=False, fontsize=8)
    ax.spines[["top", "right"]].set_visible(False)
    return fig
