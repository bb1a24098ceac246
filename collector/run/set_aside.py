"""``collector apply-rules``: the recipe's pixel rules applied again to every stored file,
offline.

The rules (``[[pixel_rules]]``, :mod:`collector.checks.pixel_rules`) judge the colour and tone
facts the ledger already holds; nothing is decoded and nothing is requested (this module
imports no fetching code: ``pyproject.toml``'s import contract says so). A file that now
fails a rule is set aside (``files.set_aside``, ``set_aside_detail``), one set aside that no
longer fails any is brought back; each change is a ``rule_changes`` row with its time and the
recipe's SHA-256, written in one transaction with the change itself. A dry run computes the
same plan and writes nothing. Files without facts (stored before the facts were kept) are
not judged and are counted as such.
"""

from __future__ import annotations

from collections import Counter
from dataclasses import dataclass, field

from collector.checks.pixel_rules import PixelRules
from collector.config.recipe import Recipe
from collector.storage import upkeep_queries
from collector.storage.collection import Collection
from collector.storage.ledger import Ledger, utc_now

MOVES_SHOWN = 50  # moves listed one by one in the summary; the ledger keeps them all


@dataclass(frozen=True)
class Move:
    """One file whose set-aside state changes: ``before``/``after`` name the rule (None: not
    set aside); ``detail`` is the new reason (None when brought back)."""

    sha256: str
    source: str | None
    source_key: str | None
    before: str | None
    after: str | None
    detail: str | None

    @property
    def kind(self) -> str:
        """``set aside``, ``brought back`` or ``reason changed``."""
        if self.before is None:
            return "set aside"
        return "brought back" if self.after is None else "reason changed"


@dataclass
class RulesReport:
    """What applying the rules did (or, in a dry run, would do)."""

    rules: int
    files: int
    recipe_sha256: str
    dry_run: bool
    moves: list[Move] = field(default_factory=list)
    aside_after: Counter[str] = field(default_factory=Counter)  # rule -> files set aside
    no_facts: int = 0  # files without any colour fact: not judged
    undecided: Counter[str] = field(default_factory=Counter)  # rule -> files it could not judge

    def count(self, kind: str) -> int:
        """How many moves of one kind (see :attr:`Move.kind`)."""
        return sum(1 for m in self.moves if m.kind == kind)


def plan(ledger: Ledger, recipe: Recipe) -> RulesReport:
    """Judge every stored file by the recipe's pixel rules; the moves that would follow."""
    rules = PixelRules(recipe.pixel_rules)
    files = upkeep_queries.files_to_judge(ledger)
    report = RulesReport(len(rules.rules), len(files), recipe.sha256, dry_run=True)
    for f in files:
        if all(v is None for v in f.facts.values()):
            report.no_facts += 1  # not judged: its state stays as it is
            after, detail = f.set_aside, f.set_aside_detail
        else:
            verdict = rules.verdict(f.source, f.facts)
            after, detail = verdict.rule, verdict.detail
            report.undecided.update(verdict.undecided)
        if after is not None:
            report.aside_after[after] += 1
        if (after, detail) != (f.set_aside, f.set_aside_detail):
            report.moves.append(Move(f.sha256, f.source, f.source_key, f.set_aside, after,
                                     detail))
    return report


def apply_rules(collection: Collection, *, dry_run: bool = False) -> RulesReport:
    """Apply the recipe's pixel rules to the whole collection (see the module docstring).
    Takes the gather lock unless ``dry_run``; raises RecipeError for a recipe with problems
    and CollectionError when a gather holds the lock."""
    recipe = collection.recipe(check_source_kinds=False)
    if dry_run:
        with collection.ledger(readonly=True) as ledger:
            return plan(ledger, recipe)
    with collection.gather_lock("apply-rules"), collection.ledger() as ledger:
        return judge_again(ledger, recipe)


def judge_again(ledger: Ledger, recipe: Recipe) -> RulesReport:
    """:func:`plan` and :func:`record`: the rules applied to every stored file and the moves
    made, under the caller's gather lock (``apply-rules``, and ``remeasure`` after it has
    measured)."""
    report = plan(ledger, recipe)
    record(ledger, recipe, report)
    return report


def record(ledger: Ledger, recipe: Recipe, report: RulesReport) -> None:
    """Make the planned moves and their ``rule_changes`` rows in one transaction (the
    recipe's text is kept in ``recipes`` beside them)."""
    report.dry_run = False
    when = utc_now()
    with ledger.transaction():
        if report.moves:
            ledger.add_row("recipes", {"sha256": recipe.sha256, "text": recipe.kept_text(),
                                       "first_used_at": when})
        for move in report.moves:
            ledger.update_file(move.sha256, {"set_aside": move.after,
                                             "set_aside_detail": move.detail})
            ledger.add_row("rule_changes", {
                "changed_at": when, "sha256": move.sha256, "rule_before": move.before,
                "rule_after": move.after, "detail": move.detail,
                "recipe_sha256": recipe.sha256})


def _who(move: Move) -> str:
    if move.source is None:
        return f"{move.sha256[:12]} (no item yet)"
    return f"{move.source}:{move.source_key} ({move.sha256[:12]})"


def report_lines(report: RulesReport) -> list[str]:
    """The summary ``apply-rules`` prints."""
    verb = "would be" if report.dry_run else "were"
    lines = [f"{'dry run: ' if report.dry_run else ''}{report.files:,} stored files judged by "
             f"{report.rules} pixel rule{'s' if report.rules != 1 else ''} (recipe "
             f"{report.recipe_sha256[:12]}); nothing was requested"
             + ("; nothing was changed" if report.dry_run else "")]
    lines.append(f"  {report.count('set aside')} {verb} set aside, "
                 f"{report.count('brought back')} brought back, "
                 f"{report.count('reason changed')} with a new reason, "
                 f"{report.files - len(report.moves)} unchanged")
    if report.aside_after:
        lines.append("  set aside afterwards: " + ", ".join(
            f"{rule} {n}" for rule, n in sorted(report.aside_after.items())))
    if report.no_facts:
        lines.append(f"  {report.no_facts:,} file{' has' if report.no_facts == 1 else 's have'} "
                     "no colour facts (stored before they were kept, or gathered with "
                     "dominant_colours = 0): no rule judged them, their state is unchanged")
    if report.undecided:
        lines.append("  lacking a fact some rules need, not judged by them: " + ", ".join(
            f"{rule} {n}" for rule, n in sorted(report.undecided.items())))
    for move in report.moves[:MOVES_SHOWN]:
        why = (f'pixel rule "{move.after}": {move.detail}' if move.after
               else f'no rule sets it aside now (was: pixel rule "{move.before}")')
        lines.append(f"  {move.kind}: {_who(move)}: {why}")
    if len(report.moves) > MOVES_SHOWN:
        lines.append(f"  ... and {len(report.moves) - MOVES_SHOWN:,} more"
                     + ("" if report.dry_run else " (the ledger's rule_changes table)"))
    return lines
