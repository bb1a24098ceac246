"""Rendering the datasheet (Markdown and self-contained HTML) from facts and answers.

:func:`build_document` turns the facts of :mod:`collector.exports.datasheet` into sections of
questions, each with blocks of ledger facts and the curator's answer; questions only the
curator can answer and that have no answer yet are gathered at the end of their section,
marked once as not answered. The two renderers fill Jinja2 templates shipped in
``collector/templates`` (``datasheet.html.j2``, ``datasheet.md.j2``) with that document, so
Markdown and HTML say the same. All text from the ledger came from servers: the HTML
environment escapes every value (autoescape on); the Markdown one escapes table pipes and line
breaks in every value (its ``finalize``).

A block is a tuple: ``("p", text)``, ``("list", [text], id?)``, ``("table", headers, rows,
id?)`` or ``("see", id)``. A list or table with an id (a key of :data:`TABLES`) is shown once,
where it first occurs; later occurrences become a link to it.
"""

from __future__ import annotations

import functools
from collections.abc import Callable
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any

from collector.exports.datasheet_diversity import TABLES as DIVERSITY_TABLES
from collector.exports.datasheet_diversity import panel_blocks
from collector.exports.datasheet_questions import SECTIONS, Question
from collector.exports.datasheet_reservations import CAUTION as RESERVATIONS_CAUTION
from collector.exports.datasheet_reservations import reservation_blocks
from collector.exports.release import EXCLUSION_REASONS
from collector.safe_text import document_value, for_document
from collector.schema import toml_value

if TYPE_CHECKING:
    import jinja2

    from collector.exports.facts import DatasheetFacts

Block = tuple[Any, ...]  # ("p", text) | ("list", [text], id?) | ("table", headers, rows, id?)

# Tables and lists that have an id: shown once, linked from elsewhere and from the contents.
TABLES = {
    "t-states": "Items by state", "t-formats": "Accepted files by format",
    "t-modes": "Accepted files by colour mode", "t-by-source": "Accepted files by source",
    "t-dimensions": "Image dimensions", "t-missing": "Accepted files missing a fact",
    "t-lost": "Items that could not be obtained", "t-sources": "Sources and their archives",
    "t-requests": "Requests", "t-hosts": "Politeness per host",
    "t-rules": "Rules that decided what was kept", "t-reasons": "Items by state and reason",
    "t-licences": "Licences of the files in this release",
    "t-personal": "Possible personal data in metadata", "t-other-flags": "Other flags",
    "t-conditions": "Licence conditions of accepted files", "t-runs": "Runs by outcome",
    "t-not-unicode": "Items whose listed text was not valid Unicode",
    **DIVERSITY_TABLES,
}
KIND_LABEL = {"A": "From the ledger", "P": "Pre-filled from the ledger — curator, please confirm",
              "C": "Curator's question"}
ANSWERED_LABEL = {"A": "From the ledger, with the curator's answer",
                  "P": "Pre-filled from the ledger, confirmed by the curator",
                  "C": "Answered by the curator"}
NOT_ANSWERED = "Not answered by the curator."
PERSONAL_FLAGS = ("gps", "camera_serial", "owner_name")  # as collector.exports.datasheet
# Pillow's image modes in words (Pillow handbook, "Concepts", section "Modes").
MODE_WORDS = {
    "1": "black and white, 1 bit", "L": "greyscale, 8 bit", "LA": "greyscale with transparency",
    "I;16": "greyscale, 16 bit", "I": "greyscale, 32-bit integer", "F": "greyscale, 32-bit float",
    "P": "palette colour", "PA": "palette colour with transparency", "RGB": "colour",
    "RGBA": "colour with transparency", "RGBX": "colour with padding", "CMYK": "print colour",
    "YCbCr": "colour (video encoding)", "LAB": "colour (L*a*b*)", "HSV": "colour (hue, "
    "saturation, value)",
}


def in_words(n: int | float | None, *, exact: bool = False) -> str:
    """Bytes in words with decimal SI prefixes (1 MB = 10^6 bytes): '20.5 MB', with
    ``exact`` '20.5 MB (20,519,312 bytes)'."""
    if n is None:
        return "?"
    value, unit = float(n), "bytes"
    for unit in ("bytes", "kB", "MB", "GB", "TB"):
        if abs(value) < 1000 or unit == "TB":
            break
        value /= 1000
    if unit == "bytes":
        return f"{int(n):,} bytes"
    return f"{value:.1f} {unit}" + (f" ({int(n):,} bytes)" if exact else "")


def mode_in_words(mode: str) -> str:
    """A Pillow mode in words with its code: 'greyscale, 8 bit (L)'."""
    words = MODE_WORDS.get(mode)
    return f"{words} ({mode})" if words else mode


def host_label(facts: DatasheetFacts, host: str) -> str:
    """A host named by the sources that used it, the host itself in brackets."""
    names = facts["host_sources"].get(host, [])
    if not names:
        return host
    shown = ", ".join(names[:3]) + (f" +{len(names) - 3}" if len(names) > 3 else "")
    return f"{shown} ({host})"


def _table(headers: list[str], pairs: dict[str, Any], tid: str | None = None) -> Block:
    return ("table", headers, [[k, v] for k, v in pairs.items()], tid)


def _dims(f: DatasheetFacts) -> Block:
    acc = f["accepted"]
    rows = []
    for dim in ("width", "height"):
        d = acc[dim]
        med = d["median"]
        rows.append([dim, d["min"], med if med is None or med % 1 else int(med), d["max"]])
    return ("table", ["dimension (px)", "min", "median", "max"], rows, "t-dimensions")


def _counts(f: DatasheetFacts) -> list[Block]:
    acc, rel = f["accepted"], f["release"]
    return [
        ("p", f"Candidate items recorded in the ledger: {f['items']['total']}. Accepted files "
              f"(stored, including near duplicates kept): {acc['files']} "
              f"({in_words(acc['bytes'])}). Files in this release: {rel['files']} "
              f"({in_words(rel['bytes'])})."),
        _table(["item state", "items"], f["items"]["by_state"], "t-states"),
        _table(["format", "accepted files"], acc["formats"], "t-formats"),
        _table(["colour mode", "accepted files"],
               {mode_in_words(k): v for k, v in acc["modes"].items()}, "t-modes"),
        _table(["source", "accepted files"], acc["by_source"], "t-by-source"),
        _dims(f),
    ]


def _missing(f: DatasheetFacts) -> list[Block]:
    m = f["missing"]
    lost = {k: v for k, v in f["items"]["by_reason"].items()
            if k.split("/")[0] in ("failed", "deferred", "blocked", "pending")}
    out: list[Block] = [("table", ["accepted files without", "files"], [
        ["a title", m["no_title"]], ["a creator", m["no_creator"]],
        ["a recognised licence", m["no_licence"]], ["an item page URL", m["no_page_url"]],
        ["a date", m["no_date"]]], "t-missing")]
    if lost:
        out.append(_table(["state/reason", "items"], lost, "t-lost"))
    return out


def _sources(f: DatasheetFacts) -> Block:
    return ("table", ["source", "kind", "how", "archive", "items listed", "accepted"],
            [[s["name"], s["kind"], s["mechanism"],
              " ".join(s["where"]) or "(no longer in the recipe)", s["items"], s["accepted"]]
             for s in f["sources"]], "t-sources")


def _politeness(f: DatasheetFacts) -> list[Block]:
    r, b = f["requests"], f["policy"]["budgets"]
    out: list[Block] = [
        ("p", f"User-Agent contact: {f['collection']['contact']}; robots.txt product token: "
              f"{f['collection']['product_token']}. Default budget per host: at least "
              f"{b['min_interval']} s between request starts, at most "
              f"{b['requests_per_hour']} requests and {in_words(b['bytes_per_hour'])} per "
              f"hour, {b['max_connections']} connection(s), {b['max_attempts']} attempts per "
              f"request; a Retry-After over {b['max_retry_after']} s parks the host."),
        ("table", ["requests", "count"], [
            ["answered requests", r["total"]], ["attempts (incl. network errors)", r["attempts"]],
            ["429 Too Many Requests received", r["status_429"]],
            ["503 Service Unavailable received", r["status_503"]],
            ["refused by robots.txt", r["robots_disallowed"]],
            ["errors", r["errors"]], ["received", in_words(r["bytes"], exact=True)]], "t-requests"),
    ]
    if f["hosts"]:
        rows = []
        for h in f["hosts"]:
            e = h["effective_budget"] or {}
            rows.append([h["host"], ", ".join(f["host_sources"].get(h["host"], [])),
                         h["robots_status"], h["robots_fetched_at"],
                         e.get("effective_interval", e.get("min_interval")),
                         e.get("requests_per_hour"), e.get("max_connections"),
                         h["requests"], h["status_429"], h["robots_disallowed"]])
        out.append(("table", ["host", "sources", "robots.txt status", "robots.txt read at",
                              "interval applied (s)", "requests/h", "connections",
                              "requests", "429s", "robots refusals"], rows, "t-hosts"))
    return out


def _rules(f: DatasheetFacts) -> Block:
    p, d, rel = f["policy"], f["duplicates"], f["release"]
    img = p["images"]
    return ("list", [
        f"Licence allowlist, applied before download: {', '.join(p['licence_allow'])}; "
        f"unknown licences {'allowed' if p['allow_unknown'] else 'refused'}.",
        f"Image checks: format from magic bytes, full decode, at most {img['max_pixels']} "
        f"pixels and {in_words(p['max_image_bytes'])}, shortest side at least "
        f"{img['min_side']} px, aspect bounds {img['min_aspect']}–{img['max_aspect']} "
        "(0 = off).",
        f"Exact duplicates (same SHA-256 or image URL) not stored again: {d['exact']}.",
        f"Near duplicates (perceptual hash distance ≤ {d['near_distance']}, mirror images "
        f"included; recipe: {d['policy']}): {d['near_kept']} kept and marked, "
        f"{d['near_dropped']} dropped.",
        f"Left out of this release: {rel['excluded_licence']} by the licence allowlist, "
        f"{rel['excluded_flagged']} flagged files"
        + (" (--exclude-flagged)" if rel["exclude_flagged"] else "")
        + (f", {rel['missing_files']} missing from the store" if rel["missing_files"] else "")
        + ".",
        *_pixel_rule_lines(p),
    ], "t-rules")


def _pixel_rule_lines(p: dict[str, Any]) -> list[str]:
    """The recipe's pixel rules and the files each sets aside (left out of every number)."""
    counts = dict(p.get("set_aside") or {})
    lines = []
    for rule in p.get("pixel_rules") or []:
        said = "; ".join(f"{k} = {toml_value(v)}" for k, v in rule.items() if k != "name")
        lines.append(f"Pixel rule {rule['name']!r} ({said}): {counts.pop(rule['name'], 0)} "
                     "file(s) set aside (kept in the store, left out of this release and of "
                     "the accepted files counted here).")
    lines += [f"Set aside by {name!r}, a pixel rule no longer in the recipe: {n} file(s) "
              "('collector apply-rules' judges them again)." for name, n in counts.items()]
    return lines


def _steps(f: DatasheetFacts) -> list[Block]:
    return [_rules(f), _table(["state/reason", "items"], f["items"]["by_reason"], "t-reasons")]


def _errors(f: DatasheetFacts) -> list[Block]:
    other = {k: v for k, v in f["flags"].items() if k not in PERSONAL_FLAGS}
    out: list[Block] = [_rules(f)]
    if other:
        out.append(("p", "Flags on accepted files that are not about people (a licence that "
                         "contradicts embedded rights metadata, a file whose content does not "
                         "match its declared type, ...):"))
        out.append(_table(["flag", "accepted files"], other, "t-other-flags"))
    return out + _not_unicode(f)


def _not_unicode(f: DatasheetFacts) -> list[Block]:
    """Items whose listing held text that is not valid Unicode, by field (none: nothing)."""
    n = f["not_unicode"]
    if not n["items"]:
        return []
    return [("p", f"Items whose listing held text that is not valid Unicode (a lone surrogate, "
                  "which no UTF can encode; replaced by U+FFFD, \ufffd, before it was kept, so "
                  f"these texts differ from what the archive sent): {n['items']} of the "
                  f"{f['items']['total']} items recorded, {n['accepted']} of them with an "
                  "accepted file; 'collector trace' names the fields per file. Items by "
                  "field (metadata: the item as listed, kept whole):"),
            _table(["field", "items"], n["fields"], "t-not-unicode")]


def _licences(f: DatasheetFacts) -> list[Block]:
    conds = {x["spdx_id"]: x for x in f["licences"]}
    rows = []
    for spdx, n in f["release"]["by_licence"].items():
        info = conds.get(spdx)
        conditions = info["conditions"] if info else []
        deed = info["deed_url"] if info else None
        rows.append([spdx, n, ", ".join(conditions or []) or "?", deed or ""])
    return [("table", ["licence (SPDX)", "files in release", "conditions", "deed"], rows,
             "t-licences"),
            ("p", "Each file keeps its own licence; attribution.csv lists title, author, "
                  "source and licence per file (Creative Commons attribution practice). "
                  f"Files whose embedded rights metadata contradicts the declared licence: "
                  f"{f['flagged']['conflict']}.")]


def _flags(f: DatasheetFacts) -> list[Block]:
    personal = {k: v for k, v in f["flags"].items() if k in PERSONAL_FLAGS}
    return [_table(["flag", "accepted files"], personal, "t-personal") if personal
            else ("p", "No accepted file has a GPS position, camera serial number or owner "
                       "name in its metadata."),
            ("p", f"Accepted files with possible personal data in their metadata: "
                  f"{f['flagged']['personal']}. Faces or names inside pictures are not "
                  "detected; a person must look.")]


def _restricted(f: DatasheetFacts) -> dict[str, int]:
    """Released files by licence whose conditions restrict use (NC or ND)."""
    conds = {x["spdx_id"]: x["conditions"] for x in f["licences"]}
    return {spdx: n for spdx, n in f["release"]["by_licence"].items()
            if {"non-commercial", "no-derivatives"} & set(conds.get(spdx) or [])}


def _avoid(f: DatasheetFacts) -> list[Block]:
    restricted = _restricted(f)
    if not restricted:
        return [("p", "No file in this release carries a non-commercial or no-derivatives "
                      "licence condition.")]
    listed = ", ".join(f"{spdx} ({n} files)" for spdx, n in restricted.items())
    return [("p", f"Files under non-commercial (NC) or no-derivatives (ND) licences restrict "
                  f"those uses: {listed}."), ("see", "t-licences")]


def _risks(f: DatasheetFacts) -> list[Block]:
    conds: dict[str, int] = {}
    for lic in f["licences"]:
        for c in lic["conditions"] or ["unknown"]:
            conds[c] = conds.get(c, 0) + lic["files"]
    hosts = f["accepted"]["by_host"]
    total = sum(hosts.values()) or 1
    top = next(iter(hosts.items()), None)
    out: list[Block] = [_table(["licence condition", "accepted files"], conds, "t-conditions")]
    if top and len(hosts) > 1:
        out.append(("p", f"The largest share comes from one host: {host_label(f, top[0])} "
                         f"with {top[1]} of {total} accepted files "
                         f"({100 * top[1] / total:.0f} %)."))
    return out


def _timeframe(f: DatasheetFacts) -> list[Block]:
    d = f["picture_dates"]
    dated = (f"from {d['earliest']} to {d['latest']}" if d["earliest"]
             else "none in a form that starts with a year")
    return [("p", f"First and last request or stored file: {f['timeframe']['start']} to "
                  f"{f['timeframe']['end']} (UTC), over {f['runs']['count']} run(s); the "
                  "requests per host over time are drawn under At a glance."),
            ("p", f"When the pictures were made, as the sources declare it: {d['dated']} of "
                  f"{f['accepted']['files']} accepted files carry a date; dates {dated}.")]


FACTS: dict[str, Callable[[DatasheetFacts], list[Block]]] = {
    "motivation.builders": lambda f: [("p", f"Curator named in the recipe: "
                                            f"{f['collection']['curator'] or '(none)'}; "
                                            f"contact: {f['collection']['contact']}.")],
    "composition.instance": lambda f: [("p", "One item is one image file, kept as received, "
                                             "with one provenance row (source, item page and "
                                             "image URL, title, creator, licence, fetch time, "
                                             "SHA-256, size and image facts). What the "
                                             "pictures show is for the curator to say.")],
    "composition.counts": _counts,
    "composition.sample": lambda f: [
        ("p", f"{f['items']['total']} candidates were listed by the sources; "
              f"{f['accepted']['files']} were accepted; {f['release']['files']} are in this "
              "release. Whether this represents anything larger is for the curator to judge. "
              "The rules that narrowed them:"), ("see", "t-rules")],
    "composition.diversity": panel_blocks,
    "composition.contents": lambda f: [("p", "The image bytes exactly as received, plus the "
                                             "provenance columns of provenance.csv.")],
    "composition.labels": lambda f: [("p", "collector assigns no labels. Titles as declared "
                                           "by the sources: "
                                           f"{f['accepted']['files'] - f['missing']['no_title']}"
                                           f" of {f['accepted']['files']} accepted files have "
                                           "one.")],
    "composition.missing": _missing,
    "composition.relations": lambda f: [("p", f"Near duplicates kept and linked to their "
                                              f"original: {f['duplicates']['near_kept']}; crops "
                                              f"cut from scans, linked to their scan: "
                                              f"{f['accepted']['crops']}; exact duplicates "
                                              f"recorded: {f['duplicates']['exact']}.")],
    "composition.errors": _errors,
    "composition.external": lambda f: [("p", "Every file is kept locally. The item page and "
                                             "image URLs in provenance.csv point at the "
                                             "sources, which may change or disappear.")],
    "composition.identification": _flags,
    "composition.sensitive": lambda f: [("p", f"Accepted files with a GPS position in their "
                                              f"metadata: {f['flags'].get('gps', 0)}.")],
    "collection.acquisition": lambda f: [("p", "Files were received as the sources served "
                                               "them and checked (SHA-256, format from magic "
                                               "bytes, full decode). Titles, creators and "
                                               "licences are claims read from the sources; "
                                               "they were not verified.")],
    "collection.mechanisms": lambda f: [_sources(f), *_politeness(f)],
    "collection.sampling": _steps,
    "collection.reservations": reservation_blocks,
    "collection.timeframe": _timeframe,
    "collection.third_party": lambda f: [("p", "From third-party web sites and local scans, "
                                               "not from the people shown; each source and "
                                               "its archive:"), ("see", "t-sources")],
    "collection.notice": lambda f: [("p", "collector sent no notice to anyone.")],
    "preprocessing.steps": _steps,
    "preprocessing.raw_kept": lambda f: [("p", "Yes: files are stored byte for byte as "
                                               "received, named by SHA-256; crops from scans "
                                               f"({f['accepted']['crops']}) are new files and "
                                               "their scans are kept too.")],
    "preprocessing.software": lambda f: [("p", f"collector {f['tool_version']} wrote this "
                                               f"datasheet; runs used "
                                               f"{', '.join(f['runs']['tool_versions']) or '?'}"
                                               f" with {f['runs']['recipes']} recipe "
                                               "version(s).")],
    "uses.risks": _risks,
    "uses.avoid": _avoid,
    "distribution.licence": _licences,
    "distribution.restrictions": lambda f: [("p", "Every file keeps the licence its source "
                                                  "declared, with that licence's conditions:"),
                                            ("see", "t-licences")],
    "maintenance.contact": lambda f: [("p", f"Contact in the recipe: "
                                            f"{f['collection']['contact']}.")],
    "maintenance.erratum": lambda f: [("p", "The ledger keeps every decision with its reason; "
                                            "a change log can be drawn from it.")],
    "maintenance.updates": lambda f: [_table(["run outcome", "runs"], f["runs"]["outcomes"],
                                             "t-runs")],
    "maintenance.changelog": lambda f: [("table", ["date (UTC)", "event", "details"], [
        [e["date"], e["event"], e["detail"]] for e in f.get("changelog", [])])],
    "maintenance.release": lambda f: _release_state(f),
}


def _release_state(f: DatasheetFacts) -> list[Block]:
    """The ledger state a release was made from, its selection and what it left out."""
    sel = f.get("selection")
    if sel is None:
        return []
    state = sel["ledger_state"]
    words = (f"Made from the ledger as of run #{state['run_id']} ({state['time']})"
             if state["run_id"] is not None else "Made from a ledger without runs")
    chosen = "; ".join(sel["conditions"]) or "everything accepted"
    left = {EXCLUSION_REASONS.get(k, k): n for k, n in sel["excluded"].items()}
    return [("p", f"{words}. Selection: {chosen}."),
            _table(["left out of this release", "files"], left)]


# --- the document the templates fill ---------------------------------------------------------
@dataclass
class BlockView:
    """One block as the templates see it: kind p, list, table or see (a link to a table)."""

    kind: str
    text: str = ""
    items: list[Any] = field(default_factory=list)
    headers: list[str] = field(default_factory=list)
    rows: list[list[Any]] = field(default_factory=list)
    id: str | None = None
    caption: str = ""
    where: str = ""  # for a link: the section the table is in


@dataclass
class QuestionView:
    question: Question
    blocks: list[BlockView] = field(default_factory=list)
    answer: str | None = None

    @property
    def label(self) -> str:
        """Where the content under this question comes from."""
        if self.answer:
            return ANSWERED_LABEL[self.question.kind]
        return KIND_LABEL["P" if self.question.kind == "C" else self.question.kind]


@dataclass
class SectionView:
    key: str
    title: str
    questions: list[QuestionView]
    open: list[Question] = field(default_factory=list)  # curator's questions not answered


def _view(block: Block, placed: dict[str, str], where: str) -> BlockView:
    """A block as a BlockView; a list or table already shown becomes a link to it."""
    kind = block[0]
    tid: str | None = block[1] if kind == "see" else (
        block[2] if kind == "list" and len(block) > 2 else
        block[3] if kind == "table" and len(block) > 3 else None)
    if tid is not None and (kind == "see" or tid in placed):
        return BlockView("see", id=tid, caption=TABLES.get(tid) or tid,
                         where=placed.get(tid, ""))
    if tid is not None:
        placed[tid] = where
    caption = (TABLES.get(tid) or tid) if tid else ""
    if kind == "p":
        return BlockView("p", text=str(block[1]))
    if kind == "plot":  # drawn in the HTML only (the tables beside it say the same)
        return BlockView("plot", id=str(block[1]))
    if kind == "list":
        return BlockView("list", items=list(block[1]), id=tid, caption=caption)
    return BlockView("table", headers=list(block[1]), rows=[list(r) for r in block[2]],
                     id=tid, caption=caption)


def build_document(facts: DatasheetFacts, answers: dict[str, str]) -> list[SectionView]:
    """The datasheet as sections of questions with facts and answers. A question with neither
    facts nor an answer is listed among its section's open questions instead."""
    out = []
    placed: dict[str, str] = {}
    for key, title, questions in SECTIONS:
        section = SectionView(key, title, [])
        for q in questions:
            builder = FACTS.get(q.id)
            blocks = [_view(b, placed, title) for b in (builder(facts) if builder else [])]
            if blocks or answers.get(q.id):
                section.questions.append(QuestionView(q, blocks, answers.get(q.id)))
            else:
                section.open.append(q)
        out.append(section)
    return out


def _title(facts: DatasheetFacts, answers: dict[str, str]) -> str:
    return answers.get("dataset.name") or facts["collection"]["name"] or "Collection"


def cautions(facts: DatasheetFacts) -> list[str]:
    """The cautions that apply to this collection."""
    flagged = facts["flagged"]["personal"]
    out = ["Licence facts are as declared by the sources, normalised to SPDX ids; "
           "declarations can be wrong and this is not legal advice.",
           "Pictures may show people and files may carry personal data; files flagged for it "
           "(GPS position, camera serial, owner name: "
           f"{flagged} accepted file{'' if flagged == 1 else 's'}) need review before "
           "publication; faces and names inside pictures are not detected."]
    if facts["requests"]["total"]:
        out.append("robots.txt permission is not the same as permission under a site's terms "
                   "of use; read each archive's terms.")
        out.append(RESERVATIONS_CAUTION)
    if "diversity" in facts:  # lopsided releases: the panel's warnings, also up here
        out += [f"{w} See the diversity panel (composition.diversity)."
                for w in facts["diversity"]["warnings"]]
    return out


def _croissant_notes(facts: DatasheetFacts, answers: dict[str, str]) -> list[str]:
    notes = ["croissant.json describes this folder (Croissant 1.0 with the RAI extension)."]
    if "dataset.date_published" not in answers:
        notes.append(f"Pre-filled, please confirm: datePublished is the export date "
                     f"{facts['generated_at'][:10]}; set dataset.date_published to change it.")
    return notes


def _context(facts: DatasheetFacts, answers: dict[str, str],
             plots: dict[str, str] | None) -> dict[str, Any]:
    """Everything a template reads."""
    from markupsafe import Markup

    from collector.exports.diversity_plots import PANEL_TITLES
    from collector.exports.plots import PLOT_TITLES

    sections = build_document(facts, answers)
    return {
        "title": _title(facts, answers), "facts": facts, "cautions": cautions(facts),
        "description": answers.get("dataset.description") or facts["collection"]["description"],
        "sections": sections, "not_answered": NOT_ANSWERED,
        # Our own matplotlib SVG, drawn from aggregated numbers (text as paths): trusted markup.
        "plots": [(name, PLOT_TITLES[name], Markup(svg))
                  for name, svg in (plots or {}).items() if svg and name in PLOT_TITLES],
        "panel_plots": {name: (PANEL_TITLES[name], Markup(svg))
                        for name, svg in (plots or {}).items() if svg and name in PANEL_TITLES},
        "tables": [(b.id, b.caption) for s in sections for v in s.questions
                   for b in v.blocks if b.kind in ("table", "list") and b.id],
        "croissant_notes": _croissant_notes(facts, answers),
        "croissant_problems": facts.get("croissant_problems") or [],
        "legend": KIND_LABEL,
    }


def _md_escape(value: Any) -> str:
    """Every value in datasheet.md: table pipes and backslashes escaped, lines joined,
    control characters shown as escapes (:func:`collector.safe_text.for_document`)."""
    text = "" if value is None else str(value)
    text = text.replace("\\", "\\\\").replace("|", "\\|").replace("\r", " ").replace("\n", " ")
    return for_document(text)


@functools.cache
def _environment(markdown: bool) -> jinja2.Environment:
    """The Jinja2 environment: HTML autoescaped, Markdown escaped by ``finalize``."""
    import jinja2

    return jinja2.Environment(
        loader=jinja2.PackageLoader("collector", "templates"), autoescape=not markdown,
        finalize=_md_escape if markdown else document_value, undefined=jinja2.StrictUndefined,
        trim_blocks=True, lstrip_blocks=True, keep_trailing_newline=True)


def render_markdown(facts: DatasheetFacts, answers: dict[str, str]) -> str:
    """datasheet.md."""
    page = _environment(True).get_template("datasheet.md.j2").render(
        _context(facts, answers, None))
    return page.rstrip() + "\n"


def render_html(facts: DatasheetFacts, answers: dict[str, str], plots: dict[str, str]) -> str:
    """datasheet.html: one self-contained page (inline CSS and SVG, no external requests)."""
    return _environment(False).get_template("datasheet.html.j2").render(
        _context(facts, answers, plots))
