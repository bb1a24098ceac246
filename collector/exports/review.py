"""The review sheet: self-contained HTML pages to look at what was gathered.

``collector review DIR`` writes ``DIR/review/``: ``review.html`` (the first page by source,
where a reader starts), one file per further page (``review-<view>-<n>.html``), one contents
file per view listing its groups (``review-<view>.html``), and ``thumbs/`` (see
:mod:`collector.exports.thumbnails`). The pages show every stored file that is not withdrawn
and not set aside, grouped three ways (by source, by main colour, by near-duplicate cluster:
:mod:`collector.exports.review_groups`), and the set-aside files apart, each with the rule it
fails and why. Withdrawn files are left out (counted only) and their thumbnails deleted.

The pages load nothing from elsewhere: inline CSS, no script, thumbnails from the folder
beside them. To open smoothly with thousands of files each page holds ``per_page`` thumbnails
at most and is a file of its own (plain links between them), so a browser parses, lays out and
fetches one page's thumbnails only; thumbnails are lazy (``loading="lazy"``) with their size
in the ``img`` element (no layout shifts). Every value is escaped by Jinja2's autoescape;
colours reach a style attribute only as checked ``#rrggbb`` text.
"""

from __future__ import annotations

import os
from dataclasses import dataclass
from datetime import UTC, datetime
from pathlib import Path
from typing import TYPE_CHECKING, Any

from collector import __version__
from collector.errors import CollectionError
from collector.exports import review_groups as rg
from collector.exports.thumbnails import (
    THUMB_SIDE,
    THUMBS_DIR,
    Thumb,
    ThumbCounts,
    Wanted,
    ensure_thumbnails,
)
from collector.safe_text import document_value
from collector.storage.safe_paths import own_folder, remove_own_file, replace_file

if TYPE_CHECKING:
    import jinja2

    from collector.storage.review_queries import NearLink, ReviewFile
    from collector.storage.store import Store

SHEET = rg.SHEET
PER_PAGE = 150  # thumbnails per page: a few screens (common practice, no source)
CAUTION = ("Thumbnails show the pictures as stored and may show personal data (faces, names, "
           "handwriting, addresses): keep this sheet and its thumbs folder private, as you "
           "would the collection.")


@dataclass
class ReviewResult:
    """What :func:`write_review` wrote and counted."""

    out: Path
    sheet: Path
    files: int  # rows in the files table
    shown: int  # in the three views
    set_aside: int
    withdrawn: int  # left out
    thumbs: ThumbCounts
    pages: int


def check_review_folder(root: Path, out: Path) -> None:
    """Refuse an output folder that is a file, lies in the store, or holds anything but a
    previous review's own files (``review.html``, the ``review-*.html`` pages, ``thumbs/``).
    Inside the collection folder no part of it may be a symbolic link."""
    from collector.exports.datasheet import check_out_place

    check_out_place(root, out, "review")
    others = sorted(p.name for p in out.iterdir() if not _ours(p.name)) if out.is_dir() else []
    if others:
        raise CollectionError(
            f"{out} holds files a review did not write ({', '.join(others[:3])}"
            f"{', ...' if len(others) > 3 else ''}); nothing was written. Choose a new or "
            "empty folder, or the folder a previous review wrote")


def _ours(name: str) -> bool:
    """Whether a name in the output folder is one a review writes."""
    return name in (SHEET, THUMBS_DIR) or bool(rg.PAGE_FILES.match(name))


def _entry(row: ReviewFile, thumb: Thumb, href: str | None) -> rg.Entry:
    """One file as the sheet shows it."""
    colours = rg.parse_colours(row.colours)
    return rg.Entry(
        sha256=row.sha256, item_id=row.item_id, title=row.title or "(no title)",
        source=row.source or rg.UNKNOWN_SOURCE, licence=row.licence or "unknown",
        state=row.state or "recovered", thumb=f"{THUMBS_DIR}/{thumb.name}" if thumb.name else None,
        width=thumb.width, height=thumb.height, href=href, note=thumb.note,
        colours=rg.swatches(colours), colour_bin=rg.colour_bin(colours),
        rule=row.set_aside or "", reason=row.set_aside_detail or row.set_aside or "")


def build_views(entries: list[rg.Entry], links: list[NearLink], per_page: int) -> list[rg.View]:
    """The four parts of the sheet, paged."""
    shown = [e for e in entries if not e.rule]
    aside = [e for e in entries if e.rule]
    by_sha = {e.sha256: e for e in shown}
    views = [
        rg.View("source", "By source", "Every file shown once, under the source that first "
                "listed it.", rg.by_source(shown)),
        rg.View("colour", "By main colour", "Files binned by their largest colour (k-means in "
                "CIELAB, computed when stored): twelve hue sectors, each dark or light, then "
                "black, grey and white; files stored before colour facts were computed are "
                "'not measured'.", rg.by_colour(shown)),
        rg.View("near", "Near duplicates", "Each cluster: the original first, then the items "
                "found similar to it (state near_duplicate).",
                rg.near_clusters(links, by_sha)),
        rg.View("aside", "Set aside", "Files kept in the store but left out of releases "
                "because they fail a pixel rule, grouped by rule, each with its reason.",
                rg.set_aside_groups(aside)),
    ]
    return [rg.paginate(v, per_page) for v in views]


def _environment() -> jinja2.Environment:
    """Jinja2 with autoescape on for every value, control characters shown as escapes."""
    import jinja2

    return jinja2.Environment(
        loader=jinja2.PackageLoader("collector", "templates"), autoescape=True,
        finalize=document_value, undefined=jinja2.StrictUndefined, trim_blocks=True,
        lstrip_blocks=True)


def render_pages(views: list[rg.View], context: dict[str, Any]) -> dict[str, str]:
    """Every file of the sheet by name: each view's contents and pages."""
    env = _environment()
    contents, page = env.get_template("review_contents.html.j2"), env.get_template(
        "review_page.html.j2")
    common = {"views": views, "caution": CAUTION, **context}
    files = {}
    for view in views:
        files[view.contents] = contents.render(view=view, **common)
        for p in view.pages:
            files[p.file] = page.render(view=view, page=p, **common)
    return files


def _write_pages(out: Path, pages: dict[str, str]) -> None:
    """Write the pages; remove the page files of an earlier review not written now."""
    for name, text in pages.items():
        replace_file(out / name, text)
    for entry in os.scandir(out):
        if rg.PAGE_FILES.match(entry.name) and entry.name not in pages:
            remove_own_file(out / entry.name)


def _wanted(rows: list[ReviewFile], store: Store) -> list[Wanted]:
    return [Wanted(store.existing(r.sha256, r.ext), r.sha256, r.width, r.height, r.orientation)
            for r in rows]


def _make_folders(root: Path, out: Path) -> Path:
    """The output folder and its thumbs/ (inside the collection never through a link)."""
    from collector.exports.datasheet import make_out_folder

    make_out_folder(root, out)
    thumbs = out / THUMBS_DIR
    own_folder(out, thumbs, create=True)
    return thumbs


def write_review(root: Path, *, out: Path | None = None, per_page: int = PER_PAGE,
                 side: int = THUMB_SIDE, now: str | None = None) -> ReviewResult:
    """Write the review sheet of the collection at ``root`` (thumbnails made or reused)."""
    from collector.storage import review_queries
    from collector.storage.collection import open_collection

    if per_page < 1:
        raise CollectionError(f"--per-page must be at least 1, not {per_page}")
    collection = open_collection(root)
    name = collection.recipe().collection.name
    out = out if out is not None else root / "review"
    check_review_folder(root, out)
    with collection.ledger(readonly=True) as ledger:
        rows = list(review_queries.review_files(ledger))
        links = review_queries.near_links(ledger)
    kept = [r for r in rows if not r.withdrawn]
    thumbs_dir = _make_folders(root, out)
    thumbs, counts = ensure_thumbnails(_wanted(kept, collection.store), thumbs_dir, side=side)
    entries = []
    for row in kept:
        src = collection.store.existing(row.sha256, row.ext)
        href = os.path.relpath(src, out).replace(os.sep, "/") if src else None
        entries.append(_entry(row, thumbs[row.sha256], href))
    views = build_views(entries, links, per_page)
    stamp = now or datetime.now(UTC).isoformat(timespec="seconds").replace("+00:00", "Z")
    context = {"name": name, "generated_at": stamp, "version": __version__,
               "files": len(rows), "withdrawn": len(rows) - len(kept), "side": side}
    _write_pages(out, render_pages(views, context))
    return ReviewResult(out, out / SHEET, len(rows), views[0].count, views[3].count,
                        len(rows) - len(kept), counts, sum(len(v.pages) for v in views))
