"""Shared types for source adapters: Candidate, SourceNote, the PageFetcher protocol, and the
small validation helpers every adapter kind uses."""

from __future__ import annotations

import json
from collections.abc import Callable, Iterable, Mapping
from dataclasses import dataclass, field
from datetime import date, datetime
from pathlib import Path
from typing import Any, Protocol
from urllib.parse import parse_qsl, urlencode, urljoin, urlsplit, urlunsplit

from collector import urls
from collector.errors import FetchError, RecipeProblem, SourceError
from collector.recipe import did_you_mean, expand_env

__all__ = [
    "Candidate",
    "FetchError",
    "NoteSink",
    "Page",
    "PageFetcher",
    "RecipeProblem",
    "SourceError",
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


@dataclass
class SourceNote:
    """A source-level problem worth telling the user (goes to the ledger's notes table)."""

    kind: str
    url: str | None
    message: str
    source: str = ""


NoteSink = Callable[[SourceNote], None]


class Page(Protocol):
    """What a fetched page looks like to an adapter (duck-typed; see collector.fetcher)."""

    url: str
    status: int
    headers: Mapping[str, str]
    body: bytes
    text: str
    links: Mapping[str, Any]  # rel -> URL, or rel -> {"url": URL, ...} (collector.fetcher)

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
    ) -> Page: ...


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
    return urlunsplit((parts.scheme, parts.netloc, parts.path, urlencode(query), parts.fragment))


def expand_env_values(values: Mapping[str, Any] | None) -> dict[str, str]:
    """A params/headers table with "${NAME}" references filled from the environment;
    KeyError names a missing one."""
    return {str(k): expand_env(str(v), strict=True) for k, v in (values or {}).items()}


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
    if len(text.encode("utf-8")) <= limit:
        return value
    prefix = text.encode("utf-8")[:limit].decode("utf-8", "ignore")
    return {"truncated": True, "json_prefix": prefix}


# ---------------------------------------------------------------------------------------------
# Validation helpers


@dataclass(frozen=True)
class Key:
    """Schema entry for one recipe key: accepted types, whether required, a short hint."""

    types: tuple[type, ...]
    required: bool = False
    hint: str = ""


STR = (str,)
INT = (int,)
NUM = (int, float)
BOOL = (bool,)
LIST = (list,)
TABLE = (dict,)
DATEISH = (str, date, datetime)

_TYPE_NAMES = {
    str: "a string",
    int: "an integer",
    float: "a number",
    bool: "true or false",
    list: "a list",
    dict: "a table",
    date: "a date",
    datetime: "a date-time",
}


class Problems:
    """Collects RecipeProblems for one source table."""

    def __init__(self, file: str) -> None:
        self.file = file
        self.items: list[RecipeProblem] = []

    def add(self, key_path: str, message: str) -> None:
        """Record one problem at key_path."""
        self.items.append(RecipeProblem(self.file, key_path, message))


def _type_ok(value: Any, types: tuple[type, ...]) -> bool:
    if isinstance(value, bool):
        return bool in types
    if isinstance(value, datetime):
        return datetime in types
    return isinstance(value, types)


def check_keys(
    table: Mapping[str, Any], schema: Mapping[str, Key], prefix: str, problems: Problems
) -> None:
    """Report unknown keys (with "did you mean"), wrong types and missing required keys."""
    for key, value in table.items():
        path = f"{prefix}.{key}"
        spec = schema.get(key)
        if spec is None:
            # Same wording as the top-level recipe checks (collector.recipe).
            problems.add(path, f"unknown key{did_you_mean(str(key), list(schema))}; allowed "
                               f"here: {', '.join(schema)}")
            continue
        if not _type_ok(value, spec.types):
            wanted = " or ".join(_TYPE_NAMES.get(t, t.__name__) for t in spec.types)
            problems.add(path, f"must be {wanted}, got {type(value).__name__} {value!r:.60}")
    for key, spec in schema.items():
        if spec.required and key not in table:
            hint = f" ({spec.hint})" if spec.hint else ""
            problems.add(f"{prefix}.{key}", f"required key is missing{hint}")


def check_http_url(value: Any, path: str, problems: Problems) -> None:
    """An absolute http or https URL with a host."""
    if not isinstance(value, str):
        return
    try:
        parts = urlsplit(value)
    except ValueError:
        parts = urlsplit("")
    if parts.scheme.lower() not in ("http", "https") or not parts.netloc:
        problems.add(path, f'must be an absolute http:// or https:// URL, got "{value}"')


def check_str_list(value: Any, path: str, problems: Problems, *, non_empty: bool = True) -> bool:
    """A list of non-empty strings; returns whether it was one."""
    if not isinstance(value, list):
        return False
    if non_empty and not value:
        problems.add(path, "must not be empty")
        return False
    ok = True
    for i, v in enumerate(value):
        if not isinstance(v, str) or not v.strip():
            problems.add(f"{path}[{i}]", f"must be a non-empty string, got {v!r:.60}")
            ok = False
    return ok


def check_str_table(value: Any, path: str, problems: Problems) -> None:
    """A table whose values are strings or numbers (query parameters, headers)."""
    if not isinstance(value, dict):
        return
    for k, v in value.items():
        if isinstance(v, bool) or not isinstance(v, str | int | float):
            problems.add(f"{path}.{k}", f"must be a string or number, got {v!r:.60}")


def check_positive_int(value: Any, path: str, problems: Problems, *, minimum: int = 1) -> None:
    """An integer at least minimum."""
    if isinstance(value, int) and not isinstance(value, bool) and value < minimum:
        problems.add(path, f"must be at least {minimum}, got {value}")


def date_text(value: Any) -> str | None:
    """A recipe date (TOML date or string) as ISO 8601 text."""
    if value is None:
        return None
    if isinstance(value, date | datetime):
        return value.isoformat()
    return str(value)
