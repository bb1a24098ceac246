"""The run's de-duplication decisions (collector.run.dedup), checked as pure functions.

These are collector's own rules (common practice, no source): the item listed first (recipe
source order, then listing order) is the original, whatever download finished first; the
nearest look-alike wins, ties go to the earlier-listed item.
"""

from __future__ import annotations

import pytest

from collector.run.dedup import (
    Demote,
    Keep,
    NearCandidate,
    NearCopy,
    SameBytes,
    TakeOver,
    closest,
    demote_fields,
    exact_verdict,
    listing_rank,
    near_detail,
    near_verdict,
    take_over_plan,
)

ORDER = {10: 0, 20: 1, 30: 2}  # source id -> position in the recipe


@pytest.mark.parametrize(("source_id", "item_id", "expected"), [
    (10, 7, (0, 7)),
    (30, 1, (2, 1)),
    (99, 4, (3, 4)),    # a source no longer in the recipe ranks after all of them
    (None, 5, (3, 5)),  # an item whose source is unknown, likewise
])
def test_listing_rank_is_source_position_then_item_id(source_id: int | None, item_id: int,
                                                      expected: tuple[int, int]) -> None:
    """The rank is the source's recipe position, then the item id."""
    assert listing_rank(ORDER, source_id, item_id) == expected


def test_an_earlier_source_outranks_an_earlier_item_id() -> None:
    """An item of the first source is listed before any item of the second, whatever its id."""
    assert listing_rank(ORDER, 10, 50) < listing_rank(ORDER, 20, 2)


@pytest.mark.parametrize(("item", "item_rank", "first", "first_rank", "expected"), [
    (5, (0, 5), 9, (1, 9), TakeOver(5, 9)),   # listed earlier than the holder: takes over
    (9, (1, 9), 5, (0, 5), SameBytes(5)),     # listed later: a duplicate of the holder
    (5, (0, 5), 5, (0, 5), SameBytes(5)),     # never its own duplicate's original
    (5, (0, 5), None, None, SameBytes(None)),  # bytes nobody holds yet
    (3, (1, 3), 8, (0, 8), SameBytes(8)),     # a lower id in a later source does not win
])
def test_exact_verdict(item: int, item_rank: tuple[int, int], first: int | None,
                       first_rank: tuple[int, int] | None,
                       expected: SameBytes | TakeOver) -> None:
    """Same bytes: the earlier-listed item keeps them, the other is its exact duplicate."""
    assert exact_verdict(item, item_rank, first, first_rank) == expected


def test_take_over_plan_moves_the_outcome_to_the_new_item() -> None:
    """The new item gets the old one's outcome; the old one becomes its exact duplicate."""
    old = {"state": "near_duplicate", "reason": "near_duplicate", "detail": "d",
           "duplicate_of": 3, "near_distance": 4, "near_mirrored": 1}
    plan = take_over_plan(7, old)
    assert plan.new_item == {"state": "near_duplicate", "reason": "near_duplicate",
                             "detail": "d", "duplicate_of": 3, "near_distance": 4,
                             "near_mirrored": 1}
    assert plan.old_item == {"state": "duplicate", "reason": "exact_duplicate",
                             "detail": "the same bytes as an item listed earlier",
                             "duplicate_of": 7, "near_distance": None, "near_mirrored": None}
    assert plan.was == "near_duplicate"


def test_take_over_of_a_missing_row_stores_the_new_item() -> None:
    """Without the old row the new item is simply stored (and nothing was counted before)."""
    plan = take_over_plan(7, {})
    assert plan.new_item["state"] == "stored"
    assert plan.was is None


def near(sha: str, distance: int, original: int, rank: tuple[int, int],
         mirrored: bool = False) -> NearCandidate:
    """A look-alike of distance ``distance`` belonging to item ``original``."""
    return NearCandidate(sha, distance, mirrored, original, rank)


@pytest.mark.parametrize(("candidates", "expected"), [
    ([], None),
    ([near("a", 5, 1, (0, 1)), near("b", 3, 2, (1, 2))], "b"),  # nearest first
    ([near("a", 3, 4, (1, 4)), near("b", 3, 2, (0, 2))], "b"),  # tie: earlier-listed item
    ([near("a", 3, 2, (0, 2)), near("b", 3, 2, (0, 2))], "a"),  # full tie: first given
])
def test_closest(candidates: list[NearCandidate], expected: str | None) -> None:
    """The closest look-alike is the nearest, then the one listed first."""
    best = closest(candidates)
    assert (best.sha256 if best else None) == expected


def test_near_detail_names_the_kind_of_copy() -> None:
    """The detail says mirrored or resized/re-encoded, the original and the distance."""
    assert near_detail(True, 4, 2) == "probably a mirrored copy of item 4 (distance 2)"
    assert near_detail(False, 4, 0) == ("probably a resized or re-encoded copy of item 4 "
                                        "(distance 0)")


LATER = near("s", 2, 9, (1, 9))    # belongs to item 9, listed after the new item (0, 5)
EARLIER = near("s", 2, 3, (0, 3))  # belongs to item 3, listed before it


@pytest.mark.parametrize(("best", "state", "drop", "expected"), [
    (None, None, False, Keep()),
    (LATER, "stored", False, Demote(9, LATER)),
    (LATER, "stored", True, Demote(9, LATER)),   # dropping is applied when demoting
    (EARLIER, "stored", False, NearCopy(3, 2, False, near_detail(False, 3, 2), True)),
    (EARLIER, "stored", True,
     NearCopy(3, 2, False, near_detail(False, 3, 2) + "; not stored (recipe: drop)", False)),
    # A later-listed look-alike that is not itself a stored original is not demoted.
    (LATER, "near_duplicate", False, NearCopy(9, 2, False, near_detail(False, 9, 2), True)),
    (LATER, None, False, NearCopy(9, 2, False, near_detail(False, 9, 2), True)),
])
def test_near_verdict(best: NearCandidate | None, state: str | None, drop: bool,
                      expected: Keep | Demote | NearCopy) -> None:
    """A new file is kept, demotes a later-listed stored original, or is its near copy."""
    assert near_verdict((0, 5), best, state, drop=drop) == expected


@pytest.mark.parametrize(("drop", "suffix"), [(False, ""), (True, "; not kept (recipe: drop)")])
def test_demote_fields(drop: bool, suffix: str) -> None:
    """A demoted original points at the new item with the match's distance and mirroring."""
    fields = demote_fields(5, near("s", 3, 9, (1, 9), mirrored=True), drop=drop)
    assert fields == {"state": "near_duplicate", "reason": "near_duplicate",
                      "detail": "probably a mirrored copy of item 5 (distance 3)" + suffix,
                      "duplicate_of": 5, "near_distance": 3, "near_mirrored": True}
