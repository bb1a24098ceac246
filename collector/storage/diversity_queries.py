"""Reads of the ledger for the datasheet's diversity panel: counts over the files of the
release, aggregated in SQL (a few hundred rows at most whatever the collection's size).

The files counted are the datasheet's accepted files (withdrawn ones left out, see
:func:`collector.storage.datasheet_queries._accepted_from`) that are not set aside by a pixel
rule (``files.set_aside``): the panel describes what a release holds. A ledger from before a
column existed answers "nothing measured" for it. ``tests/test_sql_home.py`` lists this
module as a home of SQL.
"""

from __future__ import annotations

from typing import NamedTuple

from collector.storage.datasheet_queries import _accepted_from
from collector.storage.ledger import Ledger
from collector.storage.queries import _licence_key

# One row per dominant colour of ``files.colours`` ({"lab": [L, a, b], "share", "hex", "hue"}),
# each JSON value read once: the CTE is MATERIALIZED (SQLite 3.35) so that the bins below do
# not read it again for every CASE branch.
_COLOURS = (
    "colour(fid, l, c2, share, hue, grey) AS MATERIALIZED (SELECT fid, l, a * a + b * b, "
    "share, hue, grey FROM (SELECT f.rowid AS fid, json_extract(c.value, '$.lab[0]') AS l, "
    "json_extract(c.value, '$.lab[1]') AS a, json_extract(c.value, '$.lab[2]') AS b, "
    "coalesce(json_extract(c.value, '$.share'), 0) AS share, "
    "json_extract(c.value, '$.hue') AS hue, coalesce(f.greyscale, 0) AS grey "
    "{each}) WHERE l IS NOT NULL AND a IS NOT NULL AND b IS NOT NULL)")


class ColourCounts(NamedTuple):
    """The dominant colours of the files read (every ``step``-th measured file by rowid)."""

    hues: list[tuple[int, float]]  # (whole degrees, weight) of coloured clusters
    grey_weight: float  # weight of grey clusters in pictures that are not greyscale
    tones: list[tuple[int, int, float]]  # (lightness bin, chroma bin, weight)
    greyscale_files: int  # of all measured files
    measured_files: int  # files of the release with colour facts
    files_read: int  # the measured files whose colours were read


class PanelCounts(NamedTuple):
    """The counts the panel is computed from (:mod:`collector.exports.diversity`)."""

    files: int
    by_source: dict[str, int]
    by_creator: dict[str, int]  # "" for files without a creator
    by_licence: dict[str, int]
    by_date: dict[str, int]  # the date text as declared; "" for none
    colours: ColourCounts
    pixels: list[int]  # files per megapixel bin
    aspect: list[int]  # files per width/height bin
    near: tuple[int, int, int]  # clusters, largest cluster (files), near copies


def _release_from(ledger: Ledger) -> str:
    """FROM ... WHERE of the files the panel counts."""
    sql = _accepted_from(ledger)
    return sql + (" AND f.set_aside IS NULL" if "set_aside" in ledger.columns("files") else "")


def _bucket(expr: str, edges: tuple[float, ...]) -> tuple[str, tuple[float, ...]]:
    """SQL for the histogram bin of ``expr`` (0 below edges[0], len(edges) at or above the
    last) and its parameters."""
    whens = " ".join(f"WHEN {expr} < ? THEN {i}" for i in range(len(edges)))
    return f"CASE {whens} ELSE {len(edges)} END", tuple(edges)


def _file_counts(ledger: Ledger, pixel_edges: tuple[float, ...],
                 aspect_edges: tuple[float, ...]) -> dict[str, dict[str, int]]:
    """Files per source, creator, licence, date text, megapixel and aspect bin, in all
    (``all``), and greyscale and with colour facts (``colour``), in one pass over the release
    (a MATERIALIZED CTE read by each grouping)."""
    measured = "colours" in ledger.columns("files")
    pixels, p_params = _bucket("w * h", tuple(e * 1e6 for e in pixel_edges))
    aspect, a_params = _bucket("(1.0 * w) / h", aspect_edges)
    sized = "WHERE w > 0 AND h > 0"
    out: dict[str, dict[str, int]] = {}
    for kind, key, n in ledger.rows(
            "WITH r(src, cr, lic, dt, w, h, g, m) AS MATERIALIZED (SELECT s.name, "
            f"coalesce(trim(i.creator), ''), {_licence_key(ledger)}, "
            "coalesce(trim(i.date), ''), f.width, f.height, "
            f"{'f.greyscale, f.colours IS NOT NULL' if measured else 'NULL, 0'} "
            f"{_release_from(ledger)}) "
            "SELECT 'all', '', count(*) FROM r "
            "UNION ALL SELECT 'colour', 'greyscale', coalesce(sum(g = 1), 0) FROM r "
            "UNION ALL SELECT 'colour', 'measured', coalesce(sum(m), 0) FROM r "
            "UNION ALL SELECT 'source', src, count(*) FROM r GROUP BY 2 "
            "UNION ALL SELECT 'creator', cr, count(*) FROM r GROUP BY 2 "
            "UNION ALL SELECT 'licence', lic, count(*) FROM r GROUP BY 2 "
            "UNION ALL SELECT 'date', dt, count(*) FROM r GROUP BY 2 "
            f"UNION ALL SELECT 'pixels', {pixels}, count(*) FROM r {sized} GROUP BY 2 "
            f"UNION ALL SELECT 'aspect', {aspect}, count(*) FROM r {sized} GROUP BY 2",
            (*p_params, *a_params)):
        out.setdefault(str(kind), {})[str(key)] = int(n)
    return out


def _histogram(counts: dict[str, int], bins: int) -> list[int]:
    return [counts.get(str(i), 0) for i in range(bins)]


def _ordered(counts: dict[str, int]) -> dict[str, int]:
    return dict(sorted(counts.items(), key=lambda kv: (-kv[1], kv[0])))


def _colour_counts(ledger: Ledger, grey_chroma: float, lightness_edges: tuple[float, ...],
                   chroma_edges: tuple[float, ...], max_files: int, files: dict[str, int]
                   ) -> ColourCounts:
    """Hues of the coloured clusters of non-greyscale files, the grey clusters' weight, the
    (lightness, chroma) grid of every cluster. SQLite reads JSON at about 1 us a value, so
    beyond ``max_files`` measured files only every ``step``-th one (by rowid, spread over
    the whole collection) is read: a distribution, not a count. ``files``: the greyscale
    and measured files :func:`_file_counts` counted."""
    greyscale, measured = files.get("greyscale", 0), files.get("measured", 0)
    if not measured:
        return ColourCounts([], 0.0, [], greyscale, measured, 0)
    where = _release_from(ledger)
    step = max(1, -(-measured // max(1, max_files)))
    each = where.replace(
        "FROM files f", "FROM files f, json_each(CASE WHEN json_valid(f.colours) "
        "THEN f.colours END) c", 1) + " AND f.rowid % ? = 0"
    l_case, l_params = _bucket("l", lightness_edges)
    c_case, c_params = _bucket("c2", tuple(e * e for e in chroma_edges))
    out = ColourCounts([], 0.0, [], greyscale, measured, 0)
    for kind, first, second, weight in ledger.rows(
            f"WITH {_COLOURS.format(each=each)} "
            "SELECT 'read', count(DISTINCT fid), 0, 0 FROM colour "
            "UNION ALL SELECT 'hue', CAST(hue AS INTEGER) % 360, 0, sum(share) FROM colour "
            "WHERE NOT grey AND c2 >= ? AND hue IS NOT NULL GROUP BY 2 "
            "UNION ALL SELECT 'grey', 0, 0, coalesce(sum(share), 0) FROM colour "
            "WHERE NOT grey AND c2 < ? "
            f"UNION ALL SELECT 'tone', {l_case}, {c_case}, sum(share) FROM colour "
            "GROUP BY 2, 3", (step, grey_chroma ** 2, grey_chroma ** 2, *l_params, *c_params)):
        if kind == "read":
            out = out._replace(files_read=int(first))
        elif kind == "hue":
            out.hues.append((int(first), float(weight)))
        elif kind == "grey":
            out = out._replace(grey_weight=float(weight))
        else:
            out.tones.append((int(first), int(second), float(weight)))
    return out


def _near_clusters(ledger: Ledger) -> tuple[int, int, int]:
    """Near copies among the files counted, grouped by the original they lead to: a copy
    whose original was itself later found to be a near copy (demoted, its ``duplicate_of``
    set) is followed up that chain, at most 50 steps. Returns (clusters, the largest
    cluster's files with its original, near copies)."""
    found = ledger.rows(
        "WITH RECURSIVE member(id, up) AS (SELECT i.id, i.duplicate_of "
        f"{_release_from(ledger)} AND i.state = 'near_duplicate' "
        "AND i.duplicate_of IS NOT NULL), "
        "chain(id, up, depth) AS (SELECT id, up, 0 FROM member UNION ALL "
        "SELECT chain.id, x.duplicate_of, chain.depth + 1 FROM chain JOIN items x "
        "ON x.id = chain.up WHERE x.state = 'near_duplicate' AND x.duplicate_of IS NOT NULL "
        "AND chain.depth < 50), "
        # SQLite: a bare column beside max() takes its value from the row with the maximum.
        "root(id, up, depth) AS (SELECT id, up, max(depth) FROM chain GROUP BY id) "
        "SELECT count(*), coalesce(max(n), 0), coalesce(sum(n), 0) FROM "
        "(SELECT up, count(*) AS n FROM root GROUP BY up)")[0]
    clusters, largest, copies = (int(v or 0) for v in found)
    return clusters, largest + 1 if clusters else 0, copies


def panel_counts(ledger: Ledger, *, grey_chroma: float, lightness_edges: tuple[float, ...],
                 chroma_edges: tuple[float, ...], pixel_edges: tuple[float, ...],
                 aspect_edges: tuple[float, ...], max_colour_files: int) -> PanelCounts:
    """Everything the diversity panel counts, over the files of the release (megapixel
    edges in 10^6 pixels, aspect edges as width / height; the colours of at most about
    ``max_colour_files`` files are read)."""
    counts = _file_counts(ledger, pixel_edges, aspect_edges)
    return PanelCounts(
        files=counts["all"][""], by_source=_ordered(counts.get("source", {})),
        by_creator=_ordered(counts.get("creator", {})),
        by_licence=_ordered(counts.get("licence", {})),
        by_date=_ordered(counts.get("date", {})),
        colours=_colour_counts(ledger, grey_chroma, lightness_edges, chroma_edges,
                               max_colour_files, counts["colour"]),
        pixels=_histogram(counts.get("pixels", {}), len(pixel_edges) + 1),
        aspect=_histogram(counts.get("aspect", {}), len(aspect_edges) + 1),
        near=_near_clusters(ledger))
