"""The source-kind contract and the types every kind shares: SourceKind, Candidate, SourceNote,
the Page/PageFetcher protocols, and small URL and text helpers.

A kind validates its table with the one recipe schema (collector.schema); it never imports an
HTTP library (it is handed the fetcher) and never downloads images.
"""

from __future__ import annotations

import json
from collections.abc import Callable, Iterable, Iterator, Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Protocol
from urllib.parse import parse_qsl, urljoin, urlsplit, urlunsplit

from collector import urls
from collector.errors import FetchError, RecipeProblem, SourceError
from collector.safe_text import NOT_UNICODE, escaped_surrogates, valid_unicode
from collector.schema import Key, Problems

__all__ = [
    "Candidate",
    "CheckSource",
    "FetchError",
    "ListCandidates",
    "ListChanges",
    "ListingState",
    "NoteSink",
    "Page",
    "PageFetcher",
    "RecipeProblem",
    "SourceError",
    "SourceKind",
    "SourceNote",
]


@dataclass
class Candidate:
    """One image an adapter found; the orchestrator decides whether to download and keep it."""

    source_key: str
    image_url: str | None = None
    page_url: str | None = None
    title: str | None = None
    creator: str | None = None
    licence_raw: str | None = None
    licence_url: str | None = None
    date: str | None = None
    metadata: dict = field(default_factory=dict)
    local_path: Path | None = None
    content: bytes | None = None
    parent_key: str | None = None
    crop_box: tuple[int, int, int, int] | None = None
    # Set when the archive itself says the record was withdrawn (e.g. an OAI-PMH record with
    # status="deleted"): why, in the archive's words. Such a candidate has no image; the run
    # marks an item it already has as withdrawn by the archive instead of fetching anything.
    withdrawn: str | None = None
    # How the image URL's size was chosen, when the source negotiated it (IIIF: the image
    # service, its full size, the size asked for and why); kept in items.size_request.
    size_request: dict | None = None
    # The fields whose text was not valid Unicode (lone surrogates, each replaced by U+FFFD):
    # set where candidates leave their kind (sources.iter_candidates), recorded with the item.
    not_unicode: tuple[str, ...] = ()


@dataclass
class SourceNote:
    """A source-level problem worth telling the user (goes to the ledger's notes table)."""

    kind: str
    url: str | None
    message: str
    source: str = ""


NoteSink = Callable[[SourceNote], None]


class Page(Protocol):
    """What a fetched page looks like to an adapter (duck-typed; see collector.fetching.fetcher).
    Read-only: an adapter never changes a page."""

    @property
    def url(self) -> str: ...
    @property
    def status(self) -> int: ...
    @property
    def headers(self) -> Mapping[str, str]: ...
    @property
    def body(self) -> bytes: ...
    @property
    def text(self) -> str: ...
    @property
    def links(self) -> Mapping[str, Any]:
        """rel -> URL, or rel -> {"url": URL, ...} (collector.fetching.fetcher)."""
        ...

    def json(self) -> Any: ...


class PageFetcher(Protocol):
    """The one polite path for page requests; adapters never make HTTP requests themselves."""

    def get_page(
        self,
        url: str,
        *,
        purpose: str = "listing",
        item_id: int | None = None,
        params: Mapping[str, str] | None = None,
        headers: Mapping[str, str] | None = None,
        secret_params: Iterable[str] = (),
        keep_for: float = 0.0,
    ) -> Page: ...


class ListingState:
    """What one listing of a source hands on to the next run of the same source.

    ``previous`` is the value the last *complete* listing remembered (None the first time);
    a kind calls :meth:`remember` once its listing has reached the end cleanly (e.g. the
    OAI-PMH ``responseDate`` of a harvest, to ask only ``from`` it next time). The run keeps
    ``reached`` only when the run finished, the listing was not cut short, and every item
    listed in this run was settled; otherwise the next run starts from ``previous`` again.
    The value is opaque text to everyone but the kind.
    """

    def __init__(self, previous: str | None = None) -> None:
        self.previous = previous
        self.reached: str | None = None

    def remember(self, value: str) -> None:
        """The listing reached its end cleanly; ``value`` is where the next one may start."""
        self.reached = value


ListCandidates = Callable[[Mapping[str, Any], PageFetcher | None, NoteSink, Path],
                          Iterator[Candidate]]
ListChanges = Callable[[Mapping[str, Any], PageFetcher | None, NoteSink, Path, ListingState],
                       Iterator[Candidate]]
CheckSource = Callable[[Mapping[str, Any], str, Problems], None]


@dataclass(frozen=True)
class SourceKind:
    """One source kind: everything the rest of collector knows about it.

    A kind module exports one of these as ``KIND``; built-in kinds are the modules of this
    package that do, other packages register theirs under the entry-point group
    ``collector.sources`` (see sources.registry).

    - ``keys``: the table's keys besides ``name`` and ``kind`` (collector.schema.Key);
    unknown
      keys, types, required keys and per-value checks are reported from these.
    - ``check``: optional checks across keys, run after ``keys``; adds to the Problems it is
      given (key paths start with the prefix it is given, e.g. "sources[1]").
    - ``list_candidates(source, fetcher, notes, base_dir)``: yields the Candidates of one valid
      table; problems of the source go to ``notes``; pages only through ``fetcher`` (None when
      ``uses_network`` is false); relative paths start at ``base_dir`` (the collection folder).
    - ``uses_network``: whether listing sends requests (a dry run can estimate only those).
    - ``mechanism``: how items are obtained, as a phrase for the datasheet ("a JSON web API,
      read page by page").
    - ``collection_type``: the Croissant RAI ``rai:dataCollectionType`` term for it ("Web API",
      "Web Scraping", "Manual Human Curator", ... or "Others").
    - ``list_changes(source, fetcher, notes, base_dir, state)``: optional; a kind that can
      list only what changed since its previous complete listing (incremental harvesting)
      gets the source's :class:`ListingState` here instead of ``list_candidates``.
    """

    name: str
    keys: Mapping[str, Key]
    list_candidates: ListCandidates
    uses_network: bool
    mechanism: str
    collection_type: str
    check: CheckSource | None = None
    list_changes: ListChanges | None = None


# ---------------------------------------------------------------------------------------------
# Text that is not valid Unicode

# The candidate's fields that hold text (or JSON of text) a source read from a listing.
TEXT_FIELDS = ("source_key", "image_url", "page_url", "title", "creator", "licence_raw",
               "licence_url", "date", "metadata", "parent_key", "withdrawn", "size_request")
KEY_FIELDS = ("source_key", "parent_key")  # identifiers: surrogates escaped, not replaced
# NOT_UNICODE (collector.safe_text): the note kind and the item's metadata key


def valid_candidate(c: Candidate) -> Candidate:
    """``c`` with every lone surrogate in its text replaced by U+FFFD
    (:func:`collector.safe_text.valid_unicode`), in its keys written as an escape instead
    (``\\ud800``: two keys stay two items); the fields that held one are named in
    ``c.not_unicode``. A local path is left as it is (a file name's undecodable bytes are
    surrogate escapes, PEP 383, shown by ``shown_name``)."""
    repaired = []
    for name in TEXT_FIELDS:
        value = getattr(c, name)
        if name in KEY_FIELDS and isinstance(value, str):
            value, changed = escaped_surrogates(value)
        else:
            value, changed = valid_unicode(value)
        if changed:
            setattr(c, name, value)
            repaired.append(name)
    c.not_unicode = tuple(dict.fromkeys((*c.not_unicode, *repaired)))
    if c.not_unicode:  # the item's own note: which fields held such text
        meta = dict(c.metadata or {})
        if NOT_UNICODE in meta:  # a source's own field of that name is kept beside it
            meta[f"{NOT_UNICODE} (as listed)"] = meta.pop(NOT_UNICODE)
        c.metadata = {**meta, NOT_UNICODE: list(c.not_unicode)}
    return c


def unusable_image_url(c: Any) -> tuple[str, str, str] | None:
    """(state, reason, detail) of a candidate whose image URL cannot be requested before any
    request: none given, or one that held text that is not valid Unicode (its lone
    surrogates name no bytes a URL could send: RFC 3986 §2.5 percent-encodes UTF-8); None
    when the URL can go to the fetcher and its guard."""
    if not c.image_url:
        return "rejected", "no_image_url", "the source gave no image URL for this item"
    if "image_url" in getattr(c, "not_unicode", ()):
        return ("failed", "unsafe_url", "the image URL held text that is not valid Unicode "
                "(a lone surrogate such as the JSON escape \\ud800, RFC 8259 §8.2), so it "
                "names no URL that can be sent; not requested (the ledger keeps it with "
                "U+FFFD in that place)")
    return None


def valid_note(note: SourceNote) -> SourceNote:
    """A source note whose URL and message are valid Unicode (lone surrogates replaced)."""
    url, _ = valid_unicode(note.url)
    message, _ = valid_unicode(note.message)
    return SourceNote(kind=note.kind, url=url, message=message, source=note.source)


def not_unicode_note(c: Candidate) -> str:
    """What a source note says about a candidate whose text was not valid Unicode."""
    return (f"item {c.source_key!r}: {', '.join(c.not_unicode)} held text that is not valid "
            "Unicode (a lone surrogate such as the JSON escape \\ud800, RFC 8259 §8.2); each "
            "was replaced by U+FFFD (in an id: written as its escape) and the item's metadata "
            "names the fields "
            f"({NOT_UNICODE}); an image URL that held one is not requested (unsafe_url)")


class OnceNotes:
    """Forwards notes to a sink, dropping repeats of the same (kind, key) within one run."""

    def __init__(self, sink: NoteSink, source: str) -> None:
        self._sink = sink
        self._source = source
        self._seen: set[tuple[str, str]] = set()

    def add(self, kind: str, url: str | None, message: str, *, once_key: str | None = None) -> None:
        """Send a note; with once_key, only the first note for (kind, once_key) is sent."""
        if once_key is not None:
            if (kind, once_key) in self._seen:
                return
            self._seen.add((kind, once_key))
        self._sink(SourceNote(kind=kind, url=url, message=message, source=self._source))


# ---------------------------------------------------------------------------------------------
# URL helpers


def resolve_url(base: str, ref: str | None) -> str | None:
    """Resolve a possibly relative reference against base (RFC 3986 §5.2); drop data: URIs."""
    if ref is None:
        return None
    ref = ref.strip()
    if not ref or ref.lower().startswith(("data:", "javascript:", "about:")):
        return None
    try:
        return urljoin(base, ref)
    except ValueError:
        # A malformed reference ("http://[::1/x", a full-width "@" in the host) is passed on
        # as written: the fetcher's guard refuses it, so it fails as one item with its reason
        # instead of ending the listing.
        return ref


def strip_fragment(url: str) -> str:
    """URL without its #fragment (a fragment never reaches the server, RFC 3986 §3.5);
    a URL that does not parse is returned as it is, for the fetcher's guard to refuse."""
    try:
        parts = urlsplit(url)
    except ValueError:
        return url
    return urlunsplit((parts.scheme, parts.netloc, parts.path, parts.query, ""))


def redact(url: str | None, secret_params: Iterable[str]) -> str | None:
    """URL with the values of secret query parameters replaced, for notes and messages."""
    return None if url is None else urls.redact(url, secret_params)


def merge_query(url: str, params: Mapping[str, str]) -> str:
    """URL with params added to its query; parameters already in the URL win."""
    if not params:
        return url
    parts = urlsplit(url)
    query = parse_qsl(parts.query, keep_blank_values=True)
    present = {k for k, _ in query}
    query += [(k, v) for k, v in params.items() if k not in present]
    return urlunsplit((parts.scheme, parts.netloc, parts.path, urls.encode_query(query),
                       parts.fragment))


def as_text(value: Any) -> str | None:
    """A mapped field value as display text: scalars as str, lists joined with "; "."""
    if value is None:
        return None
    if isinstance(value, str):
        value = value.strip()
        return value or None
    if isinstance(value, bool):
        return str(value).lower()
    if isinstance(value, int | float):
        return str(value)
    if isinstance(value, list):
        parts = [t for t in (as_text(v) for v in value) if t]
        return "; ".join(parts) or None
    return json.dumps(value, sort_keys=True, ensure_ascii=False)


def capped_json(value: Any, limit: int = 16_384) -> Any:
    """value itself if its JSON form fits in limit bytes, else a truncated JSON string marker."""
    text = json.dumps(value, ensure_ascii=False, default=str)
    # "surrogatepass": a lone surrogate (JSON's "\ud800", RFC 8259 §8.2) is measured as the
    # three bytes it takes, not raised; the candidate's text is made valid later
    # (sources.iter_candidates).
    data = text.encode("utf-8", "surrogatepass")
    if len(data) <= limit:
        return value
    prefix = data[:limit].decode("utf-8", "ignore")
    return {"truncated": True, "json_prefix": prefix}
