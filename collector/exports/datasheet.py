"""The datasheet export: facts from the ledger, the curator's answers, and the release folder.

``collector datasheet DIR`` writes a folder with ``datasheet.md``/``datasheet.html`` (structured
after "Datasheets for Datasets", Gebru et al.: seven sections of questions, asked here in our own
words), ``croissant.json`` (MLCommons Croissant 1.0 + RAI 1.0, see
:mod:`collector.exports.croissant`),
``provenance.csv`` (one row per file) and ``attribution.csv`` (title, author, source, licence per
file: the Creative Commons attribution practice). With ``with_images`` the accepted files are
hard-linked (or copied) into ``images/`` so the folder describes itself.

Every number is gathered by :func:`_facts` from the ledger's read queries
(:mod:`collector.storage.queries`, over a read-only :class:`~collector.storage.ledger.Ledger`)
into typed plain data (:class:`collector.exports.facts.DatasheetFacts`); the renderers
(:mod:`collector.exports.datasheet_render`) only format those numbers.
Questions only
the curator can answer (:mod:`collector.exports.datasheet_questions`) come from an answers file or
are shown as "Not answered by the curator"; nothing is made up. Rows are streamed from
SQLite, so memory stays flat for large collections.
"""

from __future__ import annotations

import csv
import errno
import hashlib
import json
import os
import shutil
import stat
from collections.abc import Iterator
from dataclasses import asdict, dataclass, field
from datetime import UTC, datetime
from pathlib import Path
from typing import TYPE_CHECKING, Any, TypedDict

from collector import DISTRIBUTION, __version__
from collector.checks.licences import licence_allowed, licence_conditions, licence_deed_url
from collector.checks.rights_statements import ALLOW_PREFIX, STATEMENTS
from collector.config.recipe import Recipe
from collector.errors import CollectionError, LedgerError, LedgerUnusable
from collector.exports import changelog, release
from collector.exports.datasheet_questions import load_answers
from collector.exports.datasheet_reservations import reservation_summary
from collector.exports.diversity import panel_from_ledger
from collector.exports.facts import (
    DatasheetFacts,
    LicenceFacts,
    PictureDates,
    ResolutionBins,
    Timeline,
)
from collector.safe_text import csv_cell, csv_row
from collector.storage import datasheet_queries, queries, upkeep_queries
from collector.storage.datasheet_queries import Timeframe
from collector.storage.ledger import Ledger
from collector.storage.safe_paths import link_refused, new_temp_file, own_folder, replace_file

if TYPE_CHECKING:
    from collector.storage.store import Store

# Flags from collector.checks.images that point at personal data (GPS position, camera serial
# number,
# camera owner's name); "licence_conflict" comes from collector.run.ingest when embedded rights
# metadata contradicts the declared licence.
LOCAL_HOST = datasheet_queries.LOCAL_HOST  # how files read from a local folder are counted by host
PERSONAL_FLAGS = ("gps", "camera_serial", "owner_name")
CONFLICT_FLAG = "licence_conflict"

# The files this export writes; --overwrite replaces only these (and files under images/).
OUR_FILES = ("datasheet.md", "datasheet.html", "croissant.json", "provenance.csv",
             "attribution.csv")
IMAGES_DIR = "images"

PROVENANCE_COLUMNS = (
    "file_name", "sha256", "source", "source_key", "page_url", "image_url", "title", "creator",
    "licence_raw", "spdx_id", "licence_url", "fetched_at", "width", "height", "format", "mime",
    "size", "flags", "derived_from",
)
ATTRIBUTION_COLUMNS = ("file_name", "title", "author", "source", "licence", "licence_url")



# --- facts from the ledger -------------------------------------------------------------------
def _facts(ledger: Ledger, recipe: Recipe, now: str) -> DatasheetFacts:
    """Every number of the datasheet: ledger reads from :mod:`collector.storage.queries`,
    the rest from the recipe."""
    items = datasheet_queries.item_facts(ledger)
    acc = datasheet_queries.accepted_facts(ledger)
    frame = datasheet_queries.timeframe(ledger)
    missing = datasheet_queries.missing_facts(ledger)
    return {
        "generated_at": now, "tool_version": __version__, "distribution": DISTRIBUTION,
        "collection": {"name": recipe.collection.name,
                       "description": recipe.collection.description,
                       "curator": recipe.collection.curator,
                       "contact": recipe.contact, "product_token": recipe.product_token},
        "items": items, "accepted": acc, "missing": missing,
        "not_unicode": datasheet_queries.not_unicode_facts(ledger),
        "flags": datasheet_queries.flag_counts(ledger),
        "flagged": datasheet_queries.flagged_facts(ledger, PERSONAL_FLAGS, CONFLICT_FLAG),
        "duplicates": {
            "exact": items["by_state"].get("duplicate", 0), "near_kept": acc["near_kept"],
            "near_dropped": datasheet_queries.near_dropped(ledger),
            "policy": recipe.images.near_duplicates,
            "near_distance": recipe.images.near_distance,
        },
        "licences": [_licence_facts(spdx, n) for spdx, n in acc["by_licence"].items()],
        "timeframe": frame,
        "picture_dates": _picture_dates(ledger, acc["files"] - missing["no_date"]),
        "requests": datasheet_queries.request_facts(ledger),
        "hosts": datasheet_queries.host_facts(ledger),
        "host_sources": datasheet_queries.host_sources(ledger),
        "resolution_bins": _resolution_bins(ledger, acc["width"]["max"], acc["height"]["max"]),
        "timeline": _timeline(ledger, frame),
        "sources": [{"name": s.name, "kind": s.kind, "items": s.items, "accepted": s.accepted,
                     **_kind_facts(s.kind), "where": _where(recipe, s.name)}
                    for s in datasheet_queries.source_counts(ledger)],
        "runs": datasheet_queries.run_facts(ledger),
        "notes": datasheet_queries.note_counts(ledger),
        "reservations": reservation_summary(ledger, recipe),
        "diversity": panel_from_ledger(ledger, recipe.datasheet.near_duplicate_warning),
        "policy": {
            "budgets": {k: getattr(recipe.budgets, k) for k in (
                "min_interval", "requests_per_hour", "bytes_per_hour", "max_connections",
                "max_attempts", "max_retry_after")},
            "licence_allow": list(recipe.licences.allow),
            "allow_unknown": recipe.licences.allow_unknown,
            "images": asdict(recipe.images),
            "max_image_bytes": recipe.network.max_image_bytes,
            "pixel_rules": [dict(rule) for rule in recipe.pixel_rules],
            "set_aside": dict(queries.set_aside_counts(ledger)),
        },
    }


class _KindFacts(TypedDict):
    mechanism: str
    collection_type: str


def _kind_facts(kind: str) -> _KindFacts:
    """How a source kind obtains items (a phrase) and its Croissant RAI collection type, from
    the kind itself; a kind that is no longer installed is named as it is, type "Others"."""
    from collector import sources

    found = sources.find_kind(kind)
    if found is None:
        return {"mechanism": kind, "collection_type": "Others"}
    return {"mechanism": found.mechanism, "collection_type": found.collection_type}


def _picture_dates(ledger: Ledger, dated: int) -> PictureDates:
    earliest, latest = datasheet_queries.picture_dates(ledger)
    return {"earliest": earliest, "latest": latest, "dated": dated}


def _where(recipe: Recipe, name: str) -> list[str]:
    """Where a source's archive is, read from its recipe table without knowing its kind: the
    http(s) URLs among its top-level values (secret parameters hidden), else the values that
    read as folder paths (a slash, no space, no wildcard); [] for a source no longer in the
    recipe."""
    from collector.urls import redact

    everywhere = list(recipe.network.secret_params)
    for table in recipe.shown_settings()["sources"]:
        if table.get("name") != name:
            continue
        texts = [x for k, v in table.items() if k not in ("name", "kind")
                 for x in (v if isinstance(v, list) else [v]) if isinstance(x, str)]
        secret = [*(table.get("secret_params") or ()), *everywhere]
        found = [redact(x, secret) for x in texts if x.startswith(("http://", "https://"))]
        return found or [x for x in texts
                         if "/" in x and not any(c.isspace() or c in "*?[" for c in x)]
    return []


def _resolution_bins(ledger: Ledger, max_w: int | None, max_h: int | None) -> ResolutionBins:
    """Accepted files counted on a grid of width x height cells (about 30 per axis)."""
    top = max(max_w or 0, max_h or 0)
    step = 1
    while top / step > 30:
        step *= 2
    return {"step": step, "cells": datasheet_queries.resolution_cells(ledger, step)}


def _timeline(ledger: Ledger, frame: Timeframe) -> Timeline:
    """Requests and stored files per second, minute, hour or day (by the time frame's length)."""
    unit, width = "day", 10
    if frame["start"] and frame["end"]:
        try:
            span = (datetime.fromisoformat(frame["end"].replace("Z", "+00:00"))
                    - datetime.fromisoformat(frame["start"].replace("Z", "+00:00")))
        except ValueError:
            span = None
        if span is not None and span.total_seconds() <= 300:
            unit, width = "second", 19  # a short run (the demo) still shows its shape
        elif span is not None and span.total_seconds() <= 3 * 3600:
            unit, width = "minute", 16
        elif span is not None and span.total_seconds() <= 4 * 86400:
            unit, width = "hour", 13
    by_host = datasheet_queries.requests_per_host(ledger, width)
    requests: dict[str, int] = {}
    for counts in by_host.values():  # the totals from the per-host counts: one query less
        for slot, n in counts.items():
            requests[slot] = requests.get(slot, 0) + n
    return {"unit": unit, "requests": dict(sorted(requests.items())),
            "stored": datasheet_queries.stored_per(ledger, width), "by_host": by_host}


# --- the release: CSVs and images ------------------------------------------------------------
@dataclass
class ReleaseCounts:
    """What went into (and was left out of) the release."""

    files: int = 0
    bytes: int = 0
    excluded_licence: int = 0
    excluded_flagged: int = 0
    missing_files: int = 0
    linked: int = 0
    copied: int = 0
    by_ext: dict[str, dict[str, Any]] = field(default_factory=dict)  # ext -> {mime, files}
    by_licence: dict[str, int] = field(default_factory=dict)
    excluded: dict[str, int] = field(default_factory=dict)  # release.EXCLUSION_REASONS -> n


def _licence_facts(key: str, files: int) -> LicenceFacts:
    """Conditions and link of one licence key: an SPDX id, 'unknown', or ``rs:<id>`` for a
    RightsStatements.org statement (its English name and statement page)."""
    statement = STATEMENTS.get(key.removeprefix(ALLOW_PREFIX)) if key.startswith(
        ALLOW_PREFIX) else None
    if statement is not None:
        return {"spdx_id": key, "files": files,
                "conditions": [f"rights statement: {statement.name} (not a licence)"],
                "deed_url": statement.page_url}
    spdx = None if key == "unknown" else key
    return {"spdx_id": key, "files": files, "conditions": licence_conditions(spdx),
            "deed_url": licence_deed_url(spdx)}


def _statement_words(code: str | None) -> str | None:
    """``rights statement: <English name>`` for a RightsStatements.org id, else None."""
    statement = STATEMENTS.get(code or "")
    return f"rights statement: {statement.name}" if statement else None



def iter_release_rows(ledger: Ledger, recipe: Recipe, counts: ReleaseCounts, *,
                      exclude_flagged: bool, selection: release.Selection | None = None
                      ) -> Iterator[dict[str, Any]]:
    """Stream the files the release holds: accepted, passing the licence policy (and the
    flag filter), then the selection and its defaults (:func:`collector.exports.release.select`).

    Counts what is left out; the caller counts what it keeps."""
    withdrawn = upkeep_queries.withdrawn_sha256s(ledger)
    rows = _policy_rows(ledger, recipe, counts, exclude_flagged=exclude_flagged)
    return release.select(rows, selection or release.Selection(), withdrawn, counts.excluded,
                          upkeep_queries.set_aside_sha256s(ledger))


def _policy_rows(ledger: Ledger, recipe: Recipe, counts: ReleaseCounts, *,
                 exclude_flagged: bool) -> Iterator[dict[str, Any]]:
    """The accepted files that pass the licence policy (and the flag filter)."""
    allowed_cache: dict[str | None, bool] = {}
    for r in datasheet_queries.release_rows(ledger):
        (sha, ext, mime, fmt, width, height, size, flags_json, stored_at, source, key,
         page_url, image_url, title, creator, licence_raw, spdx, licence_url, fetched_at,
         statement, state, item_date, metadata, parent_sha256) = r
        decided_by = spdx or (f"{ALLOW_PREFIX}{statement}" if statement else None)
        if decided_by not in allowed_cache:
            allowed_cache[decided_by] = licence_allowed(
                spdx, recipe.licences.allow, recipe.licences.allow_unknown,
                None if spdx else STATEMENTS.get(statement or ""))[0]
        if not allowed_cache[decided_by]:
            counts.excluded_licence += 1
            continue
        try:
            flags = json.loads(flags_json) if flags_json else []
        except ValueError:
            flags = []
        if exclude_flagged and any(fl in PERSONAL_FLAGS or fl == CONFLICT_FLAG
                                   for fl in flags):
            counts.excluded_flagged += 1
            continue
        yield {
            "file_name": release.readable_name(source, key, sha, ext), "sha256": sha,
            "source": source,
            "source_key": key, "page_url": page_url or "", "image_url": image_url or "",
            "title": title or "", "creator": creator or "", "licence_raw": licence_raw or "",
            "spdx_id": spdx or "", "licence_url": licence_url or licence_deed_url(spdx) or "",
            "fetched_at": fetched_at or stored_at or "", "width": width, "height": height,
            "format": fmt or "", "mime": mime or "", "size": size,
            "flags": ";".join(flags), "derived_from": "", "_ext": ext, "_statement": statement,
            "_state": state, "_date": item_date,
            "_metadata": release.metadata_of(metadata), "_parent_sha256": parent_sha256,
            "_stored_at": stored_at,
        }


def _count_kept(counts: ReleaseCounts, row: dict[str, Any]) -> None:
    counts.files += 1
    counts.bytes += row["size"] or 0
    slot = counts.by_ext.setdefault(row["_ext"], {"mime": row["mime"], "files": 0})
    slot["files"] += 1
    statement = row.get("_statement")
    spdx = row["spdx_id"] or (f"{ALLOW_PREFIX}{statement}" if statement else "unknown")
    counts.by_licence[spdx] = counts.by_licence.get(spdx, 0) + 1


def link_or_copy(src: Path, dst: Path) -> str:
    """Hard-link ``src`` to ``dst``; copy where links are impossible. Returns 'linked'/'copied'.

    An existing ``dst`` with the same size is kept (names are content hashes); a link there
    is refused, and a copy goes through a new temp file, so nothing is written through a link."""
    try:
        info = os.lstat(dst)
    except FileNotFoundError:
        info = None
    if info is not None:
        if stat.S_ISLNK(info.st_mode):
            raise link_refused(dst)
        if info.st_size == src.stat().st_size:
            return "kept"
        raise CollectionError(f"{dst} exists with different content; remove it or choose an "
                              "empty output folder")
    try:
        os.link(src, dst)  # src: a plain stored file (Store.existing)
        return "linked"
    except OSError as exc:
        # EXDEV: another filesystem; EPERM/ENOTSUP/EMLINK: links not allowed or too many.
        if exc.errno not in (errno.EXDEV, errno.EPERM, errno.ENOTSUP, errno.EMLINK,
                             errno.EACCES):
            raise
    fd, tmp = new_temp_file(dst.parent, f".{dst.name}.", ".part")
    try:
        with open(src, "rb") as source, os.fdopen(fd, "wb") as copy:
            shutil.copyfileobj(source, copy)
        os.replace(tmp, dst)
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise
    return "copied"


class HashingWriter:
    """A text sink that writes UTF-8 to a file and hashes what it writes (FIPS 180-4 SHA-256)."""

    def __init__(self, fh: Any) -> None:
        self.fh = fh
        self.digest = hashlib.sha256()

    def write(self, text: str) -> int:
        data = text.encode("utf-8")
        self.digest.update(data)
        self.fh.write(data)
        return len(text)



def _atomic_write_text(path: Path, text: str) -> None:
    """Write a whole file through a new temp file (O_EXCL, 0644) in the same folder and
    os.replace (which replaces a link at ``path``; it never writes through one)."""
    replace_file(path, text)


def check_out_folder(root: Path, out: Path, *, overwrite: bool) -> None:
    """Refuse an output folder that is a file, lies in the store, or holds files (unless
    --overwrite, which replaces only this export's own files); see :func:`check_out_place`."""
    check_out_place(root, out, "datasheet")
    if out.is_dir() and any(out.iterdir()) and not overwrite:
        raise CollectionError(
            f"{out} is not empty; nothing was written. Choose an empty or new folder, or pass "
            "--overwrite to replace this export's own files (nothing else is touched or "
            "deleted)")


def check_out_place(root: Path, out: Path, default: str) -> None:
    """Refuse an output folder (of an export whose default is DIR/``default``) that is a file
    or lies in the store. Inside the collection folder no part of it may be a symbolic link
    (refused); a folder outside it is the user's own choice."""
    if _inside(root, out):
        own_folder(_absolute(root), _absolute(out))
    store = (root / "files").resolve()
    target = out.resolve()
    if target == store or store in target.parents:
        raise CollectionError(f"{out} is inside the collection's file store {store}; choose "
                              f"another output folder (e.g. the default DIR/{default})")
    if out.exists() and not out.is_dir():
        raise CollectionError(f"{out} exists and is not a folder; choose another --out")


def _absolute(path: Path) -> Path:
    return Path(os.path.abspath(path))


def _inside(root: Path, out: Path) -> bool:
    """Whether ``out``, as written (links not resolved), lies in the collection folder."""
    return _absolute(out).is_relative_to(_absolute(root))


def make_out_folder(root: Path, out: Path) -> None:
    """Create the output folder; inside the collection never through a link."""
    if _inside(root, out):
        own_folder(_absolute(root), _absolute(out), create=True)
    else:
        out.mkdir(parents=True, exist_ok=True)


@dataclass
class ExportResult:
    """What :func:`export_datasheet` wrote."""

    out: Path
    counts: ReleaseCounts
    facts: DatasheetFacts
    croissant_problems: list[str]
    files: list[Path]


def write_release(ledger: Ledger, recipe: Recipe, out: Path, store_root: Path, *,
                  with_images: bool, exclude_flagged: bool,
                  selection: release.Selection | None = None) -> tuple[ReleaseCounts, str]:
    """Stream provenance.csv and attribution.csv (and link images/); returns the counts and
    the sha256 of provenance.csv."""
    from collector.storage.store import Store

    store = Store(store_root)
    images = out / IMAGES_DIR
    if with_images:
        own_folder(out, images, create=True)  # images/ as a link: refused
    prov_fd, prov_tmp = new_temp_file(out, ".provenance.csv.", ".part")
    attr_fd, attr_tmp = new_temp_file(out, ".attribution.csv.", ".part")
    try:
        counts, digest = _write_rows(ledger, recipe, store, images, prov_fd, attr_fd,
                                     with_images=with_images, exclude_flagged=exclude_flagged,
                                     selection=selection)
        os.replace(prov_tmp, out / "provenance.csv")
        os.replace(attr_tmp, out / "attribution.csv")
    finally:
        prov_tmp.unlink(missing_ok=True)
        attr_tmp.unlink(missing_ok=True)
    if with_images:
        present = sum(1 for e in os.scandir(images) if not e.name.startswith("."))
        if present != counts.files:
            raise CollectionError(
                f"{images} holds {present - counts.files} file(s) that are not part of this "
                "release (left from an earlier export?); collector never deletes them. Remove "
                "them, or export into an empty folder, then run again")
    return counts, digest


def _write_rows(ledger: Ledger, recipe: Recipe, store: Store, images: Path,
                prov_fd: int, attr_fd: int, *, with_images: bool,
                exclude_flagged: bool, selection: release.Selection | None = None
                ) -> tuple[ReleaseCounts, str]:
    """Stream the rows into the two open temp files (and link images/)."""
    counts = ReleaseCounts()
    with os.fdopen(prov_fd, "wb") as prov_fh, os.fdopen(attr_fd, "w", encoding="utf-8",
                                                         newline="") as attr_fh:
        sink = HashingWriter(prov_fh)
        prov = csv.DictWriter(sink, PROVENANCE_COLUMNS, extrasaction="ignore")
        attr = csv.writer(attr_fh)
        prov.writeheader()
        attr.writerow(ATTRIBUTION_COLUMNS)
        for row in iter_release_rows(ledger, recipe, counts, exclude_flagged=exclude_flagged,
                                     selection=selection):
            if with_images:
                src = store.existing(row["sha256"], row["_ext"])
                if src is None:
                    counts.missing_files += 1
                    continue
                flat = _flattened(src, images, row, recipe.images.release_background)
                how = "derived" if flat else link_or_copy(src, images / row["file_name"])
                if how == "linked":
                    counts.linked += 1
                elif how == "copied":
                    counts.copied += 1
            _count_kept(counts, row)
            prov.writerow(csv_row(row))  # cells neutralised (OWASP CSV Injection)
            # CC attribution practice (standards.md section 8): title, author, source, licence.
            attr.writerow([csv_cell(v) for v in (
                row["file_name"], row["title"], row["creator"],
                row["page_url"] or row["image_url"] or row["source"],
                row["spdx_id"] or _statement_words(row["_statement"]) or row["licence_raw"]
                or "unknown", row["licence_url"])])
    return counts, sink.digest.hexdigest()


def _flattened(src: Path, images: Path, row: dict[str, Any], colour: str) -> bool:
    """With [images] release_background set, a transparent image is released as a PNG
    flattened onto that colour (collector.exports.flatten); the row then describes the derived
    file and names the stored original in ``derived_from``."""
    if not colour:
        return False
    from collector.exports.flatten import flatten_release_copy

    flat = flatten_release_copy(src, images, row["file_name"].rsplit(".", 1)[0], colour)
    if flat is None:
        return False
    row.update(file_name=flat.file_name, derived_from=row["sha256"], sha256=flat.sha256,
               size=flat.size, format="PNG", mime="image/png", _ext="png",
               flags=";".join(filter(None, [row["flags"], f"flattened:{colour}"])))
    return True


def export_datasheet(root: Path, *, out: Path | None = None, answers_path: Path | None = None,
                     with_images: bool = False, exclude_flagged: bool = False,
                     selection: release.Selection | None = None,
                     overwrite: bool = False, now: str | None = None) -> ExportResult:
    """Write the datasheet folder for the collection at ``root``."""
    from collector.exports import croissant, plots
    from collector.exports.datasheet_render import render_html, render_markdown
    from collector.storage.collection import open_collection

    collection = open_collection(root)
    recipe = collection.recipe()
    answers = load_answers(answers_path)
    out = out if out is not None else root / "datasheet"
    check_out_folder(root, out, overwrite=overwrite)
    make_out_folder(root, out)
    with collection.ledger(readonly=True) as ledger:
        try:
            counts, prov_sha = write_release(ledger, recipe, out, collection.store.root,
                                             with_images=with_images,
                                             exclude_flagged=exclude_flagged,
                                             selection=selection)
            facts = _facts(ledger, recipe, now or datetime.now(UTC)
                           .isoformat(timespec="seconds").replace("+00:00", "Z"))
            facts["changelog"] = changelog.change_log(ledger)
            facts["selection"] = {
                "conditions": (selection or release.Selection()).describe(),
                "excluded": dict(counts.excluded), "ledger_state": changelog.ledger_state(ledger)}
        except LedgerUnusable:
            raise
        except LedgerError as exc:  # the ledger translated the sqlite error; add the way out
            raise LedgerError(f"{exc}. If the file is damaged, restore a backup of it (see "
                              "README, Troubleshooting)") from exc
    facts["release"] = {
        "files": counts.files, "bytes": counts.bytes, "with_images": with_images,
        "exclude_flagged": exclude_flagged, "excluded_licence": counts.excluded_licence,
        "excluded_flagged": counts.excluded_flagged, "missing_files": counts.missing_files,
        "linked": counts.linked, "copied": counts.copied, "by_ext": counts.by_ext,
        "by_licence": dict(sorted(counts.by_licence.items(), key=lambda kv: (-kv[1], kv[0]))),
        "provenance_sha256": prov_sha,
    }
    doc = croissant.build_croissant(facts, answers)
    problems = croissant.precheck(doc)
    _atomic_write_text(out / "croissant.json", json.dumps(doc, indent=2, ensure_ascii=False)
                       + "\n")
    facts["croissant_problems"] = problems
    _atomic_write_text(out / "datasheet.md", render_markdown(facts, answers))
    _atomic_write_text(out / "datasheet.html",
                       render_html(facts, answers, plots.render_plots(facts)))
    written = [out / name for name in OUR_FILES]
    return ExportResult(out, counts, facts, problems, written)
