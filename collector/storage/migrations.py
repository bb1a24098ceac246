"""The ledger's schema history: numbered migrations, each run once by ``Ledger.migrate``.

Migration N turns a version N-1 ledger into version N through sqlite-utils' table API; it is
only ever called by :meth:`collector.storage.ledger.Ledger.migrate`, inside one transaction and
the ledger's one translation of sqlite errors. Add a schema change as the next number here; a
migration never changes once released.
"""

from __future__ import annotations

from collections.abc import Callable

import sqlite_utils

__all__ = ["MIGRATIONS"]


def _migration_1(db: sqlite_utils.Database) -> None:
    """Create the first version of every table."""
    db.table("runs").create({
        "id": int, "started_at": str, "ended_at": str, "recipe_sha256": str, "options": str,
        "outcome": str, "tool_version": str,
    }, pk="id")
    db.table("sources").create({"id": int, "name": str, "kind": str, "config": str}, pk="id")
    db.table("sources").create_index(["name"], unique=True)
    db.table("items").create({
        "id": int, "source_id": int, "source_key": str, "image_url": str, "page_url": str,
        "title": str, "creator": str, "licence_raw": str, "licence_url": str, "spdx_id": str,
        "date": str, "metadata": str, "state": str, "reason": str, "detail": str,
        "file_sha256": str, "duplicate_of": int, "near_distance": int, "near_mirrored": int,
        "parent_sha256": str, "crop_box": str, "local_path": str, "run_id": int,
        "created_at": str, "updated_at": str,
    }, pk="id", foreign_keys=[("source_id", "sources", "id")])
    db.table("items").create_index(["source_id", "source_key"], unique=True)
    db.table("items").create_index(["image_url"])
    db.table("items").create_index(["state"])
    db.table("items").create_index(["file_sha256"])
    db.table("fetches").create({
        "id": int, "run_id": int, "item_id": int, "purpose": str, "url": str, "host": str,
        "status": int, "bytes": int, "started_at": str, "ended_at": str, "waited_s": float,
        "attempt": int, "robots_verdict": str, "robots_rule": str, "error": str, "etag": str,
        "last_modified": str, "content_type": str, "from_cache": int,
    }, pk="id")
    db.table("fetches").create_index(["item_id"])
    db.table("fetches").create_index(["host"])
    db.table("files").create({
        "sha256": str, "size": int, "ext": str, "format": str, "mime": str, "width": int,
        "height": int, "mode": str, "bit_depth": int, "alpha": int, "frames": int,
        "orientation": int, "phash": int, "phash_mirror": int, "hash_algo": str,
        "first_item_id": int, "stored_at": str, "exif": str, "rights": str, "flags": str,
    }, pk="sha256")
    db.table("hosts").create({
        "host": str, "robots_url": str, "robots_fetched_at": str, "robots_status": int,
        "robots_sha256": str, "robots_body": str, "effective_budget": str,
        "parked_until": float, "failures": int,
    }, pk="host")
    db.table("notes").create({
        "id": int, "run_id": int, "source_id": int, "kind": str, "url": str, "message": str,
        "created_at": str,
    }, pk="id")


def _migration_2(db: sqlite_utils.Database) -> None:
    """The ledger's identity and the store's write-ahead intents.

    ``ledger_facts`` holds ``collection_id`` (a uuid4, also written to the folder's
    ``collection.id``) so a ledger from another collection is recognised; a migrated ledger
    gets it from ``collection.check_ledger``, which knows the folder. ``store_intents``
    names a file while it is being placed in (or removed from) the store: crash recovery
    removes a stored file without a ``files`` row only when an intent names it.
    """
    db.table("ledger_facts").create({"name": str, "value": str}, pk="name")
    db.table("store_intents").create({"sha256": str, "item_id": int, "started_at": str},
                                     pk="sha256")


def _migration_3(db: sqlite_utils.Database) -> None:
    """Image facts that were computed but not kept: the embedded ICC profile's description
    and the stored pixel density. Rows stored before stay NULL (unknown)."""
    files = db.table("files")
    present = files.columns_dict
    for name, kind in (("icc_profile", str), ("dpi_x", float), ("dpi_y", float)):
        if name not in present:  # a ledger mended by hand may have some already
            files.add_column(name, kind)


def _migration_4(db: sqlite_utils.Database) -> None:
    """What a source's last complete listing handed on to the next run
    (``sources.base.ListingState``, e.g. the OAI-PMH responseDate to harvest from), one row
    per source, with the SHA-256 of the source table it was listed with; a source without a
    row, or whose table changed since, lists everything."""
    if "listing_states" in db.table_names():  # a ledger mended by hand may have it already
        return
    db.table("listing_states").create({
        "source_id": int, "value": str, "config_sha256": str, "run_id": int, "saved_at": str,
    }, pk="source_id", foreign_keys=[("source_id", "sources", "id")])


def _migration_5(db: sqlite_utils.Database) -> None:
    """An item's RightsStatements.org statement, kept apart from its SPDX licence: the
    statement's id (``NoC-US``, ``InC``...; collector.checks.rights_statements); and how the
    size of its image was chosen when the source negotiated it (``size_request``, JSON: the
    IIIF image service, its full size, the size asked for and why). Rows recorded before stay
    NULL (not read)."""
    items = db.table("items")
    for name in ("rights_statement", "size_request"):
        if name not in items.columns_dict:
            items.add_column(name, str)


def _migration_6(db: sqlite_utils.Database) -> None:
    """Reservations against text-and-data mining: every signal seen (``reservation_signals``:
    where, the field, its raw value, what we decided, when), the mechanisms checked for each
    item (``items.reservation_checks``, a JSON list) and each origin's tdmrep.json, cached
    like robots.txt (``hosts.tdmrep_*``)."""
    db.table("reservation_signals").create({
        "id": int, "run_id": int, "item_id": int, "source_id": int, "place": str, "url": str,
        "name": str, "value": str, "meaning": str, "decision": str, "seen_at": str,
    }, pk="id", if_not_exists=True)  # a ledger mended by hand may have it already
    db.table("reservation_signals").create_index(["item_id"], if_not_exists=True)
    items, hosts = db.table("items"), db.table("hosts")
    if "reservation_checks" not in items.columns_dict:
        items.add_column("reservation_checks", str)
    present = hosts.columns_dict
    for name, kind in (("tdmrep_url", str), ("tdmrep_fetched_at", str), ("tdmrep_state", str),
                       ("tdmrep_status", int), ("tdmrep_detail", str), ("tdmrep_body", str)):
        if name not in present:
            hosts.add_column(name, kind)


def _migration_7(db: sqlite_utils.Database) -> None:
    """Keeping a published collection honest over time.

    ``withdrawals``: a file or item taken out of every release, with the reason, who asked and
    when; undoing one fills ``undone_at`` (the row stays). ``files.removed_at``: the bytes were
    deleted from the store on purpose (the row and its facts stay). ``recipes``: the full text
    of every recipe a run used, by its sha256 (``runs.recipe_sha256``). ``observations``: what
    a re-check saw for an item, one row per look, never overwritten.
    """
    # A ledger mended by hand may have some of these already: each is added only if absent.
    tables = set(db.table_names())
    if "withdrawals" not in tables:
        db.table("withdrawals").create({
            "id": int, "item_id": int, "sha256": str, "target": str, "reason": str,
            "note": str, "asked_by": str, "asked_on": str, "recorded_at": str,
            "bytes_deleted": int, "undone_at": str, "undone_by": str, "undo_note": str,
        }, pk="id")
        db.table("withdrawals").create_index(["item_id"])
        db.table("withdrawals").create_index(["sha256"])
    if "removed_at" not in db.table("files").columns_dict:
        db.table("files").add_column("removed_at", str)
    if "recipes" not in tables:
        db.table("recipes").create({"sha256": str, "text": str, "first_used_at": str},
                                   pk="sha256")
    if "observations" not in tables:
        db.table("observations").create({
            "id": int, "run_id": int, "item_id": int, "observed_at": str, "finding": str,
            "status": int, "old_value": str, "new_value": str, "new_sha256": str,
            "detail": str,
        }, pk="id")
        db.table("observations").create_index(["item_id"])


def _migration_8(db: sqlite_utils.Database) -> None:
    """Pixel facts for training data: the share of pixels that are not fully opaque, and the
    estimated native size of an image that looks enlarged (its own size otherwise). Rows stored
    before stay NULL (not measured)."""
    files = db.table("files")
    present = files.columns_dict
    for name, kind in (("transparent_share", float), ("native_width", int),
                       ("native_height", int)):
        if name not in present:
            files.add_column(name, kind)


def _migration_9(db: sqlite_utils.Database) -> None:
    """Pages a source asked to keep for re-use across runs (``kept_pages``: a IIIF image
    service's info.json), with when they were fetched; re-asked once older than the source
    says (``Fetcher.get_page(keep_for=...)``)."""
    db.table("kept_pages").create({
        "url": str, "fetched_at": str, "status": int, "content_type": str, "body": bytes,
    }, pk="url", if_not_exists=True)


def _migration_10(db: sqlite_utils.Database) -> None:
    """Colour and tone facts of every stored file for curation (collector.checks.colour_facts,
    computed at ingest on the small picture made for hashing): ``colours`` is a JSON list of
    the dominant colours (``lab``, ``share``, ``hex``, ``hue``), largest share first; and the
    file's set-aside state: ``set_aside`` names the pixel rule a kept file fails (NULL: not
    set aside), ``set_aside_detail`` says why in the recipe's words. Rows stored before stay
    NULL (not measured)."""
    files = db.table("files")
    present = files.columns_dict
    for name, kind in (("greyscale", int), ("brightness", float), ("contrast", float),
                       ("colourfulness", float), ("sharpness", float),
                       ("background_share", float), ("colours", str), ("set_aside", str),
                       ("set_aside_detail", str)):
        if name not in present:
            files.add_column(name, kind)


def _migration_11(db: sqlite_utils.Database) -> None:
    """What ``collector apply-rules`` changed (``rule_changes``): one row per file whose
    set-aside state it changed (``rule_before`` -> ``rule_after``, NULL: not set aside), with
    the new reason, when, and the SHA-256 of the recipe whose pixel rules it applied."""
    db.table("rule_changes").create({
        "id": int, "changed_at": str, "sha256": str, "rule_before": str, "rule_after": str,
        "detail": str, "recipe_sha256": str,
    }, pk="id", if_not_exists=True)
    db.table("rule_changes").create_index(["sha256"], if_not_exists=True)


def _migration_12(db: sqlite_utils.Database) -> None:
    """Crop windows: the pHash of 16 windows of each stored picture
    (``files.window_hashes``, 16 unsigned 64-bit little-endian values) and their layout
    (``files.window_algo``, collector.checks.phash.WINDOW_ALGO). Rows stored before stay NULL:
    such files are not found as crops until their window hashes are filled in."""
    files = db.table("files")
    present = files.columns_dict
    for name, kind in (("window_hashes", bytes), ("window_algo", str)):
        if name not in present:
            files.add_column(name, kind)


def _migration_13(db: sqlite_utils.Database) -> None:
    """A host's latest contact (``max(ended_at)`` of its fetches, asked when a run first
    contacts a host and for every cluster task) read from an index on (host, ended_at) instead
    of every fetch row of the host; it also serves every lookup by host, so the index on host
    alone goes (one index less to keep up per request)."""
    fetches = db.table("fetches")
    fetches.create_index(["host", "ended_at"], if_not_exists=True)
    for index in fetches.indexes:
        if index.columns == ["host"]:
            fetches.drop_index(index.name)


def _migration_14(db: sqlite_utils.Database) -> None:
    """The way a file's colour and tone facts were computed (``files.colour_algo``,
    collector.checks.colour_facts.COLOUR_ALGO). Rows measured before stay NULL: the first way,
    which ``collector remeasure`` computes again."""
    files = db.table("files")
    if "colour_algo" not in files.columns_dict:
        files.add_column("colour_algo", str)


MIGRATIONS: dict[int, Callable[[sqlite_utils.Database], None]] = {
    1: _migration_1, 2: _migration_2, 3: _migration_3, 4: _migration_4, 5: _migration_5,
    6: _migration_6, 7: _migration_7, 8: _migration_8, 9: _migration_9, 10: _migration_10,
    11: _migration_11, 12: _migration_12, 13: _migration_13, 14: _migration_14}
