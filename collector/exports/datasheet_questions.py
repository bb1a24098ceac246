"""The datasheet's questions and the curator's answers to them.

Seven sections of questions structured after "Datasheets for Datasets" (Gebru et al.), asked
in our own words. Each question is answered from the ledger (kind A), pre-filled with facts
for the curator to confirm (P), or left to the curator (C), whose answers come from a TOML
answers file (one key per question id); nothing is made up.
"""

from __future__ import annotations

import tomllib
from collections.abc import Iterator
from dataclasses import dataclass
from datetime import datetime
from pathlib import Path
from typing import Any

from collector.errors import RecipeError, RecipeProblem
from collector.schema import did_you_mean


class AnswersError(RecipeError):
    """The answers file has one or more problems; all are listed at once, as for the recipe."""

    what = "the answers file"


# --- the questions -------------------------------------------------------------------------------
@dataclass(frozen=True)
class Question:
    """One datasheet question. kind: A = from the ledger, P = pre-filled facts the curator
    confirms, C = only the curator can answer."""

    id: str
    kind: str
    text: str


SECTIONS: tuple[tuple[str, str, tuple[Question, ...]], ...] = (
    ("motivation", "Motivation", (
        Question("motivation.purpose", "C",
                 "What was this collection put together for; which task or gap is it meant "
                 "to serve?"),
        Question("motivation.builders", "P",
                 "Who assembled it, and for whom (a person, a group, an organisation)?"),
        Question("motivation.funding", "C",
                 "Who paid for the work (grant, employer, sponsor), if anyone?"),
        Question("motivation.other", "C", "Anything else a reader should know about why it "
                 "exists?"),
    )),
    ("composition", "Composition", (
        Question("composition.instance", "P",
                 "What is one item of the collection, and what does it show?"),
        Question("composition.counts", "A", "How many items are there, of which kinds?"),
        Question("composition.sample", "P",
                 "Is this everything the sources offered, or a selection? How was it "
                 "narrowed, and is it representative of anything larger?"),
        Question("composition.contents", "A", "What does each item consist of?"),
        Question("composition.labels", "P", "Does an item carry a label or target?"),
        Question("composition.missing", "A",
                 "Which information is missing for some items, and why?"),
        Question("composition.relations", "P",
                 "Are relations between items recorded (same source, copies, crops)?"),
        Question("composition.splits", "C",
                 "Are there suggested subsets (training, validation, test)?"),
        Question("composition.errors", "P",
                 "What is known about errors, noise and repeats in the collection?"),
        Question("composition.external", "P",
                 "Does the collection depend on outside resources, and could they change or "
                 "vanish?"),
        Question("composition.confidential", "C",
                 "Could any item be confidential (privileged, private communication)?"),
        Question("composition.offensive", "C",
                 "Could any item offend, threaten or distress someone who sees it?"),
        Question("composition.people", "C", "Do the items show or concern people?"),
        Question("composition.subpopulations", "C",
                 "If so, are groups of people (age, gender, ...) identified, and how are they "
                 "distributed?"),
        Question("composition.identification", "P",
                 "Could a person be identified from an item, directly or by combining it "
                 "with other data?"),
        Question("composition.sensitive", "P",
                 "Do items reveal sensitive matters (location, health, beliefs, biometrics)?"),
        Question("composition.other", "C", "Anything else about what the collection holds?"),
    )),
    ("collection", "Collection process", (
        Question("collection.acquisition", "A",
                 "How was each item obtained, and was any of it checked?"),
        Question("collection.mechanisms", "A",
                 "Which programs or procedures gathered the items, and how politely?"),
        Question("collection.sampling", "A",
                 "Which rules decided what was kept and what was left out?"),
        Question("collection.participants", "C",
                 "Who took part in gathering (staff, volunteers, contractors), and how were "
                 "they paid?"),
        Question("collection.timeframe", "P",
                 "Over what period was it gathered, and does that match when the pictures "
                 "were made?"),
        Question("collection.ethics_review", "C",
                 "Was the work reviewed by an ethics board or similar? With what outcome?"),
        Question("collection.third_party", "A",
                 "Were the items obtained from the people concerned, or from third parties "
                 "such as web sites?"),
        Question("collection.notice", "C",
                 "Were the people concerned told about the collection?"),
        Question("collection.consent", "C",
                 "Did they agree to it, and how? (A licence is not consent.)"),
        Question("collection.withdrawal", "C",
                 "Can someone ask for an item to be removed later, and how?"),
        Question("collection.impact_analysis", "C",
                 "Was the effect on the people concerned assessed (e.g. a data-protection "
                 "impact assessment)?"),
        Question("collection.reservations", "A",
                 "Which machine-readable reservations against text-and-data mining and AI "
                 "training were checked, and how many items did each one exclude?"),
        Question("collection.other", "C", "Anything else about how it was gathered?"),
    )),
    ("preprocessing", "Preprocessing, cleaning, labelling", (
        Question("preprocessing.steps", "A",
                 "What was done to the items after they were received?"),
        Question("preprocessing.raw_kept", "A",
                 "Are the files kept exactly as received?"),
        Question("preprocessing.software", "A",
                 "Which software did it, and can others get it?"),
        Question("preprocessing.other", "C", "Anything else about processing?"),
    )),
    ("uses", "Uses", (
        Question("uses.prior", "C", "Has the collection been used for anything yet?"),
        Question("uses.registry", "C",
                 "Is there a place that lists work using it?"),
        Question("uses.possible", "C", "What else could it reasonably be used for?"),
        Question("uses.risks", "P",
                 "Could the way it was composed, gathered or processed limit future uses or "
                 "cause harm? What would reduce that?"),
        Question("uses.avoid", "P", "For which uses should it not be used?"),
        Question("uses.other", "C", "Anything else about uses?"),
    )),
    ("distribution", "Distribution", (
        Question("distribution.third_parties", "C",
                 "Will it be shared outside the group that built it?"),
        Question("distribution.how", "C",
                 "How will it be shared (archive, repository, API), and does it have a DOI?"),
        Question("distribution.when", "C", "When will it be shared?"),
        Question("distribution.licence", "P",
                 "Under which licence or terms is it shared?"),
        Question("distribution.restrictions", "P",
                 "Do others' rights restrict what can be done with the items?"),
        Question("distribution.regulation", "C",
                 "Do export controls or other rules apply?"),
        Question("distribution.other", "C", "Anything else about sharing?"),
    )),
    ("maintenance", "Maintenance", (
        Question("maintenance.maintainer", "C", "Who looks after the collection?"),
        Question("maintenance.contact", "P", "How can they be reached?"),
        Question("maintenance.erratum", "P", "Is there a record of corrections and removals?"),
        Question("maintenance.changelog", "A",
                 "What changed, and when: runs, recipe changes, withdrawals, re-checks?"),
        Question("maintenance.release", "A",
                 "Which part of the collection is this release, made from which ledger state?"),
        Question("maintenance.updates", "P",
                 "Will it be updated: how often, by whom, and how will users hear of it?"),
        Question("maintenance.retention", "C",
                 "Are there limits on how long data about people may be kept?"),
        Question("maintenance.old_versions", "C", "Will earlier versions stay available?"),
        Question("maintenance.contributions", "C",
                 "Can others add to it, and how are contributions checked?"),
        Question("maintenance.other", "C", "Anything else about upkeep?"),
    )),
)

QUESTIONS: dict[str, Question] = {q.id: q for _, _, qs in SECTIONS for q in qs}

# Dataset-level answers used by croissant.json (its required properties) and the headings.
DATASET_KEYS: dict[str, str] = {
    "dataset.name": "the dataset's name (default: the recipe's [collection] name)",
    "dataset.description": "one-paragraph description (default: [collection] description)",
    "dataset.url": "where the dataset can be found (Croissant requires a URL)",
    "dataset.creator": "who created it (default: [collection] curator)",
    "dataset.date_published": "publication date, YYYY-MM-DD (default: the export date, "
                              "marked for confirmation)",
    "dataset.version": "version of this release, e.g. 1.0.0",
    "dataset.cite_as": "how to cite it (e.g. a BibTeX entry)",
}
ANSWER_KEYS: tuple[str, ...] = (*DATASET_KEYS, *QUESTIONS)


def answers_template() -> str:
    """A commented answers file listing every key (for the README and new curators)."""
    lines = ["# Answers for `collector datasheet --answers FILE`: one key per question.",
             "# Leave a key out and the datasheet says 'Not answered by the curator'."]
    for key, what in DATASET_KEYS.items():
        lines.append(f"# {key} = \"...\"    # {what}")
    for _, title, qs in SECTIONS:
        lines.append(f"\n# --- {title} ---")
        for q in qs:
            lines.append(f"# {q.id} = \"...\"    # {q.text}")
    return "\n".join(lines) + "\n"


def _flatten(table: dict[str, Any], prefix: str = "") -> Iterator[tuple[str, Any]]:
    for key, value in table.items():
        path = f"{prefix}{key}"
        if isinstance(value, dict):
            yield from _flatten(value, path + ".")
        else:
            yield path, value


def parse_answers(text: str, file: str = "answers.toml") -> dict[str, str]:
    """Validate answers TOML text; every problem is reported at once in an AnswersError."""
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise AnswersError([RecipeProblem(file, "", f"not valid TOML: {exc}")]) from exc
    problems: list[RecipeProblem] = []
    answers: dict[str, str] = {}
    for key, value in _flatten(data):
        if key not in ANSWER_KEYS:
            problems.append(RecipeProblem(file, key, "unknown key" + did_you_mean(
                key, list(ANSWER_KEYS)) + "; see the datasheet's question ids"))
        elif not isinstance(value, str):
            problems.append(RecipeProblem(file, key, f"must be a string, got "
                                          f"{type(value).__name__}"))
        elif value.strip():
            answers[key] = value.strip()
    if "dataset.date_published" in answers:
        try:
            datetime.fromisoformat(answers["dataset.date_published"])
        except ValueError:
            problems.append(RecipeProblem(file, "dataset.date_published",
                                          "must be an ISO 8601 date such as 2026-05-01"))
    if problems:
        raise AnswersError(problems)
    return answers


def load_answers(path: Path | None) -> dict[str, str]:
    """Read an answers file (None: no answers)."""
    if path is None:
        return {}
    try:
        text = path.read_text(encoding="utf-8")
    except OSError as exc:
        raise AnswersError([RecipeProblem(str(path), "", f"cannot be read: {exc}")]) from exc
    except UnicodeDecodeError as exc:
        raise AnswersError([RecipeProblem(str(path), "", f"not UTF-8 text: {exc}")]) from exc
    return parse_answers(text, str(path))
