"""Rendering the datasheet (Markdown and self-contained HTML) from facts and answers.

:func:`build_document` turns the facts of :mod:`collector.exports.datasheet` into sections of
questions,
each with blocks of ledger facts and the curator's answer (or the explicit mark "Not answered by
the curator"). The two renderers only format that document, so Markdown and HTML say the same.
All text from the ledger came from servers: it is escaped (``html.escape`` in HTML; table pipes
and line breaks in Markdown).
"""

from __future__ import annotations

import html
from collections.abc import Callable
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any

from collector.exports.datasheet_questions import SECTIONS, Question
from collector.exports.release import EXCLUSION_REASONS

if TYPE_CHECKING:
    from collector.exports.facts import DatasheetFacts

Block = tuple[Any, ...]  # ("p", text) | ("list", [text]) | ("table", headers, rows)

CAUTION = [
    "Licence facts are as declared by the sources, normalised to SPDX ids; declarations can "
    "be wrong and this is not legal advice.",
    "Files flagged for personal data (GPS position, camera serial, owner name) need review "
    "before publication; faces and names inside pictures are not detected.",
    "robots.txt permission is not the same as permission under a site's terms of use; read "
    "each archive's terms.",
]
KIND_LABEL = {"A": "From the ledger", "P": "Pre-filled from the ledger — curator, please confirm",
              "C": "Curator's question"}
NOT_ANSWERED = "Not answered by the curator."


@dataclass
class QuestionView:
    question: Question
    blocks: list[Block] = field(default_factory=list)
    answer: str | None = None


@dataclass
class SectionView:
    key: str
    title: str
    questions: list[QuestionView]


def _table(headers: list[str], pairs: dict[str, Any]) -> Block:
    return ("table", headers, [[k, v] for k, v in pairs.items()])


def _dims(f: DatasheetFacts) -> Block:
    acc = f["accepted"]
    rows = []
    for dim in ("width", "height"):
        d = acc[dim]
        med = d["median"]
        rows.append([dim, d["min"], med if med is None or med % 1 else int(med), d["max"]])
    return ("table", ["dimension (px)", "min", "median", "max"], rows)


def _counts(f: DatasheetFacts) -> list[Block]:
    acc, rel = f["accepted"], f["release"]
    return [
        ("p", f"Candidate items recorded in the ledger: {f['items']['total']}. Accepted files "
              f"(stored, including near duplicates kept): {acc['files']} "
              f"({acc['bytes']} bytes). Files in this release: {rel['files']} "
              f"({rel['bytes']} bytes)."),
        _table(["item state", "items"], f["items"]["by_state"]),
        _table(["format", "accepted files"], acc["formats"]),
        _table(["colour mode", "accepted files"], acc["modes"]),
        _table(["source", "accepted files"], acc["by_source"]),
        _dims(f),
    ]


def _missing(f: DatasheetFacts) -> list[Block]:
    m = f["missing"]
    lost = {k: v for k, v in f["items"]["by_reason"].items()
            if k.split("/")[0] in ("failed", "deferred", "blocked", "pending")}
    out: list[Block] = [("table", ["accepted files without", "files"], [
        ["a title", m["no_title"]], ["a creator", m["no_creator"]],
        ["a recognised licence", m["no_licence"]], ["an item page URL", m["no_page_url"]],
        ["a date", m["no_date"]]])]
    if lost:
        out.append(("p", "Items that could not be obtained, by state/reason:"))
        out.append(_table(["state/reason", "items"], lost))
    return out


def _sources(f: DatasheetFacts) -> Block:
    return ("table", ["source", "kind", "how", "items listed", "accepted"],
            [[s["name"], s["kind"], s["mechanism"], s["items"], s["accepted"]]
             for s in f["sources"]])


def _politeness(f: DatasheetFacts) -> list[Block]:
    r, b = f["requests"], f["policy"]["budgets"]
    out: list[Block] = [
        ("p", f"User-Agent contact: {f['collection']['contact']}; robots.txt product token: "
              f"{f['collection']['product_token']}. Default budget per host: at least "
              f"{b['min_interval']} s between request starts, at most "
              f"{b['requests_per_hour']} requests and {b['bytes_per_hour']} bytes per hour, "
              f"{b['max_connections']} connection(s), {b['max_attempts']} attempts per "
              f"request; a Retry-After over {b['max_retry_after']} s parks the host."),
        ("table", ["requests", "count"], [
            ["answered requests", r["total"]], ["attempts (incl. network errors)", r["attempts"]],
            ["429 Too Many Requests received", r["status_429"]],
            ["503 Service Unavailable received", r["status_503"]],
            ["refused by robots.txt", r["robots_disallowed"]],
            ["errors", r["errors"]], ["bytes received", r["bytes"]]]),
    ]
    if f["hosts"]:
        rows = []
        for h in f["hosts"]:
            e = h["effective_budget"] or {}
            rows.append([h["host"], h["robots_status"], h["robots_fetched_at"],
                         e.get("effective_interval", e.get("min_interval")),
                         e.get("requests_per_hour"), e.get("max_connections"),
                         h["requests"], h["status_429"], h["robots_disallowed"]])
        out.append(("table", ["host", "robots.txt status", "robots.txt read at",
                              "interval applied (s)", "requests/h", "connections",
                              "requests", "429s", "robots refusals"], rows))
    return out


def _steps(f: DatasheetFacts) -> list[Block]:
    p, d, rel = f["policy"], f["duplicates"], f["release"]
    img = p["images"]
    return [("list", [
        f"Licence allowlist, applied before download: {', '.join(p['licence_allow'])}; "
        f"unknown licences {'allowed' if p['allow_unknown'] else 'refused'}.",
        f"Image checks: format from magic bytes, full decode, at most {img['max_pixels']} "
        f"pixels and {p['max_image_bytes']} bytes, shortest side at least {img['min_side']} "
        f"px, aspect bounds {img['min_aspect']}–{img['max_aspect']} (0 = off).",
        f"Exact duplicates (same SHA-256 or image URL) not stored again: {d['exact']}.",
        f"Near duplicates (perceptual hash distance ≤ {d['near_distance']}, mirror images "
        f"included; recipe: {d['policy']}): {d['near_kept']} kept and marked, "
        f"{d['near_dropped']} dropped.",
        f"Left out of this release: {rel['excluded_licence']} by the licence allowlist, "
        f"{rel['excluded_flagged']} flagged files"
        + (" (--exclude-flagged)" if rel["exclude_flagged"] else "")
        + (f", {rel['missing_files']} missing from the store" if rel["missing_files"] else "")
        + ".",
    ]), _table(["state/reason", "items"], f["items"]["by_reason"])]


def _licences(f: DatasheetFacts) -> list[Block]:
    conds = {x["spdx_id"]: x for x in f["licences"]}
    rows = []
    for spdx, n in f["release"]["by_licence"].items():
        info = conds.get(spdx)
        conditions = info["conditions"] if info else []
        deed = info["deed_url"] if info else None
        rows.append([spdx, n, ", ".join(conditions or []) or "?", deed or ""])
    return [("table", ["licence (SPDX)", "files in release", "conditions", "deed"], rows),
            ("p", "Each file keeps its own licence; attribution.csv lists title, author, "
                  "source and licence per file (Creative Commons attribution practice). "
                  f"Files whose embedded rights metadata contradicts the declared licence: "
                  f"{f['flagged']['conflict']}.")]


def _flags(f: DatasheetFacts) -> list[Block]:
    return [_table(["flag", "accepted files"], f["flags"]) if f["flags"]
            else ("p", "No metadata flags on accepted files."),
            ("p", f"Accepted files with possible personal data in their metadata: "
                  f"{f['flagged']['personal']}. Faces or names inside pictures are not "
                  "detected; a person must look.")]


def _risks(f: DatasheetFacts) -> list[Block]:
    conds: dict[str, int] = {}
    for lic in f["licences"]:
        for c in lic["conditions"] or ["unknown"]:
            conds[c] = conds.get(c, 0) + lic["files"]
    hosts = f["accepted"]["by_host"]
    total = sum(hosts.values()) or 1
    top = next(iter(hosts.items()), None)
    out: list[Block] = [_table(["licence condition", "accepted files"], conds)]
    if top:
        out.append(("p", f"The largest share comes from one host: {top[0]} with {top[1]} of "
                         f"{total} accepted files ({100 * top[1] / total:.0f} %)."))
    return out


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
              "release. The rules that narrowed them are under Collection process. Whether "
              "this represents anything larger is for the curator to judge.")],
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
    "composition.errors": lambda f: _steps(f)[:1],
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
    "collection.timeframe": lambda f: [("p", f"First and last request or stored file: "
                                             f"{f['timeframe']['start']} to "
                                             f"{f['timeframe']['end']} (UTC), over "
                                             f"{f['runs']['count']} run(s). Accepted items "
                                             f"with a date declared by the source: "
                                             f"{f['accepted']['files'] - f['missing']['no_date']}"
                                             ".")],
    "collection.third_party": lambda f: [("p", "From third-party web sites and local scans, "
                                               "not from the people shown:"),
                                         _table(["host", "accepted files"],
                                                f["accepted"]["by_host"])],
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
    "uses.avoid": lambda f: [("p", "Files under non-commercial (NC) or no-derivatives (ND) "
                                   "licences restrict those uses; see the licence table.")],
    "distribution.licence": _licences,
    "distribution.restrictions": _licences,
    "maintenance.contact": lambda f: [("p", f"Contact in the recipe: "
                                            f"{f['collection']['contact']}.")],
    "maintenance.erratum": lambda f: [("p", "The ledger keeps every decision with its reason; "
                                            "a change log can be drawn from it.")],
    "maintenance.updates": lambda f: [_table(["run outcome", "runs"], f["runs"]["outcomes"])],
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


def build_document(facts: DatasheetFacts, answers: dict[str, str]) -> list[SectionView]:
    """The datasheet as sections of questions with facts and answers."""
    out = []
    for key, title, questions in SECTIONS:
        views = []
        for q in questions:
            builder = FACTS.get(q.id)
            views.append(QuestionView(q, builder(facts) if builder else [], answers.get(q.id)))
        out.append(SectionView(key, title, views))
    return out


def _title(facts: DatasheetFacts, answers: dict[str, str]) -> str:
    return answers.get("dataset.name") or facts["collection"]["name"] or "Collection"


# --- Markdown -----------------------------------------------------------------------------------
def _md(value: Any) -> str:
    text = "" if value is None else str(value)
    return text.replace("\\", "\\\\").replace("|", "\\|").replace("\r", " ").replace("\n", " ")


def _md_block(block: Block) -> list[str]:
    if block[0] == "p":
        return [_md(block[1]), ""]
    if block[0] == "list":
        return [*(f"- {_md(x)}" for x in block[1]), ""]
    headers, rows = block[1], block[2]
    lines = ["| " + " | ".join(_md(h) for h in headers) + " |",
             "|" + "---|" * len(headers)]
    lines += ["| " + " | ".join(_md(c) for c in row) + " |" for row in rows]
    return [*lines, ""]


def render_markdown(facts: DatasheetFacts, answers: dict[str, str]) -> str:
    """datasheet.md."""
    lines = [f"# Datasheet: {_md(_title(facts, answers))}", "",
             f"Generated {facts['generated_at']} by collector {facts['tool_version']} from the "
             "collection's ledger. Structured after *Datasheets for Datasets* (Gebru et al.); "
             "questions in our own words.", "", "> **Caution**", ">"]
    lines += [f"> - {c}" for c in CAUTION] + [""]
    lines += ["Legend: *From the ledger* = computed from the ledger; *Pre-filled* = facts "
              "the curator should confirm; *Curator* = answers from the answers file.", ""]
    desc = answers.get("dataset.description") or facts["collection"]["description"]
    if desc:
        lines += [_md(desc), ""]
    for section in build_document(facts, answers):
        lines += [f"## {section.title}", ""]
        for view in section.questions:
            q = view.question
            lines += [f"### {_md(q.text)}", "", f"`{q.id}` — {KIND_LABEL[q.kind]}", ""]
            if view.blocks:
                for block in view.blocks:
                    lines += _md_block(block)
            if view.answer:
                lines += [f"**Curator:** {_md(view.answer)}", ""]
            elif q.kind != "A":
                lines += [f"*{NOT_ANSWERED}*", ""]
    lines += _croissant_md(facts, answers)
    return "\n".join(lines).rstrip() + "\n"


def _croissant_notes(facts: DatasheetFacts, answers: dict[str, str]) -> list[str]:
    notes = ["croissant.json describes this folder (Croissant 1.0 with the RAI extension)."]
    if "dataset.date_published" not in answers:
        notes.append(f"Pre-filled, please confirm: datePublished is the export date "
                     f"{facts['generated_at'][:10]}; set dataset.date_published to change it.")
    return notes


def _croissant_md(facts: DatasheetFacts, answers: dict[str, str]) -> list[str]:
    problems = facts.get("croissant_problems") or []
    out = ["## Croissant metadata", "", *(f"{_md(n)}\n" for n in
                                          _croissant_notes(facts, answers))]
    if problems:
        out += ["", "Missing before it can be published:", ""]
        out += [f"- {_md(p)}" for p in problems]
    return [*out, ""]


# --- HTML ---------------------------------------------------------------------------------------
CSS = """
body{font:15px/1.5 system-ui,-apple-system,"Segoe UI",sans-serif;color:#1d232a;max-width:60rem;
margin:2rem auto;padding:0 1rem}
h1{font-size:1.7rem;margin-bottom:.2rem}h2{border-bottom:2px solid #d0d7de;margin-top:2.2rem}
h3{font-size:1rem;margin:1.4rem 0 .3rem}.meta{color:#57606a;font-size:.9rem}
.caution{border-left:5px solid #bf8700;background:#fff8c5;padding:.6rem 1rem;margin:1rem 0}
.kind{font-size:.75rem;color:#57606a}.kind code{background:#f0f2f4;padding:0 .3rem}
.kind.P{color:#9a6700}.answer{background:#ddf4ff;padding:.4rem .7rem;border-radius:4px}
.none{color:#8c959f;font-style:italic}table{border-collapse:collapse;margin:.4rem 0 .8rem;
font-size:.85rem}th,td{border:1px solid #d0d7de;padding:.2rem .5rem;text-align:left;
vertical-align:top}th{background:#f6f8fa}td.n{text-align:right;font-variant-numeric:tabular-nums}
figure{margin:1rem 0;page-break-inside:avoid;break-inside:avoid}figure svg{max-width:100%;
height:auto}figcaption{font-weight:600;font-size:.9rem}.plots{display:grid;
grid-template-columns:repeat(auto-fit,minmax(24rem,1fr));gap:1rem}
@media print{body{margin:0;max-width:none;font-size:11pt}h2{page-break-after:avoid;
break-after:avoid}h3{page-break-after:avoid}table,.caution{page-break-inside:avoid}
.plots{display:block}a{color:inherit}}
"""


def _e(value: Any) -> str:
    return html.escape("" if value is None else str(value))


def _html_block(block: Block) -> str:
    if block[0] == "p":
        return f"<p>{_e(block[1])}</p>"
    if block[0] == "list":
        return "<ul>" + "".join(f"<li>{_e(x)}</li>" for x in block[1]) + "</ul>"
    head = "".join(f"<th>{_e(h)}</th>" for h in block[1])
    body = "".join(
        "<tr>" + "".join(f'<td class="n">{_e(c)}</td>' if isinstance(c, int | float)
                         else f"<td>{_e(c)}</td>" for c in row) + "</tr>"
        for row in block[2])
    return f"<table><thead><tr>{head}</tr></thead><tbody>{body}</tbody></table>"


def render_html(facts: DatasheetFacts, answers: dict[str, str], plots: dict[str, str]) -> str:
    """datasheet.html: one self-contained page (inline CSS and SVG, no external requests)."""
    from collector.exports.plots import PLOT_TITLES

    title = _title(facts, answers)
    parts = ["<!DOCTYPE html>", '<html lang="en"><head><meta charset="utf-8">',
             '<meta name="viewport" content="width=device-width, initial-scale=1">',
             f"<title>Datasheet: {_e(title)}</title><style>{CSS}</style></head><body>",
             f"<h1>Datasheet: {_e(title)}</h1>",
             f'<p class="meta">Generated {_e(facts["generated_at"])} by collector '
             f"{_e(facts['tool_version'])} from the collection's ledger. Structured after "
             "<i>Datasheets for Datasets</i> (Gebru et al.); questions in our own words.</p>",
             '<div class="caution" role="note"><strong>Caution</strong><ul>'
             + "".join(f"<li>{_e(c)}</li>" for c in CAUTION) + "</ul></div>"]
    desc = answers.get("dataset.description") or facts["collection"]["description"]
    if desc:
        parts.append(f"<p>{_e(desc)}</p>")
    figures = [f"<figure><figcaption>{_e(PLOT_TITLES[name])}</figcaption>{svg}</figure>"
               for name, svg in plots.items() if svg]
    if figures:
        parts.append('<h2>At a glance</h2><div class="plots">' + "".join(figures) + "</div>")
    for section in build_document(facts, answers):
        parts.append(f'<h2 id="{_e(section.key)}">{_e(section.title)}</h2>')
        for view in section.questions:
            q = view.question
            parts.append(f'<h3 id="{_e(q.id)}">{_e(q.text)}</h3>'
                         f'<div class="kind {q.kind}"><code>{_e(q.id)}</code> '
                         f"{_e(KIND_LABEL[q.kind])}</div>")
            parts += [_html_block(b) for b in view.blocks]
            if view.answer:
                parts.append(f'<p class="answer"><strong>Curator:</strong> '
                             f"{_e(view.answer)}</p>")
            elif q.kind != "A":
                parts.append(f'<p class="none">{_e(NOT_ANSWERED)}</p>')
    problems = facts.get("croissant_problems") or []
    parts.append("<h2>Croissant metadata</h2>" + "".join(
        f"<p>{_e(n)}</p>" for n in _croissant_notes(facts, answers)))
    if problems:
        parts.append("<p>Missing before it can be published:</p><ul>"
                     + "".join(f"<li>{_e(p)}</li>" for p in problems) + "</ul>")
    parts.append("</body></html>")
    return "\n".join(parts) + "\n"
