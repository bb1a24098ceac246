"""IIIF source kind: a Presentation API manifest or collection (3.0 or 2.1), one item per
canvas, each image asked for at no more pixels than the recipe needs.

Walk: the start URL is a Collection or a Manifest (Presentation 3.0 §3; 2.1 ``sc:Collection`` /
``sc:Manifest``). Collections nest up to ``max_depth`` levels; at most ``max_manifests``
manifests are read; a document already read (a collection cycle, a manifest listing itself) is
noted and not read again. Fields (Presentation 3.0 §4.1, 2.1 §5): ``label`` (language maps, the
recipe's ``language`` first), ``metadata``, ``summary``, ``rights`` / 2.1 ``license`` (the
licence URL; a RightsStatements.org URI is recognised by the run), ``requiredStatement`` / 2.1
``attribution``, ``homepage`` / 2.1 ``related`` (the page URL), ``navDate``, ``partOf``.

Sizes (sources.iiif_sizes): each image service's ``info.json`` is read through the fetcher once
per run (cached here by service id) and kept in the ledger for a week by the fetcher
(``get_page(keep_for=...)``), so later runs do not ask again; the request is chosen from it:
``target_size`` (longest side), level-0 ``sizes``, ``maxWidth``/``maxHeight``/``maxArea``,
never upscaled. What was chosen and why is
recorded as the candidate's ``size_request`` (service, full size, size asked, why); a
service with only tiles gives a note and its canvas is skipped.
"""

from __future__ import annotations

from collections.abc import Iterator, Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from collector.schema import Key, Problems, at_least, http_url, one_of
from collector.sources.base import (
    Candidate,
    FetchError,
    NoteSink,
    OnceNotes,
    PageFetcher,
    SourceError,
    SourceKind,
    capped_json,
    resolve_url,
    strip_fragment,
)
from collector.sources.iiif_sizes import (
    ServiceInfo,
    SizeChoice,
    choose_size,
    parse_info,
    service_version,
)
from collector.sources.iiif_values import (
    Painted,
    canvases,
    doc_type,
    document_version,
    first_id,
    lang_text,
    members,
    metadata_pairs,
)

DEFAULT_TARGET = 2048
KEYS: dict[str, Key] = {
    "url": Key("str", required=True, check=http_url,
               hint='a IIIF manifest or collection, e.g. "https://example.org/iiif/collection"'),
    "language": Key("str", "en"),
    "max_depth": Key("int", 5, check=at_least(0)),
    "max_manifests": Key("int", 1000, check=at_least(1)),
    "first_canvas_only": Key("bool", False),
    "target_size": Key("int", DEFAULT_TARGET, check=at_least(0)),
    "upscale": Key("bool", False),
    "level0_sizes": Key("str", "at_least", check=one_of("at_least", "at_most")),
    "creator_labels": Key("list[str]", ["Creator", "Author", "Artist", "Photographer"]),
    "date_labels": Key("list[str]", ["Date"]),
}


@dataclass(frozen=True)
class Config:
    """One iiif source table, with its defaults."""

    name: str
    url: str
    language: str
    max_depth: int
    max_manifests: int
    first_canvas_only: bool
    target_size: int
    upscale: bool
    level0_sizes: str
    creator_labels: tuple[str, ...]
    date_labels: tuple[str, ...]

    @classmethod
    def from_table(cls, table: Mapping[str, Any]) -> Config:
        """Read a validated table, filling the defaults of KEYS."""
        def get(key: str) -> Any:
            return table.get(key, KEYS[key].default)
        return cls(name=str(table.get("name", "")), url=str(table["url"]),
                   language=str(get("language")), max_depth=int(get("max_depth")),
                   max_manifests=int(get("max_manifests")),
                   first_canvas_only=bool(get("first_canvas_only")),
                   target_size=int(get("target_size")), upscale=bool(get("upscale")),
                   level0_sizes=str(get("level0_sizes")),
                   creator_labels=tuple(get("creator_labels")),
                   date_labels=tuple(get("date_labels")))


# info.json describes a service's sizes, which change rarely: kept 7 days (common practice,
# no source; the Image API sets no caching rule of its own).
INFO_KEEP_S = 7 * 24 * 3600.0


@dataclass
class _Walk:
    """State of one listing: documents read, manifests counted, info.json answers cached."""

    seen: set[str] = field(default_factory=set)
    manifests: int = 0
    infos: dict[str, ServiceInfo | str] = field(default_factory=dict)
    keys: set[str] = field(default_factory=set)


class _Walker:
    def __init__(self, cfg: Config, fetcher: PageFetcher, notes: OnceNotes) -> None:
        self.cfg, self.fetcher, self.notes = cfg, fetcher, notes
        self.walk = _Walk()

    def fetch_json(self, url: str, purpose: str) -> Any | None:
        """GET url and decode JSON; a failure becomes a note (the start URL's failure ends the
        source through the raised FetchError). An image service's info.json is kept in the
        ledger for INFO_KEEP_S and not asked again meanwhile, in this run or later ones."""
        try:
            page = self.fetcher.get_page(url, purpose=purpose,
                                         keep_for=INFO_KEEP_S if purpose == "info" else 0.0)
        except FetchError as exc:
            if url == self.cfg.url:
                raise
            self.notes.add("fetch_failed", exc.url, f"{purpose} request failed: {exc}; "
                           "that document is skipped (reported once per reason)",
                           once_key=f"{purpose}:{exc.reason}")
            return None
        try:
            return page.json()
        except ValueError:
            self.notes.add("bad_json", page.url, f"the {purpose} answer is not JSON; skipped "
                           "(check the url of this source)", once_key=f"json:{purpose}")
            return None

    def run(self) -> Iterator[Candidate]:
        """Yield the candidates of the start document and everything below it."""
        yield from self._document(self.cfg.url, depth=0)

    def _document(self, url: str, depth: int) -> Iterator[Candidate]:
        url = strip_fragment(url)
        if url in self.walk.seen:
            self.notes.add("loop", url, "this IIIF document was already read in this run (a "
                           "collection cycle or a document listing itself); not read again")
            return
        if self.walk.manifests >= self.cfg.max_manifests:
            self.notes.add("max_manifests", self.cfg.url, f"stopped after max_manifests = "
                           f"{self.cfg.max_manifests} manifests; there may be more",
                           once_key="max_manifests")
            return
        self.walk.seen.add(url)
        doc = self.fetch_json(url, "listing")
        if not isinstance(doc, dict):
            if doc is not None:
                self.notes.add("wrong_shape", url, "the IIIF document is not a JSON object")
            return
        kind = doc_type(doc)
        if kind == "Manifest":
            self.walk.manifests += 1
            yield from self._manifest(url, doc)
        elif kind == "Collection":
            yield from self._collection(url, doc, depth)
        else:
            self.notes.add("wrong_shape", url, f"expected a IIIF Collection or Manifest, got "
                           f"type {kind or '(none)'!r}; skipped", once_key=f"type:{kind}")

    def _collection(self, url: str, doc: Mapping[str, Any], depth: int) -> Iterator[Candidate]:
        for kind, ref in members(doc):
            target = resolve_url(url, ref)
            if target is None:
                continue
            if kind == "Collection" and depth + 1 > self.cfg.max_depth:
                self.notes.add("max_depth", target, f"collection nested deeper than max_depth = "
                               f"{self.cfg.max_depth}; not read", once_key="max_depth")
                continue
            if kind in ("Collection", "Manifest"):
                yield from self._document(target, depth + 1)

    def _manifest(self, url: str, doc: Mapping[str, Any]) -> Iterator[Candidate]:
        fields = self._manifest_fields(url, doc)
        found = list(canvases(doc))
        if not found:
            self.notes.add("no_canvases", url, "the manifest has no canvases with an id; "
                           "nothing to gather from it", once_key=f"empty:{url}")
        for n, painted in enumerate(found):
            if n and self.cfg.first_canvas_only:
                break
            if painted.canvas_id in self.walk.keys:
                continue
            self.walk.keys.add(painted.canvas_id)
            cand = self._candidate(url, painted, fields, multi=len(found) > 1)
            if cand is not None:
                yield cand

    def _manifest_fields(self, url: str, doc: Mapping[str, Any]) -> dict[str, Any]:
        """What every canvas of a manifest shares: title, creator, date, licence, page, the
        recorded IIIF facts."""
        lang = self.cfg.language
        pairs = metadata_pairs(doc, lang)
        v3 = document_version(doc) == "3.0"
        required = doc.get("requiredStatement") if v3 else None
        if isinstance(required, dict):  # 3.0 §4.1: a label/value pair
            attribution = lang_text(required.get("value"), lang)
        else:  # 2.1: "attribution" is the text to show
            attribution = None if v3 else lang_text(doc.get("attribution"), lang)
        rights = first_id(doc.get("rights") if v3 else doc.get("license"))
        page = first_id(doc.get("homepage") if v3 else doc.get("related"))
        facts = {
            "manifest": url, "presentation": document_version(doc),
            "summary": lang_text(doc.get("summary" if v3 else "description"), lang),
            "metadata": pairs, "required_statement": attribution,
            "nav_date": doc.get("navDate") if isinstance(doc.get("navDate"), str) else None,
            "part_of": first_id(doc.get("partOf") if v3 else doc.get("within")),
        }
        return {
            "title": lang_text(doc.get("label"), lang),
            "creator": _pick(pairs, self.cfg.creator_labels),
            "date": _pick(pairs, self.cfg.date_labels) or facts["nav_date"],
            "licence_url": resolve_url(url, rights) if _is_url(rights) else None,
            "licence_raw": None if _is_url(rights) else rights,
            "page_url": resolve_url(url, page) if page else url,
            "facts": {k: v for k, v in facts.items() if v},
        }

    def _candidate(self, url: str, painted: Painted, fields: Mapping[str, Any], *,
                   multi: bool) -> Candidate | None:
        lang = self.cfg.language
        title = fields["title"]
        canvas_label = lang_text(painted.canvas.get("label"), lang)
        if multi and canvas_label:
            title = f"{title} ({canvas_label})" if title else canvas_label
        licence_url, licence_raw = fields["licence_url"], fields["licence_raw"]
        own = first_id(painted.canvas.get("rights"))  # 3.0 §4.1: a canvas may carry its own
        if own:
            licence_url, licence_raw = ((resolve_url(url, own), None) if _is_url(own)
                                        else (None, own))
        facts = dict(fields["facts"], canvas=painted.canvas_id)
        image_url = self._image_url(url, painted, facts)
        if image_url is None:
            return None
        size_request = facts.pop("image", None)
        return Candidate(
            source_key=painted.canvas_id, image_url=image_url, page_url=fields["page_url"],
            title=title, creator=fields["creator"], licence_url=licence_url,
            licence_raw=licence_raw, date=fields["date"],
            metadata={"iiif": capped_json(facts)}, size_request=size_request)

    def _image_url(self, url: str, painted: Painted, facts: dict[str, Any]) -> str | None:
        """The image to request: negotiated through the image service, else the painted
        resource's own URL; None (after a note) when no request fits the recipe."""
        known = [(s, v) for s in painted.services if (v := service_version(s)) is not None]
        known.sort(key=lambda sv: sv[1], reverse=True)  # a 3.0 service before a 2.1 one
        service, version = known[0] if known else (None, None)
        if service is None or version is None:
            if painted.image_id is None:
                self.notes.add("missing_image", url, "a canvas has no painted image; such "
                               "canvases are skipped (reported once per run)", once_key="image")
                return None
            facts["image"] = {"why": "no IIIF image service: the painted resource as given"}
            return resolve_url(url, painted.image_id)
        service_id = resolve_url(url, first_id(service)) or ""
        choice = self._choice(service_id, version)
        if isinstance(choice, str):
            self.notes.add("iiif_size", service_id, f"{choice} (reported once per service)",
                           once_key=f"size:{service_id}")
            return None
        info = self.walk.infos[service_id]
        assert isinstance(info, ServiceInfo)
        facts["image"] = {
            "service": service_id, "image_api": version, "level": info.level,
            "full_size": [info.width, info.height], "size": choice.size,
            "asked_size": [choice.width, choice.height], "why": choice.why}
        return choice.url

    def _choice(self, service_id: str, version: str) -> SizeChoice | str:
        if service_id not in self.walk.infos:
            info = self.fetch_json(f"{service_id.rstrip('/')}/info.json", "info")
            self.walk.infos[service_id] = (
                parse_info(info, service_id, version) if info is not None
                else "its info.json could not be read")
        info = self.walk.infos[service_id]
        if isinstance(info, str):
            return f"image service {service_id}: {info}; its images are skipped"
        return choose_size(info, self.cfg.target_size, upscale=self.cfg.upscale,
                           listed=self.cfg.level0_sizes)


def _is_url(value: str | None) -> bool:
    """Whether a rights value is a URI (3.0 §4.1 requires one; 2.1 ``license`` is often text)."""
    return bool(value) and ("://" in str(value) or str(value).startswith("//"))


def _pick(pairs: Mapping[str, str], labels: tuple[str, ...]) -> str | None:
    """The first metadata value whose label is one of labels (case-insensitive)."""
    wanted = [label.lower() for label in labels]
    for label in wanted:
        for key, value in pairs.items():
            if key.lower() == label:
                return value
    return None


def check(table: Mapping[str, Any], prefix: str, problems: Problems) -> None:
    """Checks across keys: upscaling needs a target to upscale to."""
    if table.get("upscale") and table.get("target_size", DEFAULT_TARGET) == 0:
        problems.add(f"{prefix}.upscale", "needs a target_size above 0 (the size to upscale "
                     "to); remove upscale or set target_size")


def iter_candidates(source: Mapping[str, Any], fetcher: PageFetcher | None, notes: NoteSink,
                    base_dir: Path) -> Iterator[Candidate]:
    """Yield the Candidates of one validated iiif source table."""
    del base_dir  # not used by this kind
    if fetcher is None:
        raise SourceError(str(source.get("name", "")), None, "a iiif source needs a fetcher")
    once = OnceNotes(notes, str(source.get("name", "")))
    yield from _Walker(Config.from_table(source), fetcher, once).run()


KIND = SourceKind(
    name="iiif",
    keys=KEYS,
    check=check,
    list_candidates=iter_candidates,
    uses_network=True,
    mechanism="IIIF Presentation manifests and collections, images sized through the IIIF "
              "Image API",
    # croissant-rai-spec.md, dataCollectionType recommended terms
    collection_type="Web API",
)
