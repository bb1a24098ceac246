"""Loading and validating ``recipe.toml``, the one file a curator edits.

Every command that reads a recipe calls :func:`load_recipe`, which reports *all* problems at
once in a :class:`~collector.errors.RecipeError`: each names the file, the key path
(``sources[1].pagination.next_cursor``) and what is expected; unknown keys get a "did you mean".
The result is a :class:`Recipe` with every default filled in.
"""

from __future__ import annotations

import hashlib
import ipaddress
import re
import tomllib
from collections.abc import Callable, Mapping
from dataclasses import MISSING, asdict, dataclass, field, fields, replace
from pathlib import Path
from typing import Any
from urllib.parse import urlsplit

from collector.checks.rights_statements import ALLOW_PREFIX, allow_entry_problem
from collector.config.recipe_env import env_problems_in, source_prefix
from collector.config.stop_times import check_clock, check_duration
from collector.errors import RecipeError, RecipeProblem
from collector.schema import (
    Check,
    Key,
    Problems,
    at_least,
    check_table,
    describe,
    did_you_mean,
    env_names,
    header_value_problem,
    one_of,
)
from collector.urls import REDACTED, is_secret_header

PRODUCT_TOKEN_RE = re.compile(r"^[A-Za-z_-]+$")  # RFC 9309 section 2.2.1
CONTROL_RE = re.compile(r"[\x00-\x1f\x7f]")
# A recipe nests a few levels ([[sources]] -> [sources.pagination]); anything deeper is not a
# recipe, and a very deep one would exhaust the parser's recursion (common practice, no source).
MAX_DEPTH = 16
EMAIL_RE = re.compile(r"^[^@\s<>]+@[^@\s<>]+\.[^@\s<>]+$")
SPDX_ID_RE = re.compile(r"^[A-Za-z0-9][A-Za-z0-9.+-]*$")

# The default allowlist: public-domain dedications and marks, CC BY and CC BY-SA (unported
# versions). SPDX License List ids; see ../shared reference standards section 7.
DEFAULT_LICENCES = [
    "CC0-1.0", "CC-PDM-1.0",
    "CC-BY-1.0", "CC-BY-2.0", "CC-BY-2.5", "CC-BY-3.0", "CC-BY-4.0",
    "CC-BY-SA-1.0", "CC-BY-SA-2.0", "CC-BY-SA-2.5", "CC-BY-SA-3.0", "CC-BY-SA-4.0",
]


def check_contact(value: Any) -> str | None:
    """A contact is an email address or an http(s) URL; it goes into the User-Agent."""
    if not value or not str(value).strip():
        return ("is required: an email address or a web page where a site operator can reach "
                "you (it is sent in the User-Agent header)")
    text = str(value).strip()
    if CONTROL_RE.search(text):
        return ("must not contain control characters such as CR, LF or tab: it is sent in the "
                "User-Agent header (RFC 9110 section 5.5)")
    if EMAIL_RE.match(text):
        return None
    parts = urlsplit(text)
    if parts.scheme in ("http", "https") and parts.netloc:
        return None
    return f"must be an email address or an http(s) URL, got {text!r}"


def valid_product_token(token: str) -> bool:
    """True when ``token`` is a valid RFC 9309 section 2.2.1 product token."""
    return bool(PRODUCT_TOKEN_RE.match(token))


def _check_header_values(values: Any) -> str | None:
    for name, value in values.items():
        problem = header_value_problem(value) if isinstance(value, str) else None
        if problem:
            return f"{name}: {problem}"
    return None


def _check_token(value: Any) -> str | None:
    if not valid_product_token(value):
        return (f"must contain only letters, '_' and '-' (RFC 9309 section 2.2.1), "
                f"got {value!r}")
    return None


def _check_addresses(values: Any) -> str | None:
    for value in values:
        try:
            ipaddress.ip_network(value, strict=False)
        except ValueError:
            return f"entries must be IP addresses or CIDR ranges, got {value!r}"
    return None


def _check_spdx_list(values: Any) -> str | None:
    for value in values:
        if isinstance(value, str) and value.startswith(ALLOW_PREFIX):
            problem = allow_entry_problem(value)
            if problem:
                return problem
    bad = [v for v in values if not v.startswith(ALLOW_PREFIX) and not SPDX_ID_RE.match(v)]
    if bad:
        return (f"entries must be SPDX licence ids like \"CC-BY-4.0\" (see "
                f"https://spdx.org/licenses/), got {bad[0]!r}")
    return None


def _depth(data: Any) -> int:
    """How deeply tables and arrays nest in parsed TOML (iteratively: no recursion)."""
    deepest, stack = 0, [(data, 0)]
    while stack:
        value, depth = stack.pop()
        deepest = max(deepest, depth)
        if isinstance(value, dict):
            stack += [(v, depth + 1) for v in value.values()]
        elif isinstance(value, list):
            stack += [(v, depth + 1) for v in value]
    return deepest


def _setting(default: Any, check: Check | None = None) -> Any:
    """A scalar field of a recipe section: its default and an optional extra check (the key's
    type is the field's annotation, see section_keys). Lists and tables use
    ``field(default_factory=..., metadata={"check": ...})``."""
    return field(default=default, metadata={"check": check})


# Field annotation -> collector.schema type name.
_FIELD_TYPES = {"str": "str", "int": "int", "float": "float", "bool": "bool",
                "list[str]": "list[str]", "dict[str, str]": "table[str]"}


def section_keys(section: type) -> dict[str, Key]:
    """The recipe keys of a section dataclass: one Key per field, with its default."""
    keys: dict[str, Key] = {}
    for f in fields(section):
        if f.default is not MISSING:
            default = f.default
        elif callable(f.default_factory):
            default = f.default_factory()
        else:
            default = None
        keys[f.name] = Key(_FIELD_TYPES[str(f.type)], default, check=f.metadata.get("check"))
    return keys


@dataclass(frozen=True)
class Budget:
    """Limits for one host: the recipe's ``[budgets]`` keys with their defaults (also what a
    ``[budgets.hosts."host"]`` table overlays)."""

    min_interval: float = _setting(3.0, at_least(0))
    requests_per_hour: int = _setting(1000, at_least(0, strict=True))
    bytes_per_hour: int = _setting(2_000_000_000, at_least(0, strict=True))
    max_connections: int = _setting(1, at_least(1))
    max_attempts: int = _setting(5, at_least(1))
    max_retry_after: float = _setting(3600.0, at_least(0, strict=True))
    backoff_base: float = _setting(1.0, at_least(0))
    backoff_max: float = _setting(300.0, at_least(0))

    @classmethod
    def from_table(cls, table: Mapping[str, Any], base: Budget | None = None) -> Budget:
        """Overlay the known keys of a recipe table on ``base`` (defaults if None)."""
        known = {f.name for f in fields(cls)}
        values = {k: v for k, v in table.items() if k in known}
        return replace(base or cls(), **values)


@dataclass(frozen=True)
class CollectionInfo:
    """``[collection]``: what the collection is called and who curates it."""

    name: str = _setting("My collection")
    description: str = _setting("")
    curator: str = _setting("")


@dataclass(frozen=True)
class Network:
    """``[network]``: timeouts, size caps, the address allowlist, secrets, extra headers."""

    connect_timeout: float = _setting(10.0, at_least(0, strict=True))
    read_timeout: float = _setting(30.0, at_least(0, strict=True))
    download_deadline: float = _setting(300.0, at_least(0, strict=True))
    max_image_bytes: int = _setting(50_000_000, at_least(0, strict=True))
    max_page_bytes: int = _setting(10_000_000, at_least(0, strict=True))
    allow_addresses: list[str] = field(default_factory=list,
                                       metadata={"check": _check_addresses})
    secret_params: list[str] = field(default_factory=list)
    secret_headers: list[str] = field(default_factory=lambda: ["Authorization", "Cookie"])
    headers: dict[str, str] = field(default_factory=dict,
                                    metadata={"check": _check_header_values})


@dataclass(frozen=True)
class Licences:
    """``[licences]``: the SPDX allowlist and whether unknown licences are kept."""

    allow: list[str] = field(default_factory=lambda: list(DEFAULT_LICENCES),
                             metadata={"check": _check_spdx_list})
    allow_unknown: bool = _setting(False)


@dataclass(frozen=True)
class Images:
    """``[images]``: the ingest limits and the near-duplicate policy."""

    min_side: int = _setting(0, at_least(0))
    min_aspect: float = _setting(0.0, at_least(0))
    max_aspect: float = _setting(0.0, at_least(0))
    max_pixels: int = _setting(89_478_485, at_least(0, strict=True))
    near_distance: int = _setting(8, at_least(0))
    near_duplicates: str = _setting("keep", one_of("keep", "drop"))
    # Images with transparent pixels, and images that look enlarged from a native shortest
    # side under min_side: keep, keep and flag, or reject (collector.checks.pixel_facts).
    transparent: str = _setting("keep", one_of("keep", "flag", "reject"))
    enlarged: str = _setting("keep", one_of("keep", "flag", "reject"))
    # The release export flattens images with transparent pixels onto this colour ("#rrggbb";
    # "" = leave them as stored). The flattened PNG is a derived file; the store is unchanged.
    release_background: str = _setting("", lambda v: _check_colour(v) if v else None)


def _check_colour(value: Any) -> str | None:
    """A background colour is written "#rrggbb" (CSS Color Level 4, hex notation)."""
    if isinstance(value, str) and re.fullmatch(r"#[0-9A-Fa-f]{6}", value):
        return None
    return f'must be a colour written "#rrggbb", e.g. "#ffffff" for white, got {value!r}'


@dataclass(frozen=True)
class Stop:
    """``[stop]``: when a gather stops on its own ("" and 0 mean never)."""

    max_items: int = _setting(0, at_least(0))
    until: str = _setting("", lambda v: check_clock(v) if v else None)
    duration: str = _setting("", lambda v: check_duration(v) if v else None)


def _check_tokens(values: Any) -> str | None:
    bad = [v for v in values if not valid_product_token(v)]
    if bad:
        return (f"entries must be robots.txt product tokens: letters, '_' and '-' (RFC 9309 "
                f"section 2.2.1), got {bad[0]!r}")
    return None


def _check_permissions(values: Any) -> str | None:
    for name, reference in values.items():
        if not str(reference).strip():
            return (f"{name}: the permission needs a reference a reader can check (e.g. "
                    "\"licence agreement FFS-2026-04 of 3 May 2026\"), not an empty text")
    return None


@dataclass(frozen=True)
class Reservations:
    """``[reservations]``: machine-readable reservations against text-and-data mining and AI
    training are honoured by default (collector.run.reservations). ``permission`` names a
    source and the written permission that lets us gather it anyway (kept in the ledger and
    the datasheet); ``robots_tokens`` are further robots.txt product tokens whose groups bind
    the run; ``when_unknown`` says what happens to an item while a tdmrep.json cannot be read
    ("defer": asked again next run; "gather": gathered, the ledger says it was unknown)."""

    when_unknown: str = _setting("defer", one_of("defer", "gather"))
    robots_tokens: list[str] = field(default_factory=list, metadata={"check": _check_tokens})
    permission: dict[str, str] = field(default_factory=dict,
                                       metadata={"check": _check_permissions})


def _condition_problem(value: Any) -> str | None:
    from collector.checks.conditions import condition_problem  # loads jmespath only if used

    return condition_problem(value)


@dataclass(frozen=True)
class Items:
    """``[items]``: which listed items are wanted, decided before any image is requested
    (a source's own ``keep_if`` must hold too; collector.checks.conditions)."""

    keep_if: str = _setting("", lambda v: _condition_problem(v) if v else None)


SECTIONS: dict[str, type] = {
    "collection": CollectionInfo, "budgets": Budget, "network": Network,
    "licences": Licences, "images": Images, "stop": Stop, "items": Items,
    "reservations": Reservations,
}
SECTION_KEYS: dict[str, dict[str, Key]] = {
    name: section_keys(cls) for name, cls in SECTIONS.items()}
BUDGET_KEYS = SECTION_KEYS["budgets"]

TOP_KEYS: dict[str, Key] = {
    "contact": Key("str", "", check=check_contact),
    "product_token": Key("str", "collector", check=_check_token),
}
ALL_TOP = [*TOP_KEYS, *SECTIONS, "sources"]


@dataclass(frozen=True)
class Recipe:
    """A validated recipe with every default filled in."""

    path: Path
    sha256: str
    contact: str
    product_token: str
    collection: CollectionInfo
    budgets: Budget
    host_budgets: dict[str, dict[str, Any]]  # host -> only the keys its table overrides
    network: Network
    licences: Licences
    images: Images
    stop: Stop
    sources: list[dict[str, Any]] = field(default_factory=list)
    items: Items = field(default_factory=lambda: Items())
    reservations: Reservations = field(default_factory=Reservations)
    text: str = field(default="", repr=False, compare=False)  # as read, for the ledger

    def budget_for(self, host: str) -> Budget:
        """The budget in force for ``host`` (``host`` or ``host:port``): defaults + override."""
        bare = host.rsplit(":", 1)[0] if host.count(":") == 1 else host
        merged = Budget.from_table(self.host_budgets.get(bare, {}), self.budgets)
        return Budget.from_table(self.host_budgets.get(host, {}), merged)

    def as_dict(self) -> dict[str, Any]:
        """The settings a run would use, as plain data (for ``collector check``)."""
        return {
            "contact": self.contact, "product_token": self.product_token,
            "collection": asdict(self.collection), "budgets": asdict(self.budgets),
            "budgets.hosts": self.host_budgets, "network": asdict(self.network),
            "licences": asdict(self.licences), "images": asdict(self.images),
            "stop": asdict(self.stop), "items": asdict(self.items), "sources": self.sources,
            "reservations": asdict(self.reservations),
        }

    def shown_settings(self) -> dict[str, Any]:
        """:meth:`as_dict` with the secrets written into the recipe itself hidden: the value
        of a secret header (:func:`collector.urls.is_secret_header`) or secret parameter that
        does not come from a ``${NAME}`` is shown as ``REDACTED``; a ``${NAME}`` reference is
        shown as it is (it holds no secret)."""
        settings = self.as_dict()
        everywhere = list(self.network.secret_params)
        network = dict(settings["network"])
        network["headers"] = _hide(network["headers"], lambda name: is_secret_header(
            name, self.network.secret_headers))
        settings["network"] = network
        sources = []
        for source in self.sources:
            secret_params = {*(source.get("secret_params") or ()), *everywhere}
            shown = dict(source)
            if isinstance(shown.get("params"), dict):
                shown["params"] = _hide(shown["params"], secret_params.__contains__)
            if isinstance(shown.get("headers"), dict):
                shown["headers"] = _hide(shown["headers"], lambda name: is_secret_header(
                    name, self.network.secret_headers))
            sources.append(shown)
        settings["sources"] = sources
        return settings

    def kept_text(self) -> str:
        """The recipe text as the ledger keeps it (recipe history): every secret literal
        that :meth:`shown_settings` hides is replaced by ``REDACTED`` in the text too."""
        text = self.text
        for secret in sorted(_hidden_values(self.as_dict(), self.shown_settings()),
                             key=len, reverse=True):
            text = text.replace(secret, REDACTED)
        return text


def _hidden_values(plain: Any, shown: Any) -> set[str]:
    """The string values of ``plain`` that ``shown`` replaces by REDACTED."""
    if isinstance(plain, dict) and isinstance(shown, dict):
        return {v for k in plain for v in _hidden_values(plain[k], shown.get(k))}
    if isinstance(plain, list) and isinstance(shown, list):
        return {v for a, b in zip(plain, shown, strict=False) for v in _hidden_values(a, b)}
    return {plain} if isinstance(plain, str) and plain and shown == REDACTED else set()


def _hide(values: Mapping[str, Any], secret: Callable[[str], bool]) -> dict[str, Any]:
    """``values`` with each secret literal (no ``${NAME}`` in it) replaced by REDACTED."""
    return {k: (REDACTED if secret(k) and not (isinstance(v, str) and env_names(v)) else v)
            for k, v in values.items()}


def _check_host_budgets(raw: Any, problems: Problems) -> dict:
    hosts: dict[str, dict[str, Any]] = {}
    if not isinstance(raw, dict):
        problems.add("budgets.hosts", f"must be a table of host tables, got {describe(raw)}")
        return hosts
    for host, table in raw.items():
        path = f'budgets.hosts."{host}"'
        if not isinstance(table, dict):
            problems.add(path, f"must be a table, got {describe(table)}")
            continue
        checked = check_table(table, BUDGET_KEYS, path, problems)
        hosts[host] = {k: v for k, v in checked.items() if k in table}
    return hosts


def _check_sources(raw: Any, problems: Problems, *, by_kind: bool = True) -> list[dict]:
    # Imported here, not at the top: the source kinds import collector.schema, and loading
    # the
    # registry (and any kinds from other packages) is only needed when a recipe has sources.
    from collector import sources as adapters

    if not isinstance(raw, list) or not all(isinstance(t, dict) for t in raw):
        problems.add("sources", "must be an array of tables written as [[sources]]")
        return []
    seen: set[str] = set()
    for i, table in enumerate(raw):
        prefix = source_prefix(i, table)
        name = table.get("name")
        if not isinstance(name, str) or not name.strip():
            problems.add(f"{prefix}.name", "is required: a short unique name for this source")
        elif name in seen:
            problems.add(f"{prefix}.name",
                         f"{name!r} is used by an earlier source; names must be unique")
        else:
            seen.add(name)
        if by_kind:
            found = [p for p in adapters.validate_source(table, prefix)
                     if p.key_path != f"{prefix}.name"]
            problems.extend(found)
            keep_if = table.get("keep_if")
            if keep_if and not any(p.key_path == f"{prefix}.keep_if" for p in found):
                problem = _condition_problem(keep_if)
                if problem:
                    problems.add(f"{prefix}.keep_if", problem)
    return list(raw)


def _check_permission_names(data: Mapping[str, Any], source_list: list[dict],
                            problems: Problems) -> None:
    """Each ``[reservations.permission]`` entry names a source of the recipe."""
    names = [s.get("name") for s in source_list]
    raw_permission = (data.get("reservations") or {}).get("permission") \
        if isinstance(data.get("reservations"), dict) else None
    for name in raw_permission if isinstance(raw_permission, dict) else {}:
        if name not in names:
            problems.add(f'reservations.permission."{name}"',
                         f"names no source{did_you_mean(name, [str(n) for n in names])}; a "
                         "permission is given per source, by its name")


def parse_recipe(text: str, path: Path, *, check_source_kinds: bool = True) -> Recipe:
    """Validate recipe text; raises RecipeError listing every problem.

    ``check_source_kinds=False`` leaves each source's own keys unchecked (names still must be
    unique): for commands that read only the recipe's rules, such as ``trace``, which then
    need not load every source kind and compile its selectors."""
    file = str(path)
    problems = Problems(file)
    try:
        # A UTF-8 byte order mark (editors on Windows write one) is not part of the TOML.
        data = tomllib.loads(text.removeprefix("\ufeff"))
    except tomllib.TOMLDecodeError as exc:
        raise RecipeError([RecipeProblem(file, "", f"not valid TOML: {exc}")]) from exc
    except RecursionError:
        raise RecipeError([RecipeProblem(file, "", f"nested too deeply to be a recipe (a "
                                         f"recipe nests at most {MAX_DEPTH} levels)")]) from None
    if _depth(data) > MAX_DEPTH:
        raise RecipeError([RecipeProblem(file, "", f"nested too deeply to be a recipe (a "
                                         f"recipe nests at most {MAX_DEPTH} levels)")])

    for key in data:
        if key not in ALL_TOP:
            problems.add(key, f"unknown key{did_you_mean(key, ALL_TOP)}; "
                         f"allowed at the top: {', '.join(ALL_TOP)}")
    top = check_table({k: v for k, v in data.items() if k in TOP_KEYS}, TOP_KEYS, "", problems)
    if "contact" not in data:
        problems.add("contact", check_contact("") or "")

    sections: dict[str, dict[str, Any]] = {}
    host_budgets: dict[str, dict[str, Any]] = {}
    for name, spec in SECTION_KEYS.items():
        table = data.get(name, {})
        if not isinstance(table, dict):
            problems.add(name, f"must be a table ([{name}]), got {describe(table)}")
            table = {}
        table = dict(table)
        if name == "budgets" and "hosts" in table:
            host_budgets = _check_host_budgets(table.pop("hosts"), problems)
        sections[name] = check_table(table, spec, name, problems)

    low, high = sections["images"].get("min_aspect"), sections["images"].get("max_aspect")
    if low and high and low > high:
        problems.add("images.max_aspect", "must be greater than images.min_aspect")
    source_list = (_check_sources(data["sources"], problems, by_kind=check_source_kinds)
                   if "sources" in data else [])
    _check_permission_names(data, source_list, problems)
    if problems:
        raise RecipeError(problems.items)
    return Recipe(
        path=path, sha256=hashlib.sha256(text.encode()).hexdigest(),
        contact=str(top["contact"]).strip(), product_token=top["product_token"],
        collection=CollectionInfo(**sections["collection"]),
        budgets=Budget(**sections["budgets"]), host_budgets=host_budgets,
        network=Network(**sections["network"]), licences=Licences(**sections["licences"]),
        images=Images(**sections["images"]), stop=Stop(**sections["stop"]),
        sources=source_list, items=Items(**sections["items"]),
        reservations=Reservations(**sections["reservations"]), text=text)


def load_recipe(path: Path, *, check_source_kinds: bool = True) -> Recipe:
    """Read and validate a recipe file (``check_source_kinds``: see :func:`parse_recipe`)."""
    return parse_recipe(_read_recipe(path), path, check_source_kinds=check_source_kinds)


def check_recipe(path: Path) -> Recipe:
    """Everything ``collector check`` reports, in one round: the recipe's own problems and
    those of its ``${NAME}`` references (unset variables, header values that break once
    filled in), which a run would meet only later. RecipeError lists them all."""
    text = _read_recipe(path)
    try:
        recipe: Recipe | None = parse_recipe(text, path)
        problems: list[RecipeProblem] = []
    except RecipeError as exc:
        recipe, problems = None, list(exc.problems)
    try:
        data = tomllib.loads(text.removeprefix("\ufeff"))
    except (tomllib.TOMLDecodeError, RecursionError):
        data = {}  # already reported by parse_recipe
    if _depth(data) <= MAX_DEPTH:
        problems += env_problems_in(data, str(path), unset=True)
    if problems or recipe is None:
        raise RecipeError(problems)
    return recipe


def _read_recipe(path: Path) -> str:
    try:
        text = path.read_text(encoding="utf-8")
    except FileNotFoundError as exc:
        raise RecipeError([RecipeProblem(str(path), "", "file not found; create one with "
                                         "'collector init DIR'")]) from exc
    except UnicodeDecodeError as exc:
        raise RecipeError([RecipeProblem(str(path), "", f"not UTF-8 text: {exc}")]) from exc
    except OSError as exc:
        raise RecipeError([RecipeProblem(str(path), "", f"cannot be read: {exc}")]) from exc
    return text
