"""Generic JSON API adapter: pagination, JMESPath field mapping, optional per-item detail requests.

Everything about one API's shape lives in the recipe; this module only walks pages and maps
fields. Problems with the answers (not JSON, wrong shape, a pagination loop) become SourceNotes
and stop the source; max_pages is always enforced.
"""

from __future__ import annotations

import string
from collections.abc import Iterator, Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any
from urllib.parse import quote

import jmespath
from jmespath.exceptions import JMESPathError
from jmespath.parser import ParsedResult

from collector.schema import (
    Key,
    Problems,
    at_least,
    check_header_table,
    check_str_list,
    check_str_table,
    check_table,
    check_value,
    did_you_mean,
    http_url,
)
from collector.sources.base import (
    Candidate,
    FetchError,
    NoteSink,
    OnceNotes,
    Page,
    PageFetcher,
    SourceError,
    SourceKind,
    as_text,
    capped_json,
    merge_query,
    redact,
    resolve_url,
)
from collector.sources.json_fields import (
    CANDIDATE_FIELDS,
    ITEM_FIELDS,
    FieldMap,
    link_target,
    map_fields,
    number,
)

STYLES = ("page", "offset", "cursor", "next_url", "link_header", "none")
DEFAULT_MAX_PAGES = 1000

KEYS: dict[str, Key] = {
    "url": Key("str", required=True, check=http_url,
               hint='the listing endpoint, e.g. "https://example.org/api/items"'),
    "params": Key("table"),
    "secret_params": Key("list"),
    "headers": Key("table"),
    "pagination": Key("table"),
    "fields": Key("table", required=True,
                  hint='JMESPath expressions; at least items = "..." and id = "..."'),
    "detail": Key("table"),
}

# Which pagination keys each style uses; REQUIRED lists the ones without a default.
STYLE_KEYS: dict[str, tuple[str, ...]] = {
    "page": ("param", "start"),
    "offset": ("send_offset_as", "send_limit_as", "limit", "start"),
    "cursor": ("next_cursor", "send_cursor_as"),
    "next_url": ("next_path",),
    "link_header": (),
    "none": (),
}
STYLE_REQUIRED: dict[str, tuple[str, ...]] = {
    "cursor": ("next_cursor", "send_cursor_as"),
    "next_url": ("next_path",),
}
PAGINATION_KEYS: dict[str, Key] = {
    "style": Key("str", required=True, hint="one of " + ", ".join(STYLES)),
    "param": Key("str"),
    "start": Key("int"),
    "send_offset_as": Key("str", formerly="offset_param"),  # the query parameter names
    "send_limit_as": Key("str", formerly="limit_param"),
    "limit": Key("int", check=at_least(1)),
    "next_cursor": Key("str", formerly="cursor_path"),  # JMESPath to the next cursor
    "send_cursor_as": Key("str", formerly="cursor_param"),
    "next_path": Key("str"),
    "total_count": Key("str", formerly="total_path"),  # JMESPath to the number of items
    "max_pages": Key("int", check=at_least(1)),
}
PAGINATION_PATHS = ("next_cursor", "next_path", "total_count")

# Mapped item fields (JMESPath; ITEM_FIELDS and CANDIDATE_FIELDS come from json_fields).
FIELD_KEYS: dict[str, Key] = {
    "items": Key("str", required=True,
                 hint='where the item list is, e.g. "results" ("@" if the body is a list)'),
    "id": Key("str", required=True, hint='a stable identifier per item, e.g. "id"'),
    **{name: Key("str") for name in ITEM_FIELDS},
    "image_candidates": Key("str"),
    **{name: Key("str") for name in CANDIDATE_FIELDS},
    "pick": Key("str"),
}
DETAIL_FIELD_KEYS: dict[str, Key] = {
    k: v for k, v in FIELD_KEYS.items() if k not in ("items", "id")
}
DETAIL_KEYS: dict[str, Key] = {
    "url": Key("str", required=True,
               hint='a template such as "https://example.org/api/items/{id}"'),
    "fields": Key("table", required=True, hint="JMESPath expressions into the detail answer"),
    "when": Key("str"),
    "include_params": Key("bool"),
}
WHEN = ("missing", "always")


# ---------------------------------------------------------------------------------------------
# Validation


def _check_jmespath(value: Any, path: str, problems: Problems) -> None:
    if not isinstance(value, str):
        return
    try:
        jmespath.compile(value)
    except JMESPathError as exc:
        first = str(exc).strip().splitlines()[0]
        problems.add(path, f'is not a valid JMESPath expression ("{value}"): {first}')


def _check_pick(value: Any, path: str, problems: Problems) -> None:
    if not isinstance(value, str):
        return
    if value != "largest" and not (value.startswith("label:") and len(value) > len("label:")):
        problems.add(path, 'must be "largest" or "label:<name>" (e.g. "label:original"), '
                     f'got "{value}"')


def _template_names(template: str) -> list[str]:
    return [name for _, name, _, _ in string.Formatter().parse(template) if name is not None]


def check(table: Mapping[str, Any], prefix: str, problems: Problems) -> None:
    """The checks across keys of one json_api source table (KEYS are checked first)."""
    check_str_table(table.get("params"), f"{prefix}.params", problems)
    check_header_table(table.get("headers"), f"{prefix}.headers", problems)
    secrets = table.get("secret_params")
    if check_str_list(secrets, f"{prefix}.secret_params", problems, non_empty=False):
        given = table.get("params")
        params = given if isinstance(given, dict) else {}
        for i, name in enumerate(secrets):
            if name not in params:
                problems.add(f"{prefix}.secret_params[{i}]",
                             f'"{name}" is not one of the params; list the names of params to hide')

    pagination = table.get("pagination")
    if isinstance(pagination, dict):
        _validate_pagination(pagination, f"{prefix}.pagination", problems)

    fields = table.get("fields")
    detail = table.get("detail")
    detail_fields = detail.get("fields") if isinstance(detail, dict) else None
    if isinstance(fields, dict):
        check_table(fields, FIELD_KEYS, f"{prefix}.fields", problems)
        _validate_field_exprs(fields, f"{prefix}.fields", problems)
        has_image = any(k in fields for k in ("image_url", "image_candidates"))
        if isinstance(detail_fields, dict):
            has_image = has_image or any(
                k in detail_fields for k in ("image_url", "image_candidates"))
        if not has_image:
            problems.add(f"{prefix}.fields.image_url",
                         "required: give image_url (one URL) or image_candidates (a list), "
                         "here or in detail.fields")
    if isinstance(detail, dict):
        path = f"{prefix}.detail"
        check_table(detail, DETAIL_KEYS, path, problems)
        url = detail.get("url")
        if isinstance(url, str):
            try:
                names = _template_names(url)
            except ValueError as exc:
                problems.add(f"{path}.url", f"is not a valid template: {exc}")
                names = []
            known = ("id", *ITEM_FIELDS)
            for name in names:
                if name not in known:
                    problems.add(f"{path}.url", f'placeholder "{{{name}}}" is not a field; '
                                 f"use one of {', '.join('{' + k + '}' for k in known)}")
            filled = url
            for name in names:
                filled = filled.replace("{" + name + "}", "x")
            check_value(filled, http_url, f"{path}.url", problems)
        if isinstance(detail_fields, dict):
            check_table(detail_fields, DETAIL_FIELD_KEYS, f"{path}.fields", problems)
            _validate_field_exprs(detail_fields, f"{path}.fields", problems)
        when = detail.get("when")
        if isinstance(when, str) and when not in WHEN:
            problems.add(f"{path}.when", f'must be "missing" or "always", got "{when}"')


def _validate_field_exprs(fields: Mapping[str, Any], path: str, problems: Problems) -> None:
    for key, value in fields.items():
        if key == "pick":
            _check_pick(value, f"{path}.pick", problems)
        elif key in FIELD_KEYS:
            _check_jmespath(value, f"{path}.{key}", problems)
    if any(k in fields for k in CANDIDATE_FIELDS) and "image_candidates" not in fields:
        problems.add(f"{path}.image_candidates",
                     "candidate_* keys need image_candidates (the list they apply to)")


def _validate_pagination(pag: Mapping[str, Any], path: str, problems: Problems) -> None:
    check_table(pag, PAGINATION_KEYS, path, problems)
    style = pag.get("style")
    for key in PAGINATION_PATHS:
        _check_jmespath(pag.get(key), f"{path}.{key}", problems)
    if not isinstance(style, str):
        return
    if style not in STYLES:
        hint = did_you_mean(style, list(STYLES))
        problems.add(f"{path}.style", f"must be one of {', '.join(STYLES)}, got \"{style}\"{hint}")
        return
    for key in STYLE_REQUIRED.get(style, ()):
        if key not in pag and PAGINATION_KEYS[key].formerly not in pag:  # old name: reported
            problems.add(f"{path}.{key}", f'required when style = "{style}"')
    general = ("style", "total_count", "max_pages")
    for key in pag:
        if key in PAGINATION_KEYS and key not in general and key not in STYLE_KEYS[style]:
            users = [s for s, keys in STYLE_KEYS.items() if key in keys]
            problems.add(f"{path}.{key}", f'is not used with style = "{style}" '
                         f"(only with {', '.join(users)}); remove it or change the style")


# ---------------------------------------------------------------------------------------------
# Compiled configuration


def _compile(expr: str | None) -> ParsedResult | None:
    return jmespath.compile(expr) if expr else None


@dataclass
class Config:
    """One json_api source table, compiled."""

    name: str
    url: str
    params: dict[str, str]
    headers: dict[str, str]
    secret_params: tuple[str, ...]
    style: str
    pag: dict[str, Any]
    max_pages: int
    listing: FieldMap
    items: ParsedResult
    id: ParsedResult
    cursor: ParsedResult | None = None
    next: ParsedResult | None = None
    total: ParsedResult | None = None
    detail_url: str | None = None
    detail: FieldMap | None = None
    detail_when: str = "missing"
    detail_params: dict[str, str] = field(default_factory=dict)

    @classmethod
    def from_table(cls, table: Mapping[str, Any]) -> Config:
        """Compile a validated table. "${NAME}" references in params and headers stay as they
        are: the fetcher fills them in when it sends a request
        (collector.schema.expand_env)."""
        fields = dict(table["fields"])
        pag = dict(table.get("pagination") or {"style": "none"})
        params = _text_values(table.get("params"))
        secrets = tuple(table.get("secret_params") or ())
        detail = table.get("detail")
        listing = FieldMap.from_table({k: v for k, v in fields.items() if k not in ("items", "id")})
        cfg = cls(
            name=str(table["name"]),
            url=str(table["url"]),
            params=params,
            headers=_text_values(table.get("headers")),
            secret_params=secrets,
            style=pag.get("style", "none"),
            pag=pag,
            max_pages=int(pag.get("max_pages", DEFAULT_MAX_PAGES)),
            listing=listing,
            items=jmespath.compile(fields["items"]),
            id=jmespath.compile(fields["id"]),
            cursor=_compile(pag.get("next_cursor")),
            next=_compile(pag.get("next_path")),
            total=_compile(pag.get("total_count")),
        )
        if isinstance(detail, Mapping):
            cfg.detail_url = str(detail["url"])
            cfg.detail = FieldMap.from_table(detail["fields"], fallback=listing)
            cfg.detail_when = str(detail.get("when", "missing"))
            # API keys usually have to travel with detail requests too; paging params do not.
            if detail.get("include_params", False):
                cfg.detail_params = dict(params)
            else:
                cfg.detail_params = {k: v for k, v in params.items() if k in secrets}
        return cfg


def _text_values(values: Mapping[str, Any] | None) -> dict[str, str]:
    """A params/headers table with its numbers written as text."""
    return {str(k): str(v) for k, v in (values or {}).items()}


# ---------------------------------------------------------------------------------------------
# Describing an answer in a note


def _describe_answer(page: Page) -> str:
    ctype = page.headers.get("Content-Type") or page.headers.get("content-type") or "none"
    start = page.text[:60].strip().replace("\n", " ") if page.text else ""
    return f"Content-Type {ctype}; starts with {start!r}"


def _type_name(value: Any) -> str:
    return {dict: "an object", str: "a string", type(None): "nothing (null/missing)"}.get(
        type(value), type(value).__name__)


# ---------------------------------------------------------------------------------------------
# Walking the pages


@dataclass
class _Position:
    """Where one walk over the listing is: the next request and what was already seen."""

    url: str
    params: dict[str, str]
    page_no: int
    offset: int
    seen_requests: set[str] = field(default_factory=set)
    seen_cursors: set[str] = field(default_factory=set)
    total_items: int = 0

    @classmethod
    def start(cls, cfg: Config) -> _Position:
        """The first request: the source's url and params, page or offset at its start."""
        first = int(cfg.pag.get("start", 1 if cfg.style == "page" else 0))
        return cls(url=cfg.url, params=dict(cfg.params), page_no=first, offset=first)


class _Walker:
    """State of one run over one json_api source."""

    def __init__(self, cfg: Config, fetcher: PageFetcher, notes: OnceNotes) -> None:
        self.cfg, self.fetcher, self.notes = cfg, fetcher, notes
        self.seen_keys: set[str] = set()

    def _red(self, url: str | None) -> str | None:
        return redact(url, self.cfg.secret_params)

    def fetch_json(self, url: str, params: Mapping[str, str] | None, purpose: str,
                   ) -> tuple[Page, Any] | None:
        """GET url and decode JSON; on any failure send a note and return None."""
        cfg = self.cfg
        try:
            page = self.fetcher.get_page(url, purpose=purpose, params=dict(params or {}) or None,
                                         headers=cfg.headers or None,
                                         secret_params=cfg.secret_params)
        except FetchError as exc:
            if purpose == "listing":
                raise  # the source cannot go on; the orchestrator records exc.reason
            self.notes.add("fetch_failed", exc.url, f"detail request failed: {exc}; items "
                           "whose detail request fails use the listing only (reported once per "
                           "reason)", once_key=exc.reason)
            return None
        where = self._red(page.url)
        try:
            return page, page.json()
        except ValueError as exc:
            text = (page.text or "").lstrip()
            if text.startswith("<"):
                what = "is not JSON (looks like HTML, e.g. an error page)"
            else:
                what = f"is malformed JSON ({str(exc).splitlines()[0]})"
            self.notes.add("bad_json", where, f"the {purpose} answer {what}; "
                           f"{_describe_answer(page)}; check the url and params of this source")
            return None

    def run(self) -> Iterator[Candidate]:
        """Yield candidates page by page until a stop condition."""
        cfg = self.cfg
        pos = _Position.start(cfg)
        for _ in range(cfg.max_pages):
            got = self._listing(pos)
            if got is None:
                return
            page, body, items = got
            before = len(self.seen_keys)
            yield from self._page_items(items, page.url)
            if self._finished(pos, page, body, len(items), repeated=len(self.seen_keys) == before):
                return
            if not self._advance(pos, page, body, len(items)):
                return
        self.notes.add("max_pages", self._red(cfg.url),
                       f"stopped after max_pages = {cfg.max_pages} pages; there may be more")

    def _listing(self, pos: _Position) -> tuple[Page, Any, list[Any]] | None:
        """Request the listing page at pos and return its non-empty item list; None (after a
        note when something is wrong) stops the source."""
        cfg, pag, params = self.cfg, self.cfg.pag, pos.params
        if cfg.style == "page":
            params[pag.get("param", "page")] = str(pos.page_no)
        elif cfg.style == "offset":
            params[pag.get("send_offset_as", "offset")] = str(pos.offset)
            if "limit" in pag:
                params[pag.get("send_limit_as", "limit")] = str(pag["limit"])
        request = merge_query(pos.url, params)
        if request in pos.seen_requests:
            self.notes.add("loop", self._red(request),
                           "pagination came back to a page already read; stopped here")
            return None
        pos.seen_requests.add(request)
        got = self.fetch_json(pos.url, params, "listing")
        if got is None:
            return None
        page, body = got
        items = cfg.items.search(body)
        if not isinstance(items, list):
            self.notes.add("wrong_shape", self._red(page.url),
                           f'fields.items ("{cfg.items.expression}") gave {_type_name(items)}, '
                           "not a list; check fields.items against the answer")
            return None
        if not items:
            return None
        return page, body, items

    def _finished(self, pos: _Position, page: Page, body: Any, count: int, *,
                  repeated: bool) -> bool:
        """Whether the listing ends after this page: it only repeated items already read (a
        loop, noted), or the items read reach the total the answer gives."""
        if repeated and pos.total_items > 0:
            self.notes.add("loop", self._red(page.url),
                           "this page repeated items already read (the API may ignore the "
                           "pagination parameter); stopped here")
            return True
        pos.total_items += count
        if self.cfg.total is not None:
            total = number(self.cfg.total.search(body))
            if total is not None and pos.total_items >= total:
                return True
        return False

    def _advance(self, pos: _Position, page: Page, body: Any, count: int) -> bool:
        """Move pos to the next request by the pagination style; False when there is none."""
        cfg = self.cfg
        if cfg.style == "page":
            pos.page_no += 1
        elif cfg.style == "offset":
            pos.offset += count
        elif cfg.style == "cursor":
            cursor = as_text(cfg.cursor.search(body)) if cfg.cursor else None
            if cursor is None:
                return False
            if cursor in pos.seen_cursors:
                self.notes.add("loop", self._red(page.url),
                               f'the cursor "{cursor:.40}" was already used; stopped here')
                return False
            pos.seen_cursors.add(cursor)
            pos.params[cfg.pag["send_cursor_as"]] = cursor
        elif cfg.style in ("next_url", "link_header"):
            if cfg.style == "next_url":
                nxt = as_text(cfg.next.search(body)) if cfg.next else None
            else:
                nxt = link_target(page.links, "next")
            nxt = resolve_url(page.url, nxt)
            if nxt is None:
                return False
            # The next URL carries its own paging query; add only the recipe's params it
            # lacks (API keys are often left out of next links).
            pos.url, pos.params = merge_query(nxt, cfg.params), {}
        else:
            return False
        return True

    def _page_items(self, items: list[Any], base_url: str) -> Iterator[Candidate]:
        cfg = self.cfg
        for item in items:
            key = as_text(cfg.id.search(item))
            if key is None:
                self.notes.add("missing_id", self._red(base_url),
                               f'an item has no id at fields.id ("{cfg.id.expression}"); such '
                               "items are skipped (reported once per run)", once_key="id")
                continue
            if key in self.seen_keys:
                continue
            self.seen_keys.add(key)
            values = map_fields(item, cfg.listing, base_url)
            metadata: dict[str, Any] = {"item": capped_json(item)}
            if cfg.detail is not None and self._wants_detail(values):
                merged = self._detail(key, values, metadata)
                if merged is None and values.get("image_url") is None:
                    continue
                values = merged or values
            if values.get("image_url") is None:
                self.notes.add("missing_image", self._red(base_url),
                               "an item has no image URL after mapping (check fields.image_url / "
                               "image_candidates); such items are skipped (reported once per run)",
                               once_key="image")
                continue
            if "image_choice" in values:
                metadata["image_choice"] = values["image_choice"]
            yield Candidate(
                source_key=key, image_url=values["image_url"], page_url=values.get("page_url"),
                title=values.get("title"), creator=values.get("creator"),
                licence_raw=values.get("licence"), licence_url=values.get("licence_url"),
                date=values.get("date"), metadata=metadata,
            )

    def _wants_detail(self, values: Mapping[str, Any]) -> bool:
        assert self.cfg.detail is not None
        if self.cfg.detail_when == "always":
            return True
        for name in self.cfg.detail.exprs:
            target = "image_url" if name == "image_candidates" else name
            if target in values and values[target] is None:
                return True
        return False

    def _detail(self, key: str, values: Mapping[str, Any], metadata: dict[str, Any],
                ) -> dict[str, Any] | None:
        cfg = self.cfg
        assert cfg.detail is not None and cfg.detail_url is not None
        fill = {"id": _quoted(key)}
        fill.update({k: _quoted(str(v)) for k, v in values.items()
                     if k in ITEM_FIELDS and v is not None})
        try:
            url = cfg.detail_url.format(**fill)
        except (KeyError, IndexError) as exc:
            self.notes.add("missing_field", cfg.detail_url,
                           f"detail.url needs {exc} but an item lacks it; such items use the "
                           "listing only (reported once per run)", once_key="detail-template")
            return None
        got = self.fetch_json(url, cfg.detail_params, "detail")
        if got is None:
            return None
        page, body = got
        metadata["detail"] = capped_json(body)
        found = map_fields(body, cfg.detail, page.url)
        merged = dict(values)
        for name, value in found.items():
            if value is not None:
                merged[name] = value
        return merged


def _quoted(value: str) -> str:
    """A value percent-encoded for a detail URL; one holding a lone surrogate (no UTF-8 to
    encode, RFC 3986 §2.5) is left as it is, so the fetcher's guard refuses that URL by name
    and the item keeps its listing values."""
    try:
        return quote(value, safe="")
    except UnicodeEncodeError:
        return value


def iter_candidates(source: Mapping[str, Any], fetcher: PageFetcher | None, notes: NoteSink,
                    base_dir: Path) -> Iterator[Candidate]:
    """Yield the Candidates of one validated json_api source table."""
    del base_dir  # not used by this kind
    if fetcher is None:
        raise SourceError(str(source.get("name", "")), None, "a json_api source needs a fetcher")
    once = OnceNotes(notes, str(source.get("name", "")))
    yield from _Walker(Config.from_table(source), fetcher, once).run()


KIND = SourceKind(
    name="json_api",
    keys=KEYS,
    check=check,
    list_candidates=iter_candidates,
    uses_network=True,
    mechanism="a JSON web API, read page by page",
    # croissant-rai-spec.md, dataCollectionType recommended terms
    collection_type="Web API",
)
