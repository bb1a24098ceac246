"""Withdrawing a file or an item from the collection, and undoing it.

A withdrawal is a ledger row (``withdrawals``): what was named, why (one of
:data:`REASONS`), who asked and when. From then on the file is left out of every release and
export, ``trace`` says so, and ``gather`` does not fetch the item again. With ``delete_bytes``
(personal data) the stored file is also removed from the store; the ledger keeps its row and
facts and marks ``files.removed_at``, so the ledger-vs-store check
(:func:`collector.storage.collection.check_ledger`) and crash recovery do not expect it there.
The removal runs under a store intent like every other store change: the row is marked and
the intent committed first, then the file is removed, then the intent dropped; a crash in
between leaves a file that recovery removes. Undoing is recorded on the same row
(``undone_at``); undoing a withdrawal whose bytes were deleted puts the item back to pending,
so the next ``gather`` fetches it again.

What a withdrawal names (``target``): a path to an image file (its bytes' sha256), a sha256
prefix of at least 8 hex digits, ``item:ID``, or ``key:SOURCE:KEY`` (the source's name and
the item's key in it).
"""

from __future__ import annotations

import hashlib
import re
from dataclasses import dataclass
from datetime import date
from pathlib import Path

from collector.errors import CollectionError
from collector.storage import upkeep_queries as uq
from collector.storage.collection import Collection
from collector.storage.ledger import Ledger, utc_now
from collector.storage.safe_paths import remove_own_file

REASONS = {
    "creator-request": "request by the creator",
    "licence-error": "licence error",
    "personal-data": "personal data",
    "other": "other",
}
_HEX = re.compile(r"[0-9a-f]{8,64}")


@dataclass(frozen=True)
class Target:
    """What a withdrawal names: one item, or one file (every item that brought it)."""

    label: str
    item_id: int | None
    sha256: str | None


def _file_sha256(path: Path) -> str:
    digest = hashlib.sha256()  # FIPS 180-4
    with path.open("rb") as fh:
        while chunk := fh.read(1 << 20):
            digest.update(chunk)
    return digest.hexdigest()


def resolve(ledger: Ledger, target: str) -> Target:
    """The item or file ``target`` names; a clear CollectionError when it names none or
    several."""
    text = target.strip()
    if text.startswith("item:"):
        return _by_item(ledger, text, text[5:])
    if text.startswith("key:"):
        source, sep, key = text[4:].partition(":")
        ids = uq.item_ids_of_key(ledger, source, key) if sep else []
        if not ids:
            raise CollectionError(f"no item is listed as {text!r}; write key:SOURCE:KEY with "
                                  "the source's name from the recipe and the item's key")
        return _by_item(ledger, text, str(ids[0]))
    path = Path(text)
    if path.is_file():
        return _by_file(ledger, text, _file_sha256(path))
    prefix = text.lower()
    if _HEX.fullmatch(prefix):
        found = uq.files_with_prefix(ledger, prefix)
        if len(found) > 1:
            raise CollectionError(f"{text!r} is the start of {len(found)} stored files' "
                                  "sha256; give more digits")
        if found:
            return _by_file(ledger, text, found[0])
    raise CollectionError(
        f"{text!r} names nothing in this collection. Name an image file, a sha256 prefix (at "
        "least 8 hex digits) of a stored file, item:ID or key:SOURCE:KEY")


def _by_item(ledger: Ledger, label: str, number: str) -> Target:
    item = uq.item_briefs(ledger, item_id=int(number)) if number.isdigit() else []
    if not item:
        raise CollectionError(f"no item {number!r} in this collection ({label!r})")
    return Target(label, item[0].id, item[0].file_sha256)


def _by_file(ledger: Ledger, label: str, sha256: str) -> Target:
    if ledger.file(sha256) is None:
        raise CollectionError(f"{label!r}: no stored file of this collection has these bytes "
                              f"(sha256 {sha256[:12]}...)")
    return Target(label, None, sha256)


def _checked_day(text: str | None, what: str) -> str | None:
    if text is None:
        return None
    try:
        return date.fromisoformat(text).isoformat()
    except ValueError:
        raise CollectionError(f"{what} {text!r} is not a date; write it as YYYY-MM-DD "
                              "(ISO 8601)") from None


def withdraw(collection: Collection, ledger: Ledger, target: str, *, reason: str,
             asked_by: str | None = None, asked_on: str | None = None,
             note: str | None = None, delete_bytes: bool = False) -> uq.Withdrawal:
    """Record the withdrawal of ``target`` (see the module docstring) and, with
    ``delete_bytes``, remove its stored file; returns the recorded withdrawal."""
    if reason not in REASONS:
        raise CollectionError(f"unknown reason {reason!r}; use one of {', '.join(REASONS)}")
    day = _checked_day(asked_on, "--asked-on")
    found = resolve(ledger, target)
    sha = found.sha256
    already = (uq.item_is_withdrawn(ledger, found.item_id) if found.item_id is not None
               else sha is not None and uq.active_withdrawal_of_file(ledger, sha) is not None)
    if already:
        raise CollectionError(f"{target!r} is already withdrawn; see 'collector withdrawals "
                              f"{collection.root}'")
    removable = delete_bytes and sha is not None and sha not in uq.removed_sha256s(ledger)
    with ledger.transaction():
        new_id = ledger.add_row("withdrawals", {
            "item_id": found.item_id, "sha256": sha, "target": found.label, "reason": reason,
            "note": note, "asked_by": asked_by, "asked_on": day, "recorded_at": utc_now(),
            "bytes_deleted": bool(delete_bytes and sha is not None)})
        if removable and sha is not None:
            ledger.add_store_intent(sha, found.item_id)
            ledger.mark_file_removed(sha, utc_now())
    if removable and sha is not None:
        _remove_bytes(collection, ledger, sha)
    recorded = uq.withdrawal(ledger, new_id)
    assert recorded is not None
    return recorded


def _remove_bytes(collection: Collection, ledger: Ledger, sha256: str) -> None:
    """Remove the stored file (the row is marked and an intent committed already)."""
    path = collection.store.find(sha256)  # a link in the store is refused, never followed
    if path is not None:
        remove_own_file(path)
    ledger.drop_store_intent(sha256)


def undo(ledger: Ledger, withdrawal_id: int, *, undone_by: str | None = None,
         note: str | None = None) -> uq.Withdrawal:
    """Undo a withdrawal (recorded on its row). When its bytes were deleted, the file's row
    is forgotten and its items go back to pending: the next gather fetches them again."""
    found = uq.withdrawal(ledger, withdrawal_id)
    if found is None:
        raise CollectionError(f"no withdrawal #{withdrawal_id}; 'collector withdrawals' lists "
                              "them")
    if found.undone_at is not None:
        raise CollectionError(f"withdrawal #{withdrawal_id} was already undone on "
                              f"{found.undone_at}")
    with ledger.transaction():
        ledger.undo_withdrawal(withdrawal_id, {"undone_at": utc_now(), "undone_by": undone_by,
                                               "undo_note": note})
        sha = found.sha256
        if sha is not None and sha in uq.removed_sha256s(ledger) and (
                uq.active_withdrawal_of_file(ledger, sha) is None):
            ledger.forget_missing_file(sha)
    done = uq.withdrawal(ledger, withdrawal_id)
    assert done is not None
    return done


def describe(w: uq.Withdrawal) -> str:
    """One line for a withdrawal: "withdrawn on <date>: <reason>" and who asked."""
    when = (w.recorded_at or "")[:10]
    words = f"withdrawn on {when}: {REASONS.get(w.reason, w.reason)}"
    if w.asked_by or w.asked_on:
        words += " (asked" + (f" by {w.asked_by}" if w.asked_by else "") + (
            f" on {w.asked_on}" if w.asked_on else "") + ")"
    if w.note:
        words += f"; {w.note}"
    if w.bytes_deleted:
        words += "; bytes deleted from the store"
    if w.undone_at:
        words += f"; undone on {w.undone_at[:10]}"
    return words


def listing(ledger: Ledger) -> list[str]:
    """One line per withdrawal, undone ones too, oldest first."""
    return [f"#{w.id}  {w.target}  " + (f"sha256 {w.sha256[:12]}  " if w.sha256 else "")
            + describe(w) for w in uq.withdrawals(ledger)]
