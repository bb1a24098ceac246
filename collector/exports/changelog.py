"""The change log of a collection, drawn from the ledger: runs, recipe changes, withdrawals
(and their undoing) and re-check findings, each with its date, oldest first.

The datasheet shows it (question ``maintenance.changelog``); every event is a row the ledger
already keeps, so the log is never written by hand and cannot drift from the record.
"""

from __future__ import annotations

import json

from collector.exports.facts import ChangeEvent, LedgerState
from collector.exports.recipe_history import recipe_changes
from collector.storage import upkeep_queries as uq
from collector.storage.ledger import Ledger
from collector.storage.withdrawals import REASONS

FINDING_WORDS = {
    "changed_bytes": "the image's bytes changed (new version recorded, old kept)",
    "licence_changed": "the licence or rights changed",
    "gone": "gone from the archive",
    "moved": "moved (the image URL redirects)",
    "failed": "could not be checked",
}


def _run_kind(options: str | None) -> str:
    try:
        value = json.loads(options) if options else {}
    except ValueError:
        value = {}
    return "re-check" if isinstance(value, dict) and value.get("recheck") else "gather"


def change_log(ledger: Ledger) -> list[ChangeEvent]:
    """Every dated event of the collection, oldest first."""
    events: list[ChangeEvent] = []
    for run in uq.run_events(ledger):
        events.append({"date": run.started_at, "event": f"{_run_kind(run.options)} run",
                       "detail": f"run #{run.run_id}: {run.outcome or '?'}; "
                                 f"{run.stored} item(s) stored"})
    for change in recipe_changes(ledger)[1:]:
        events.append({"date": change.started_at, "event": "recipe changed",
                       "detail": f"run #{change.run_id} used recipe "
                                 f"{(change.sha256 or '?')[:12]} (before: "
                                 f"{(change.previous_sha256 or '?')[:12]})"})
    for w in uq.withdrawals(ledger):
        who = f", asked by {w.asked_by}" if w.asked_by else ""
        events.append({"date": w.recorded_at, "event": "withdrawal",
                       "detail": f"#{w.id} {w.target}: {REASONS.get(w.reason, w.reason)}{who}"
                                 + ("; bytes deleted" if w.bytes_deleted else "")})
        if w.undone_at:
            events.append({"date": w.undone_at, "event": "withdrawal undone",
                           "detail": f"#{w.id} {w.target}"})
    for o in uq.observations(ledger):
        if o.finding != "unchanged":
            was = f" ({o.old_value} -> {o.new_value})" if o.old_value or o.new_value else ""
            events.append({"date": o.observed_at, "event": "re-check finding",
                           "detail": f"item #{o.item_id}: "
                                     f"{FINDING_WORDS.get(o.finding, o.finding)}{was}"})
    events.sort(key=lambda e: e["date"] or "")
    return events


def ledger_state(ledger: Ledger) -> LedgerState:
    """Which ledger state a release is made from: the newest run and its last time."""
    run_id, when = uq.ledger_state(ledger)
    return {"run_id": run_id, "time": when}


def withdrawal_line(ledger: Ledger) -> str | None:
    """The status line about withdrawals in force (None when there are none)."""
    active = uq.withdrawals(ledger, active_only=True)
    if not active:
        return None
    deleted = sum(1 for w in active if w.bytes_deleted)
    return (f"Withdrawn: {len(active)} (left out of every release"
            + (f"; {deleted} with their bytes deleted" if deleted else "")
            + "); 'collector withdrawals' lists them")
