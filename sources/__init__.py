"""Source kinds: turn a recipe's [[sources]] table into Candidates, never downloading images.

This module is the registry of kinds. A kind is a :class:`~sources.base.SourceKind` object
named ``KIND`` in its module; two places provide them:

- built in: every module of this package that defines ``KIND`` (adding one = adding a module);
- other packages: entry points in the group ``collector.sources`` whose name is the kind name
  and whose object is the ``SourceKind``, e.g. in a pyproject.toml::

      [project.entry-points."collector.sources"]
      toykind = "toy_module:KIND"

  Entry points are loaded only when their kind is used; a package that fails to load, or a
  name a built-in kind already has, is a :class:`~collector.errors.SourceKindError` naming the
  package and the entry point.

Public API::

    kind_names()                              sorted names of every known kind
    get_kind(name)                            -> SourceKind (SourceKindError if not usable)
    find_kind(name)                           -> SourceKind | None (for describing old ledgers)
    validate_source(table, key_prefix)        -> list[RecipeProblem]
    iter_candidates(source, fetcher, notes, base_dir, state=None) -> Iterator[Candidate]
    Candidate, ListingState, SourceKind, SourceNote, PageFetcher, Page

Nothing outside this package names a kind: the rest of collector asks the kind object.
"""

from __future__ import annotations

import importlib
import pkgutil
import threading
from collections.abc import Iterator, Mapping
from importlib.metadata import EntryPoint, entry_points
from pathlib import Path
from typing import Any, NoReturn

from collector.errors import SourceKindError
from collector.schema import Key, Problems, check_table, did_you_mean, item_condition
from collector.sources.base import (
    NOT_UNICODE,
    Candidate,
    ListingState,
    NoteSink,
    Page,
    PageFetcher,
    RecipeProblem,
    SourceError,
    SourceKind,
    SourceNote,
    not_unicode_note,
    valid_candidate,
    valid_note,
)

__all__ = [
    "ENTRY_POINT_GROUP",
    "Candidate",
    "ListingState",
    "NoteSink",
    "Page",
    "PageFetcher",
    "SourceError",
    "SourceKind",
    "SourceNote",
    "builtin_kind_names",
    "find_kind",
    "get_kind",
    "iter_candidates",
    "kind_names",
    "validate_source",
]

ENTRY_POINT_GROUP = "collector.sources"

# Keys every source table has; each kind adds its own (SourceKind.keys). "name" being present
# and unique is checked by collector.config.recipe, which sees all sources.
COMMON_KEYS: dict[str, Key] = {
    "name": Key("str", hint="a short unique name for this source"),
    "kind": Key("str", required=True),
    # decided by the run before any image request (collector.checks.conditions)
    "keep_if": Key("str", "", check=item_condition),
    "former_names": Key("list[str]", hint="names this source had before (a rename keeps the "
                                          "source's history in the ledger)"),
}

_lock = threading.RLock()
_builtin: dict[str, SourceKind] | None = None
_plugins: dict[str, list[EntryPoint]] | None = None
_loaded: dict[str, SourceKind] = {}


def _builtin_kinds() -> dict[str, SourceKind]:
    """The KIND of every module of this package (imported once; imports stay cheap)."""
    global _builtin
    with _lock:
        if _builtin is None:
            found: dict[str, SourceKind] = {}
            for info in sorted(pkgutil.iter_modules(__path__), key=lambda m: m.name):
                module = importlib.import_module(f"{__name__}.{info.name}")
                kind = getattr(module, "KIND", None)
                if isinstance(kind, SourceKind):
                    if kind.name in found:
                        raise SourceKindError(
                            f"source kind {kind.name!r} is defined twice inside collector "
                            f"(sources.{info.name} and another module); rename one")
                    found[kind.name] = kind
            _builtin = found
        return _builtin


def _plugin_entry_points() -> dict[str, list[EntryPoint]]:
    """Entry points of the group by name, not loaded yet."""
    global _plugins
    with _lock:
        if _plugins is None:
            by_name: dict[str, list[EntryPoint]] = {}
            for ep in entry_points(group=ENTRY_POINT_GROUP):
                by_name.setdefault(ep.name, [])
                if all(other.value != ep.value for other in by_name[ep.name]):
                    by_name[ep.name].append(ep)
            _plugins = by_name
        return _plugins


def _where(ep: EntryPoint) -> str:
    dist = getattr(ep, "dist", None)
    package = f"package {dist.name!r}" if dist is not None else "an unnamed package"
    return f"{package} (entry point {ep.name} = {ep.value} in group {ENTRY_POINT_GROUP})"


def builtin_kind_names() -> list[str]:
    """Sorted names of the kinds that come with collector."""
    return sorted(_builtin_kinds())


def kind_names() -> list[str]:
    """Sorted names of every kind: built in and from installed packages (not loaded)."""
    return sorted({*_builtin_kinds(), *_plugin_entry_points()})


def get_kind(name: str) -> SourceKind:
    """The kind called ``name``; SourceKindError says why it cannot be used."""
    builtin = _builtin_kinds()
    plugins = _plugin_entry_points().get(name, [])
    if name in builtin and plugins:
        raise SourceKindError(
            f"source kind {name!r} is built into collector and also registered by "
            f"{_where(plugins[0])}; uninstall that package or ask its authors to rename the kind")
    if name in builtin:
        return builtin[name]
    if not plugins:
        _unknown(name)
    if len(plugins) > 1:
        raise SourceKindError(
            f"source kind {name!r} is registered twice: by {_where(plugins[0])} and by "
            f"{_where(plugins[1])}; uninstall one of them")
    with _lock:
        if name not in _loaded:
            _loaded[name] = _load(plugins[0])
        return _loaded[name]


def _unknown(name: Any) -> NoReturn:
    known = kind_names()
    raise SourceKindError(f"must be one of {', '.join(repr(k) for k in known)}, got "
                          f"{name!r}{did_you_mean(str(name), known) if name else ''}")


def _load(ep: EntryPoint) -> SourceKind:
    try:
        kind = ep.load()
    except Exception as exc:  # any failure inside someone else's package
        raise SourceKindError(
            f"source kind {ep.name!r} could not be loaded from {_where(ep)}: "
            f"{type(exc).__name__}: {exc}; reinstall or fix that package, or remove the "
            "sources that use it") from exc
    if not isinstance(kind, SourceKind):
        raise SourceKindError(
            f"source kind {ep.name!r} from {_where(ep)} is a {type(kind).__name__}, not a "
            "sources.SourceKind; the entry point must name the module's KIND object")
    if kind.name != ep.name:
        raise SourceKindError(
            f"source kind {ep.name!r} from {_where(ep)} calls itself {kind.name!r}; the entry "
            "point name and SourceKind.name must be the same")
    return kind


def find_kind(name: str) -> SourceKind | None:
    """The kind called ``name``, or None when it is unknown or cannot be loaded (a ledger may
    name a kind whose package is no longer installed)."""
    try:
        return get_kind(name)
    except SourceKindError:
        return None


def validate_source(table: Mapping[str, Any], key_prefix: str) -> list[RecipeProblem]:
    """Every problem in one [[sources]] table, with key paths like "sources[1].fields.id".

    "name" being present and unique is checked by collector.config.recipe (uniqueness needs all
    sources); "kind" is checked here.
    """
    problems = Problems("")
    kind_name = table.get("kind")
    try:
        kind = get_kind(kind_name) if isinstance(kind_name, str) else _unknown(kind_name)
    except SourceKindError as exc:
        problems.add(f"{key_prefix}.kind", str(exc))
        return problems.items
    check_table(table, {**COMMON_KEYS, **kind.keys}, key_prefix, problems)
    if kind.check is not None:
        kind.check(table, key_prefix, problems)
    return problems.items


def iter_candidates(
    source: Mapping[str, Any], fetcher: PageFetcher | None, notes: NoteSink, base_dir: Path,
    state: ListingState | None = None,
) -> Iterator[Candidate]:
    """Yield the Candidates of one source; source-level problems go to notes, not exceptions.

    With ``state`` (the run passes the source's remembered :class:`ListingState`), a kind
    that has ``list_changes`` lists only what changed since its previous complete listing.

    Raises SourceError only when the table itself is invalid (validate_source should have caught
    that when the recipe was loaded).
    """
    problems = validate_source(source, "source")
    name = str(source.get("name", "?"))
    if problems:
        detail = "; ".join(f"{p.key_path}: {p.message}" for p in problems)
        raise SourceError(name, None, f"invalid source table ({detail}); fix the recipe")
    kind = get_kind(str(source["kind"]))
    # A kind that says it needs no network is not handed the fetcher.
    pages = fetcher if kind.uses_network else None

    def valid_notes(note: SourceNote) -> None:
        notes(valid_note(note))

    if state is not None and kind.list_changes is not None:
        listed = kind.list_changes(source, pages, valid_notes, Path(base_dir), state)
    else:
        listed = kind.list_candidates(source, pages, valid_notes, Path(base_dir))
    # Text enters collector here: whatever a kind read, no lone surrogate goes further.
    said = False
    for candidate in listed:
        candidate = valid_candidate(candidate)
        if candidate.not_unicode and not said:
            said = True
            notes(SourceNote(NOT_UNICODE, None, not_unicode_note(candidate) + " (reported "
                             "once per run)", name))
        yield candidate
