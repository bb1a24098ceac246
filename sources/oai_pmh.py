"""OAI-PMH 2.0 harvesting: Identify, then ListRecords page by page (resumptionToken), with
incremental harvests that ask only ``from`` the previous complete harvest.

The protocol: OAI-PMH 2.0 (http://www.openarchives.org/OAI/openarchivesprotocol.html);
section numbers in comments refer to it. Every request goes through the fetcher it is handed
(robots.txt, budgets, Retry-After: §3.5.1 flow control with 503 is the fetcher's retry).
Records with ``status="deleted"`` become withdrawn candidates; the run marks an item it
already has as withdrawn by the archive. The XML reading lives in :mod:`sources.oai_xml`.
"""

from __future__ import annotations

import re
from collections.abc import Iterator, Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from collector.schema import Key, Problems, at_least, check_table, http_url
from collector.sources.base import (
    Candidate,
    ListingState,
    NoteSink,
    OnceNotes,
    PageFetcher,
    SourceError,
    SourceKind,
    capped_json,
    resolve_url,
)
from collector.sources.oai_xml import (
    OAI_DC_NAMESPACES,
    SECONDS,
    Answer,
    FieldPath,
    NotOai,
    Record,
    compile_path,
    harvest_from,
    parse_answer,
    path_values,
)

DEFAULT_MAX_PAGES = 1000
MAX_RESTARTS = 3  # a list restarted this often after badResumptionToken is given up
URL_FIELDS = ("image_url", "page_url", "licence_url")
TEXT_FIELDS = ("title", "creator", "date", "licence")
# The oai_dc mapping (oai_dc schema: the 15 DCMES 1.1 elements, each repeatable).
OAI_DC_FIELDS = {"title": "dc:title", "creator": "dc:creator", "date": "dc:date",
                 "licence": "dc:rights", "licence_url": "dc:rights",
                 "image_url": "dc:identifier", "page_url": "dc:identifier"}
# Which of several identifiers is which: common practice, no source (a recipe may say).
DEFAULT_IMAGE_PATTERN = r"(?i)\.(jpe?g|png|gif|tiff?|webp)([?#]|$)"
DEFAULT_URL_PATTERN = r"(?i)^https?://"

KEYS: dict[str, Key] = {
    "url": Key("str", required=True, check=http_url,
               hint='the repository\'s base URL, e.g. "https://example.org/oai"'),
    "metadata_prefix": Key("str", default="oai_dc"),
    "set": Key("str"),
    "incremental": Key("bool", default=True),
    "max_pages": Key("int", default=DEFAULT_MAX_PAGES, check=at_least(1)),
    "namespaces": Key("table[str]"),
    "fields": Key("table[str]"),
    "image_pattern": Key("str"),
    "page_pattern": Key("str"),
}
FIELD_KEYS: dict[str, Key] = {name: Key("str") for name in (*TEXT_FIELDS, *URL_FIELDS)}


def _regex_problem(value: Any) -> str | None:
    try:
        re.compile(value)
    except re.error as exc:
        return f'is not a valid regular expression ("{value}"): {exc}'
    return None


def check(table: Mapping[str, Any], prefix: str, problems: Problems) -> None:
    """The checks across keys of one oai_pmh source table (KEYS are checked first)."""
    for key in ("image_pattern", "page_pattern"):
        if isinstance(table.get(key), str) and (why := _regex_problem(table[key])):
            problems.add(f"{prefix}.{key}", why)
    namespaces = table.get("namespaces")
    spaces = {**OAI_DC_NAMESPACES, **(namespaces if isinstance(namespaces, dict) else {})}
    fields = table.get("fields")
    if isinstance(fields, dict):
        check_table(fields, FIELD_KEYS, f"{prefix}.fields", problems)
        for name, text in fields.items():
            if name in FIELD_KEYS and isinstance(text, str):
                try:
                    compile_path(text, spaces)
                except ValueError as exc:
                    problems.add(f"{prefix}.fields.{name}", f'"{text}" {exc}')
    prefix_name = table.get("metadata_prefix", "oai_dc")
    given = fields if isinstance(fields, dict) else {}
    if prefix_name != "oai_dc" and "image_url" not in given:
        problems.add(f"{prefix}.fields.image_url",
                     f'required for metadata_prefix = "{prefix_name}": give the path of the '
                     'image URL in that format, e.g. "mods:location/mods:url"')


@dataclass
class Config:
    """One oai_pmh source table, compiled."""

    name: str
    url: str
    prefix: str
    set: str | None
    incremental: bool
    max_pages: int
    namespaces: dict[str, str]
    fields: dict[str, FieldPath]
    image_pattern: re.Pattern[str]
    page_pattern: re.Pattern[str]

    @classmethod
    def from_table(cls, table: Mapping[str, Any]) -> Config:
        """Compile a validated table (oai_dc defaults under the recipe's fields)."""
        prefix = str(table.get("metadata_prefix", "oai_dc"))
        spaces = {**OAI_DC_NAMESPACES, **dict(table.get("namespaces") or {})}
        given = dict(table.get("fields") or {})
        paths = {**(OAI_DC_FIELDS if prefix == "oai_dc" else {}), **given}
        return cls(
            name=str(table["name"]), url=str(table["url"]), prefix=prefix,
            set=table.get("set"), incremental=bool(table.get("incremental", True)),
            max_pages=int(table.get("max_pages", DEFAULT_MAX_PAGES)), namespaces=spaces,
            fields={k: compile_path(v, spaces) for k, v in paths.items()},
            image_pattern=re.compile(table.get("image_pattern") or DEFAULT_IMAGE_PATTERN),
            page_pattern=re.compile(table.get("page_pattern") or DEFAULT_URL_PATTERN),
        )


@dataclass
class _Harvest:
    """Where one harvest is: pages read, the first responseDate, what was seen."""

    pages: int = 0
    restarts: int = 0
    first_date: str | None = None
    token: str | None = None
    seen_tokens: set[str] = field(default_factory=set)
    seen_keys: set[str] = field(default_factory=set)
    complete_list_size: int | None = None
    cursor: int | None = None


class _Harvester:
    """One harvest of one oai_pmh source."""

    def __init__(self, cfg: Config, fetcher: PageFetcher, notes: OnceNotes,
                 state: ListingState) -> None:
        self.cfg, self.fetcher, self.notes, self.state = cfg, fetcher, notes, state

    def request(self, params: dict[str, str], what: str) -> Answer | None:
        """One request; the answer read, or None after a note (not OAI-PMH, or an error
        the harvest cannot go on from). FetchError goes up: the run records its reason."""
        page = self.fetcher.get_page(self.cfg.url, purpose="listing", params=params)
        try:
            return parse_answer(page.body)
        except NotOai as exc:
            self.notes.add("not_oai_pmh", page.url, f"the {what} answer: {exc}; harvest "
                           "stopped")
            return None

    def identify(self) -> dict[str, str] | None:
        """Identify (§4.2): granularity, earliestDatestamp, deletedRecord."""
        answer = self.request({"verb": "Identify"}, "Identify")
        if answer is None:
            return None
        if answer.errors:
            self._error_note(answer, "Identify")
            return None
        return answer.identify

    def run(self) -> Iterator[Candidate]:
        """Identify, then ListRecords to the end of the list (or max_pages)."""
        info = self.identify()
        if info is None:
            return
        base = {"verb": "ListRecords", "metadataPrefix": self.cfg.prefix}
        if self.cfg.set:
            base["set"] = self.cfg.set
        previous = self.state.previous if self.cfg.incremental else None
        if previous:
            # §3.3.1: from is inclusive; at the repository's granularity (§3.3.2)
            base["from"] = harvest_from(previous, info.get("granularity") or SECONDS)
            if info.get("deletedRecord", "no") == "no":
                self.notes.add("no_deletions", self.cfg.url, "the repository keeps no record "
                               "of deletions (Identify deletedRecord = no): records it "
                               "withdrew since the last harvest are not reported")
        h = _Harvest()
        while h.pages < self.cfg.max_pages:
            params = {"verb": "ListRecords", "resumptionToken": h.token} if h.token else base
            answer = self.request(params, "ListRecords")
            if answer is None:
                return
            h.pages += 1
            h.first_date = h.first_date or answer.response_date
            if answer.errors:
                after = self._after_error(answer, h)
                if after == "stop":
                    return
                if after == "restart":
                    continue
                break  # an empty list: nothing (new) to harvest
            yield from self._candidates(answer, h)
            if not self._advance(answer, h):
                return
            if h.token is None:
                break
        else:
            self._stopped_at_max_pages(h)
            return
        if h.first_date:
            self.state.remember(h.first_date)

    def _after_error(self, answer: Answer, h: _Harvest) -> str:
        """What follows an error answer: "end" for noRecordsMatch (an empty list, §3.6,
        §4.6), "restart" for badResumptionToken (an expired token, §3.5), "stop" after a
        note for every other code."""
        code = answer.errors[0].code
        if code == "noRecordsMatch":
            return "end"
        if code == "badResumptionToken" and h.token is not None:
            h.restarts += 1
            if h.restarts > MAX_RESTARTS:
                self.notes.add("oai_error", self.cfg.url, f"the repository refused the "
                               f"resumptionToken {MAX_RESTARTS + 1} times; harvest stopped")
                return "stop"
            self.notes.add("token_expired", self.cfg.url, "the repository refused a "
                           f"resumptionToken (badResumptionToken: {answer.errors[0].message!r})"
                           "; the list was started again from its first page")
            h.token = None
            h.seen_tokens.clear()
            return "restart"
        self._error_note(answer, "ListRecords")
        return "stop"

    def _error_note(self, answer: Answer, verb: str) -> None:
        codes = "; ".join(f"{e.code}: {e.message}" if e.message else e.code
                          for e in answer.errors)
        self.notes.add("oai_error", self.cfg.url, f"the repository answered {verb} with an "
                       f"OAI-PMH error ({codes}); check metadata_prefix, set and url of this "
                       "source")

    def _advance(self, answer: Answer, h: _Harvest) -> bool:
        """Take the next resumptionToken (§3.5): none or empty ends the list (h.token None);
        a token seen before is a loop (noted, False)."""
        tok = answer.token
        if tok is not None:
            h.complete_list_size = tok.complete_list_size or h.complete_list_size
            h.cursor = tok.cursor if tok.cursor is not None else h.cursor
        if tok is None or not tok.value:
            h.token = None
            return True
        if tok.value in h.seen_tokens:
            self.notes.add("loop", self.cfg.url, f'the resumptionToken "{tok.value:.40}" came '
                           "back a second time; harvest stopped")
            return False
        h.seen_tokens.add(tok.value)
        h.token = tok.value
        return True

    def _stopped_at_max_pages(self, h: _Harvest) -> None:
        where = ""
        if h.complete_list_size is not None:
            where = (f" (at cursor {h.cursor if h.cursor is not None else '?'} of "
                     f"completeListSize {h.complete_list_size})")
        self.notes.add("max_pages", self.cfg.url, f"stopped after max_pages = "
                       f"{self.cfg.max_pages} pages{where}; there may be more, and the next "
                       "run harvests from the same point again")

    def _candidates(self, answer: Answer, h: _Harvest) -> Iterator[Candidate]:
        for record in answer.records:
            if not record.identifier:
                self.notes.add("missing_id", self.cfg.url, "a record has no header "
                               "identifier; such records are skipped (reported once per run)",
                               once_key="id")
                continue
            if record.identifier in h.seen_keys:
                continue
            h.seen_keys.add(record.identifier)
            candidate = self._candidate(record)
            if candidate is not None:
                yield candidate

    def _candidate(self, record: Record) -> Candidate | None:
        oai = {"identifier": record.identifier, "datestamp": record.datestamp,
               "sets": list(record.sets)}
        if record.deleted:
            return Candidate(source_key=record.identifier, metadata={"oai": oai},
                             withdrawn=f"the repository lists the record as deleted "
                                       f"(datestamp {record.datestamp})")
        if record.metadata is None:
            self.notes.add("no_metadata", self.cfg.url, "a record has no metadata; such "
                           "records are skipped (reported once per run)", once_key="meta")
            return None
        values = {name: path_values(record.metadata, fp, self.cfg.namespaces)
                  for name, fp in self.cfg.fields.items()}
        picked = self._urls(values)
        if picked.get("image_url") is None:
            self.notes.add("missing_image", self.cfg.url, "a record has no value matching "
                           "image_pattern at fields.image_url; such records are skipped "
                           "(reported once per run)", once_key="image")
            return None
        used = set(picked.values())
        text = {name: [v for v in values.get(name, []) if v not in used] for name in TEXT_FIELDS}
        return Candidate(
            source_key=record.identifier, image_url=picked["image_url"],
            page_url=picked.get("page_url"), licence_url=picked.get("licence_url"),
            title="; ".join(text["title"]) or None, creator="; ".join(text["creator"]) or None,
            date=text["date"][0] if text["date"] else None,
            licence_raw="; ".join(text["licence"]) or None,
            metadata={"oai": oai, "fields": capped_json(values)},
        )

    def _urls(self, values: dict[str, list[str]]) -> dict[str, str]:
        """The URL fields: the image is the first value matching image_pattern; the page and
        the licence URL the first other http(s) value (page_pattern for the page)."""
        picked: dict[str, str] = {}
        image = next((v for v in values.get("image_url", [])
                      if self.cfg.image_pattern.search(v)), None)
        if image is not None:
            picked["image_url"] = resolve_url(self.cfg.url, image) or image
        for name, pattern in (("page_url", self.cfg.page_pattern),
                              ("licence_url", re.compile(DEFAULT_URL_PATTERN))):
            found = next((v for v in values.get(name, [])
                          if pattern.search(v) and v != image), None)
            if found is not None:
                picked[name] = found
        return picked


def _harvest(source: Mapping[str, Any], fetcher: PageFetcher | None, notes: NoteSink,
             state: ListingState) -> Iterator[Candidate]:
    if fetcher is None:
        raise SourceError(str(source.get("name", "")), None, "an oai_pmh source needs a fetcher")
    once = OnceNotes(notes, str(source.get("name", "")))
    yield from _Harvester(Config.from_table(source), fetcher, once, state).run()


def list_candidates(source: Mapping[str, Any], fetcher: PageFetcher | None, notes: NoteSink,
                    base_dir: Path) -> Iterator[Candidate]:
    """A full harvest of one validated oai_pmh source table."""
    del base_dir  # not used by this kind
    yield from _harvest(source, fetcher, notes, ListingState())


def list_changes(source: Mapping[str, Any], fetcher: PageFetcher | None, notes: NoteSink,
                 base_dir: Path, state: ListingState) -> Iterator[Candidate]:
    """A harvest from the previous complete harvest's responseDate (all of it the first time,
    or with incremental = false); remembers this harvest's first responseDate when complete."""
    del base_dir  # not used by this kind
    yield from _harvest(source, fetcher, notes, state)


KIND = SourceKind(
    name="oai_pmh",
    keys=KEYS,
    check=check,
    list_candidates=list_candidates,
    list_changes=list_changes,
    uses_network=True,
    mechanism="an OAI-PMH 2.0 repository, harvested with ListRecords",
    # croissant-rai-spec.md, dataCollectionType recommended terms
    collection_type="Web API",
)
