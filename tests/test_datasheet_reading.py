"""The datasheet reads well: contents whose links resolve, each table once, cautions only where
they apply, flags in their place, per-host timeline on a date axis, words for bytes and modes."""

from __future__ import annotations

import copy
import re
import sqlite3
from datetime import UTC, datetime, timedelta
from html.parser import HTMLParser
from pathlib import Path

import pytest
from support.datasheet_fixture import WEB_HOST, build_collection

from collector.config.recipe import parse_recipe
from collector.exports import datasheet as ds
from collector.exports import plots
from collector.exports.datasheet import export_datasheet
from collector.exports.datasheet_render import TABLES, in_words, render_html, render_markdown


@pytest.fixture(scope="module")
def export(tmp_path_factory: pytest.TempPathFactory) -> ds.ExportResult:
    """One export of the fixture collection (scans + a web source)."""
    root = build_collection(tmp_path_factory.mktemp("read") / "leaves")
    return export_datasheet(root)


class _Anchors(HTMLParser):
    """Every id and every in-page link of a page, and each table's text."""

    def __init__(self) -> None:
        super().__init__()
        self.ids: list[str] = []
        self.links: list[str] = []
        self.tables: list[str] = []
        self._table: list[str] | None = None

    def handle_starttag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        found = dict(attrs)
        if found.get("id"):
            self.ids.append(str(found["id"]))
        for name in ("href", "xlink:href"):  # page links and the plots' glyph references
            if (found.get(name) or "").startswith("#"):
                self.links.append(str(found[name])[1:])
        if tag == "table":
            self._table = []

    def handle_endtag(self, tag: str) -> None:
        if tag == "table" and self._table is not None:
            self.tables.append("|".join(self._table))
            self._table = None

    def handle_data(self, data: str) -> None:
        if self._table is not None:
            self._table.append(data)


def _parsed(page: str) -> _Anchors:
    parser = _Anchors()
    parser.feed(page)
    return parser


def test_contents_links_resolve_and_ids_are_unique(export: ds.ExportResult) -> None:
    """Every in-page link (contents, "see" links, the plots' glyphs) points at an id; no id is
    used twice, not even across the inline plots (HTML Living Standard, section 3.2.6: an id
    is unique in its tree); the Markdown's links point at its anchors."""
    html = (export.out / "datasheet.html").read_text()
    page = _parsed(render_html(export.facts, {}, plots.render_plots(export.facts)))
    assert page.ids == _parsed(html).ids  # the export's page is this one
    assert html.count("<svg") == 4 and len(page.ids) == len(set(page.ids))
    assert page.links and set(page.links) <= set(page.ids)
    md = (export.out / "datasheet.md").read_text()
    anchors = set(re.findall(r'<a id="([^"]+)"></a>', md))
    assert set(re.findall(r"\]\(#([^)]+)\)", md)) <= anchors and len(anchors) > 20
    toc = html.split('aria-label="Contents"')[1]
    toc = toc.split("</nav>")[0]
    for section in ("motivation", "composition", "collection", "preprocessing", "uses",
                    "distribution", "maintenance", "croissant", "t-licences", "t-rules"):
        assert f'href="#{section}"' in toc


def test_each_table_is_shown_once_and_linked_elsewhere(export: ds.ExportResult) -> None:
    """No table appears twice; the rules list, the reasons and the licence table, asked for
    by several questions, are shown once and linked from the others."""
    html = (export.out / "datasheet.html").read_text()
    page = _parsed(html)
    assert len(page.tables) == len(set(page.tables))
    for tid in ("t-rules", "t-reasons", "t-licences", "t-sources"):
        assert html.count(f'id="{tid}"') == 1
        assert html.count(f'<p class="see">See <a href="#{tid}">') >= 1
    md = (export.out / "datasheet.md").read_text()
    for tid in ("t-rules", "t-reasons", "t-licences"):
        assert md.count(f'<a id="{tid}"></a>') == 1
        assert f"({TABLES[tid]}](#{tid})" not in md  # a link, not a bracket slip
        assert f"[{TABLES[tid]}](#{tid})" in md
    assert md.count("Licence allowlist, applied before download") == 1


def _question(md: str, qid: str) -> str:
    """The Markdown of one question, up to the next question or section."""
    start = md.index(f"`{qid}`")
    ends = [i for i in (md.find("\n### ", start), md.find("\n## ", start)) if i != -1]
    return md[start:min(ends)]


def test_only_personal_flags_are_listed_under_personal_data(export: ds.ExportResult) -> None:
    """The identification question lists the GPS flag, not the licence conflict; that one is
    under errors and noise."""
    md = (export.out / "datasheet.md").read_text()
    ident = _question(md, "composition.identification")
    assert "| gps | 1 |" in ident
    assert "licence_conflict" not in ident
    assert "| licence_conflict | 1 |" in _question(md, "composition.errors")


def test_nc_nd_caution_only_when_such_files_are_released(export: ds.ExportResult) -> None:
    """The NC file is left out by the allowlist, so no NC/ND warning; with a CC-BY-NC-4.0 file
    in the release the warning names it (NC = NonCommercial: creativecommons.org licence
    elements)."""
    md = (export.out / "datasheet.md").read_text()
    assert "CC-BY-NC-4.0" not in export.facts["release"]["by_licence"]
    assert "restrict those uses" not in md
    facts = copy.deepcopy(export.facts)
    facts["release"]["by_licence"]["CC-BY-NC-4.0"] = 2
    facts["licences"].append({"spdx_id": "CC-BY-NC-4.0", "files": 2, "deed_url": None,
                              "conditions": ["attribution required", "non-commercial"]})
    assert "restrict those uses: CC-BY-NC-4.0 (2 files)" in render_markdown(facts, {})


def test_robots_caution_only_when_something_was_requested(export: ds.ExportResult) -> None:
    """A collection of local scans only made no request: no robots.txt caution."""
    assert "robots.txt permission" in (export.out / "datasheet.md").read_text()
    facts = copy.deepcopy(export.facts)
    facts["requests"]["total"] = 0
    assert "robots.txt permission" not in render_html(facts, {}, {})


def test_timeline_has_one_lane_per_host_on_a_date_axis(export: ds.ExportResult) -> None:
    """One lane per requested host (named by its source) plus the files stored; the x axis is
    matplotlib's date axis (days since 1970-01-01, matplotlib.dates) spanning the gathering
    time frame."""
    from matplotlib import dates as mdates

    facts = export.facts
    assert set(facts["timeline"]["by_host"]) == {WEB_HOST}
    with sqlite3.connect(export.out.parent / "ledger.sqlite") as conn:
        (n,) = conn.execute("SELECT count(*) FROM fetches WHERE host = ? AND started_at "
                            "IS NOT NULL", (WEB_HOST,)).fetchone()
    assert sum(facts["timeline"]["by_host"][WEB_HOST].values()) == n
    assert facts["timeline"]["requests"] == facts["timeline"]["by_host"][WEB_HOST]
    fig = plots._timeline_figure(facts["timeline"], facts["host_sources"])
    (ax,) = fig.get_axes()
    lanes = [t.get_text() for t in ax.get_yticklabels()]
    assert lanes == [f"fernhollow-api\n{WEB_HOST}", "files stored\n(all hosts)"]
    assert isinstance(ax.xaxis.get_major_formatter(), mdates.ConciseDateFormatter)
    lo, hi = (mdates.num2date(x) for x in ax.get_xlim())
    start = datetime.fromisoformat(facts["timeframe"]["start"].replace("Z", "+00:00"))
    end = datetime.fromisoformat(facts["timeframe"]["end"].replace("Z", "+00:00"))
    assert lo <= start.astimezone(UTC) and end.astimezone(UTC) <= hi
    # One bucket either side of the data, not matplotlib's default span of years.
    assert hi - lo <= end - start + timedelta(days=2)


def test_resolution_plot_has_a_legend_for_dot_sizes(export: ds.ExportResult) -> None:
    """The dot legend names 1 file and the largest count of one grid cell."""
    bins = export.facts["resolution_bins"]
    fig = plots._resolution_figure(bins)
    legend = fig.get_axes()[0].get_legend()
    labels = [t.get_text() for t in legend.get_texts()]
    top = max(c[2] for c in bins["cells"])
    assert labels[0] == "1 file" and labels[-1] == (f"{top} files" if top > 1 else "1 file")


def test_sources_have_their_archive_and_hosts_their_source_names(
        export: ds.ExportResult) -> None:
    """The sources table gives each source's folder or URL; the host table names the source
    beside host:port."""
    md = (export.out / "datasheet.md").read_text()
    assert re.search(r"^\| scanner-by \| scans \| [^|]+ \| scans/by \| \d+ \| \d+ \|$", md, re.M)
    assert export.facts["host_sources"] == {WEB_HOST: ["fernhollow-api"]}


def test_archive_urls_hide_secret_parameters(tmp_path: Path) -> None:
    """A source URL with a secret parameter is shown with the value hidden."""
    recipe = parse_recipe(
        'contact = "a@b.example"\n[network]\nsecret_params = ["key"]\n[[sources]]\n'
        'name = "api"\nkind = "json_api"\nurl = "https://x.example/api?key=s3cret&q=1"\n'
        '[sources.fields]\nitems = "r"\nid = "i"\nimage_url = "u"\n', tmp_path / "recipe.toml")
    (where,) = ds._where(recipe, "api")
    assert "s3cret" not in where and where.startswith("https://x.example/api?")
    assert ds._where(recipe, "gone") == []


def test_bytes_and_dates_in_words(export: ds.ExportResult) -> None:
    """Bytes with SI prefixes (SI Brochure, 9th ed., table 7: k = 10^3, M = 10^6) and the
    exact count; the declared picture dates as a range equal to our own query."""
    assert in_words(20_519_312, exact=True) == "20.5 MB (20,519,312 bytes)"
    assert in_words(999) == "999 bytes" and in_words(1_500) == "1.5 kB"
    md = (export.out / "datasheet.md").read_text()
    assert f"| received | {in_words(export.facts['requests']['bytes'], exact=True)} |" in md
    with sqlite3.connect(export.out.parent / "ledger.sqlite") as conn:
        lo, hi = conn.execute(
            "SELECT min(i.date), max(i.date) FROM items i JOIN files f ON f.sha256 = "
            "i.file_sha256 AND f.first_item_id = i.id WHERE i.state IN ('stored', "
            "'near_duplicate') AND i.date GLOB '[0-9][0-9][0-9][0-9]*'").fetchone()
    assert lo and (export.facts["picture_dates"]["earliest"], export.facts["picture_dates"]
                   ["latest"]) == (lo, hi)
    assert f"dates from {lo} to {hi}" in md


def test_plot_labels_from_names_are_escaped_in_the_svg(export: ds.ExportResult) -> None:
    """A source name with markup stays text inside the inline plots (matplotlib escapes it in
    the SVG comments it writes): the page gets no script element from a plot."""
    facts = copy.deepcopy(export.facts)
    facts["accepted"]["by_source"] = {"a --> <script>alert(1)</script>": 3}
    facts["host_sources"] = {WEB_HOST: ["<script>alert(2)</script>"]}
    page = render_html(facts, {}, plots.render_plots(facts))
    assert "<script" not in page
    assert "&lt;script&gt;alert(1)" in page and "&lt;script&gt;alert(2)" in page
