"""The datasheet's answer about reservations against text-and-data mining: the facts (from
the ledger and the recipe), the blocks the renderers show, and the Croissant RAI wording.

What the run does with each signal is :mod:`collector.run.reservations`; this module only
reports it.
"""

from __future__ import annotations

from typing import Any

from collector.checks.reservations import FILE_CHECKS, PAGE_CHECKS, RESERVATION_REASONS
from collector.config.recipe import Recipe
from collector.exports.facts import DatasheetFacts, ReservationSummary
from collector.storage import datasheet_queries
from collector.storage.ledger import Ledger

Block = tuple[Any, ...]
CAUTION = ("Honouring reservations against text-and-data mining is a good-faith practice, not "
           "legal advice; local law decides what a reservation means and whether a recorded "
           "permission covers a use.")


def reservation_summary(ledger: Ledger, recipe: Recipe) -> ReservationSummary:
    """The reservation facts of a collection."""
    found = datasheet_queries.reservation_facts(ledger, RESERVATION_REASONS)
    tokens = list(recipe.reservations.robots_tokens)
    checked = [*PAGE_CHECKS, *FILE_CHECKS]
    if tokens:
        checked.insert(len(PAGE_CHECKS), f"robots.txt groups of {', '.join(tokens)}")
    return {
        "checked": checked,
        "signals": [{"place": p, "name": n, "meaning": m, "items": c, "excluded": x}
                    for p, n, m, c, x in found.signals],
        "excluded": {f"{state}/{reason}": n for state, reason, n in found.excluded},
        "tdmrep_files": dict(found.files),
        "permissions": dict(recipe.reservations.permission),
        "permissions_used": dict(found.permissions),
        "when_unknown": recipe.reservations.when_unknown,
    }


def reservation_blocks(f: DatasheetFacts) -> list[Block]:
    """The datasheet blocks answering ``collection.reservations``."""
    r = f.get("reservations")
    if r is None:
        return [("p", "Not recorded for this collection.")]
    excluded = sum(r["excluded"].values())
    out: list[Block] = [
        ("p", "Checked for every item gathered from the web (local files: the file's own "
              "metadata only): " + "; ".join(r["checked"]) + "."),
        ("table", ["excluded by (state/reason)", "items"],
         [[k, v] for k, v in r["excluded"].items()] or [["(none)", 0]]),
        ("p", f"{excluded} item(s) were left out because of a reservation or an unreadable "
              "tdmrep.json (while it cannot be read, items are "
              + ("deferred" if r["when_unknown"] == "defer" else "gathered and marked unknown")
              + ": recipe [reservations] when_unknown)."),
    ]
    if r["signals"]:
        out.append(("p", "Signals seen, and the items each one excluded (it decided):"))
        out.append(("table", ["where", "field", "meaning", "items", "items excluded"],
                    [[s["place"], s["name"], s["meaning"], s["items"], s["excluded"]]
                     for s in r["signals"]]))
    if r["tdmrep_files"]:
        out.append(("table", ["tdmrep.json outcome", "hosts"],
                    [[k, v] for k, v in r["tdmrep_files"].items()]))
    for name, reference in r["permissions"].items():
        used = " (used: reserved items were gathered)" if name in r["permissions_used"] else ""
        out.append(("p", f"Permission recorded for source {name}: {reference}{used}."))
    out.append(("p", CAUTION))
    return out


def rai_reservations(f: DatasheetFacts) -> str:
    """One RAI preprocessing sentence about reservations (Croissant RAI 1.0 has no property
    of its own for them)."""
    r = f.get("reservations")
    if r is None:
        return "Reservations against text-and-data mining were not recorded."
    excluded = ", ".join(f"{k} {v}" for k, v in r["excluded"].items()) or "none"
    permits = "; ".join(f"{k}: {v}" for k, v in r["permissions_used"].items())
    return ("Machine-readable reservations against text-and-data mining were honoured before "
            f"and after download ({'; '.join(r['checked'])}); items excluded: {excluded}."
            + (f" Gathered despite a reservation under a recorded permission: {permits}."
               if permits else "") + " " + CAUTION)
