"""Which item is "the original": the run's de-duplication decisions, as pure functions.

Which item of a group of duplicates is the original must not depend on which download finished
first: the item listed first (recipe source order, then listing order) is the original. When a
later-listed item was stored first, the earlier one takes its place. These functions only
decide; they read nothing and write nothing. :mod:`collector.run.ingest` looks the facts up in
the ledger, asks here, and applies the answer (the decisions come back as data).
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

from collector.checks.likeness import KIND_WORDS

Rank = tuple[int, int]  # (position of the item's source in the recipe, item id): lower wins


def listing_rank(source_order: Mapping[int, int], source_id: int | None, item_id: int) -> Rank:
    """Where an item stands in listing order: its source's position in the recipe, then its
    id (ids grow in listing order). A source no longer in the recipe ranks after all others."""
    position = source_order.get(source_id, len(source_order)) if source_id is not None \
        else len(source_order)
    return position, item_id


# -- exact duplicates (the same bytes, or the same image URL) ---------------------------------
@dataclass(frozen=True)
class SameBytes:
    """The item is an exact duplicate of ``original`` (None: the bytes belong to no item)."""

    original: int | None


@dataclass(frozen=True)
class TakeOver:
    """``new_id`` was listed before ``old_id``, which holds the same bytes: ``new_id``
    becomes the item the file belongs to, ``old_id`` its exact duplicate."""

    new_id: int
    old_id: int


def exact_verdict(item_id: int, item_rank: Rank, first_id: int | None,
                  first_rank: Rank | None) -> SameBytes | TakeOver:
    """An item brought bytes (or an image URL) that ``first_id`` already holds: who keeps
    them? The earlier-listed of the two; an item is never its own duplicate's original."""
    if (first_id is not None and first_id != item_id and first_rank is not None
            and item_rank < first_rank):
        return TakeOver(item_id, first_id)
    return SameBytes(first_id)


@dataclass(frozen=True)
class TakeOverPlan:
    """The item fields a take-over writes: the new item takes the old one's outcome, the
    old one becomes its exact duplicate. ``was`` is the old item's state (for the counts)."""

    new_item: dict[str, Any]
    old_item: dict[str, Any]
    was: str | None


def take_over_plan(new_id: int, old: Mapping[str, Any]) -> TakeOverPlan:
    """What ``new_id`` and the item it takes over from (row ``old``) become."""
    new_item = {"state": old.get("state") or "stored", "reason": old.get("reason"),
                "detail": old.get("detail"), "duplicate_of": old.get("duplicate_of"),
                "near_distance": old.get("near_distance"),
                "near_mirrored": old.get("near_mirrored")}
    old_item = {"state": "duplicate", "reason": "exact_duplicate",
                "detail": "the same bytes as an item listed earlier", "duplicate_of": new_id,
                "near_distance": None, "near_mirrored": None}
    return TakeOverPlan(new_item, old_item, old.get("state"))


# -- near duplicates (perceptual hash within the recipe's distance) ---------------------------
@dataclass(frozen=True)
class NearCandidate:
    """A stored file close to the new one, with the item it belongs to and that item's rank."""

    sha256: str
    distance: int
    mirrored: bool
    original_id: int
    rank: Rank
    how: str = ""  # the kind of copy the second look found (likeness.KIND_WORDS; "": by
    # ``mirrored``)


def closest(candidates: Sequence[NearCandidate]) -> NearCandidate | None:
    """The nearest file; at equal distance the one whose item was listed first (the first
    of equals in the order given)."""
    if not candidates:
        return None
    return min(candidates, key=lambda c: (c.distance, c.rank))


def near_detail(mirrored: bool, original_id: int, distance: int, how: str = "",
                reverse: bool = False) -> str:
    """The detail line of a near duplicate; ``how`` is the kind of copy the second look found
    (collector.checks.likeness.KIND_WORDS; empty: from ``mirrored``). ``reverse``: the item
    is the picture item ``original_id`` is a copy of (a crop is not symmetric)."""
    how = how or ("mirror" if mirrored else "same")
    if reverse and how == "crop":
        return (f"probably the picture item {original_id} was cropped from "
                f"(distance {distance})")
    words = KIND_WORDS.get(how, "resized/re-encoded").replace("/", " or ")
    return f"probably a {words} copy of item {original_id} (distance {distance})"


@dataclass(frozen=True)
class Keep:
    """No earlier-listed look-alike: the item's file is stored as an original."""


@dataclass(frozen=True)
class Demote:
    """The item is stored, and the stored original it resembles (listed later) becomes its
    near copy."""

    original_id: int
    match: NearCandidate


@dataclass(frozen=True)
class NearCopy:
    """The item is a near copy of ``original_id``; ``keep_file`` false: not stored (recipe:
    drop). ``detail`` is the item's final detail line."""

    original_id: int
    distance: int
    mirrored: bool
    detail: str
    keep_file: bool
    how: str = ""


def near_verdict(item_rank: Rank, best: NearCandidate | None, original_state: str | None,
                 *, drop: bool) -> Keep | Demote | NearCopy:
    """Decide a new file against its closest look-alike ``best`` (whose item is in state
    ``original_state``; None when that row is gone)."""
    if best is None:
        return Keep()
    if original_state == "stored" and item_rank < best.rank:
        return Demote(best.original_id, best)
    detail = near_detail(best.mirrored, best.original_id, best.distance, best.how)
    if drop:
        detail += "; not stored (recipe: drop)"
    return NearCopy(best.original_id, best.distance, best.mirrored, detail,
                    keep_file=not drop, how=best.how)


def demote_fields(new_id: int, match: NearCandidate, *, drop: bool) -> dict[str, Any]:
    """The item fields of an original that turned out to be a near copy of ``new_id``."""
    detail = near_detail(match.mirrored, new_id, match.distance, match.how, reverse=True)
    return {"state": "near_duplicate", "reason": "near_duplicate",
            "detail": detail + ("; not kept (recipe: drop)" if drop else ""),
            "duplicate_of": new_id, "near_distance": match.distance,
            "near_mirrored": match.mirrored}
