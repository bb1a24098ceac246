"""Loading and validating ``recipe.toml``, the one file a curator edits.

Every command that reads a recipe calls :func:`load_recipe`, which reports *all* problems at
once in a :class:`~collector.errors.RecipeError`: each names the file, the key path
(``sources[1].pagination.cursor_path``) and what is expected; unknown keys get a "did you mean".
The result is a :class:`Recipe` with every default filled in.
"""

from __future__ import annotations

import hashlib
import ipaddress
import os
import re
import tomllib
from dataclasses import dataclass, field
from datetime import time
from pathlib import Path
from typing import Any
from urllib.parse import urlsplit

from collector.errors import RecipeError, RecipeProblem
from collector.schema import (
    Key,
    Problems,
    at_least,
    check_table,
    describe,
    did_you_mean,
    env_names,
    one_of,
)

PRODUCT_TOKEN_RE = re.compile(r"^[A-Za-z_-]+$")  # RFC 9309 section 2.2.1
EMAIL_RE = re.compile(r"^[^@\s<>]+@[^@\s<>]+\.[^@\s<>]+$")
DURATION_RE = re.compile(r"^(?:(\d+)h)?\s*(?:(\d+)m)?\s*(?:(\d+)s)?$")
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
    if EMAIL_RE.match(text):
        return None
    parts = urlsplit(text)
    if parts.scheme in ("http", "https") and parts.netloc:
        return None
    return f"must be an email address or an http(s) URL, got {text!r}"


def _check_token(value: Any) -> str | None:
    if not PRODUCT_TOKEN_RE.match(value):
        return (f"must contain only letters, '_' and '-' (RFC 9309 section 2.2.1), "
                f"got {value!r}")
    return None


def _check_clock(value: Any) -> str | None:
    try:
        parse_clock(value)
    except ValueError:
        return f"must be a local time like \"07:00\" (24-hour HH:MM), got {value!r}"
    return None


def _check_duration(value: Any) -> str | None:
    try:
        parse_duration(value)
    except ValueError:
        return f"must be a duration like \"8h\", \"90m\" or \"1h30m\", got {value!r}"
    return None


def _check_addresses(values: Any) -> str | None:
    for value in values:
        try:
            ipaddress.ip_network(value, strict=False)
        except ValueError:
            return f"entries must be IP addresses or CIDR ranges, got {value!r}"
    return None


def _check_spdx_list(values: Any) -> str | None:
    bad = [v for v in values if not SPDX_ID_RE.match(v)]
    if bad:
        return (f"entries must be SPDX licence ids like \"CC-BY-4.0\" (see "
                f"https://spdx.org/licenses/), got {bad[0]!r}")
    return None


def unset_env(recipe: Recipe) -> list[RecipeProblem]:
    """A problem for every ``${NAME}`` the recipe uses whose variable is not set."""
    places: list[tuple[str, Any]] = [
        (f"network.headers.{k}", v) for k, v in recipe.network["headers"].items()]
    for i, src in enumerate(recipe.sources):
        for table in ("params", "headers"):
            places += [(f"sources[{i}].{table}.{k}", v)
                       for k, v in (src.get(table) or {}).items()]
    return [RecipeProblem(str(recipe.path), path,
                          f"uses ${{{name}}}, but the environment variable {name} is not set; "
                          "set it before gathering")
            for path, text in places if isinstance(text, str)
            for name in env_names(text) if name not in os.environ]


def parse_clock(value: str) -> time:
    """Parse a 24-hour local time "HH:MM"."""
    match = re.fullmatch(r"(\d{1,2}):(\d{2})", str(value).strip())
    if not match:
        raise ValueError(value)
    hour, minute = int(match[1]), int(match[2])
    return time(hour, minute)


def parse_duration(value: str) -> float:
    """Parse "8h", "90m", "1h30m", "45s" into seconds."""
    text = str(value).strip().lower()
    match = DURATION_RE.fullmatch(text)
    if not text or not match or not any(match.groups()):
        raise ValueError(value)
    hours, minutes, seconds = (int(g) if g else 0 for g in match.groups())
    total = hours * 3600 + minutes * 60 + seconds
    if total <= 0:
        raise ValueError(value)
    return float(total)


BUDGET_KEYS: dict[str, Key] = {
    "min_interval": Key("float", 3.0, check=at_least(0)),
    "requests_per_hour": Key("int", 1000, check=at_least(0, strict=True)),
    "bytes_per_hour": Key("int", 2_000_000_000, check=at_least(0, strict=True)),
    "max_connections": Key("int", 1, check=at_least(1)),
    "max_attempts": Key("int", 5, check=at_least(1)),
    "max_retry_after": Key("float", 3600.0, check=at_least(0, strict=True)),
    "backoff_base": Key("float", 1.0, check=at_least(0)),
    "backoff_max": Key("float", 300.0, check=at_least(0)),
}

SECTIONS: dict[str, dict[str, Key]] = {
    "collection": {
        "name": Key("str", "My collection"),
        "description": Key("str", ""),
        "curator": Key("str", ""),
    },
    "budgets": BUDGET_KEYS,
    "network": {
        "connect_timeout": Key("float", 10.0, check=at_least(0, strict=True)),
        "read_timeout": Key("float", 30.0, check=at_least(0, strict=True)),
        "download_deadline": Key("float", 300.0, check=at_least(0, strict=True)),
        "max_image_bytes": Key("int", 50_000_000, check=at_least(0, strict=True)),
        "max_page_bytes": Key("int", 10_000_000, check=at_least(0, strict=True)),
        "allow_addresses": Key("list[str]", [], check=_check_addresses),
        "secret_params": Key("list[str]", []),
        "secret_headers": Key("list[str]", ["Authorization", "Cookie"]),
        "headers": Key("table[str]", {}),
    },
    "licences": {
        "allow": Key("list[str]", DEFAULT_LICENCES, check=_check_spdx_list),
        "allow_unknown": Key("bool", False),
    },
    "images": {
        "min_side": Key("int", 0, check=at_least(0)),
        "min_aspect": Key("float", 0.0, check=at_least(0)),
        "max_aspect": Key("float", 0.0, check=at_least(0)),
        "max_pixels": Key("int", 89_478_485, check=at_least(0, strict=True)),
        "near_distance": Key("int", 8, check=at_least(0)),
        "near_duplicates": Key("str", "keep", check=one_of("keep", "drop")),
    },
    "stop": {
        "max_items": Key("int", 0, check=at_least(0)),
        "until": Key("str", "", check=lambda v: _check_clock(v) if v else None),
        "duration": Key("str", "", check=lambda v: _check_duration(v) if v else None),
    },
}

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
    collection: dict[str, Any]
    budgets: dict[str, Any]
    host_budgets: dict[str, dict[str, Any]]
    network: dict[str, Any]
    licences: dict[str, Any]
    images: dict[str, Any]
    stop: dict[str, Any]
    sources: list[dict[str, Any]] = field(default_factory=list)

    def budget_for(self, host: str) -> dict[str, Any]:
        """The budget in force for ``host`` (``host`` or ``host:port``): defaults + override."""
        bare = host.rsplit(":", 1)[0] if host.count(":") == 1 else host
        merged = dict(self.budgets)
        merged.update(self.host_budgets.get(bare, {}))
        merged.update(self.host_budgets.get(host, {}))
        return merged

    def as_dict(self) -> dict[str, Any]:
        """The settings a run would use, as plain data (for ``collector check``)."""
        return {
            "contact": self.contact, "product_token": self.product_token,
            "collection": self.collection, "budgets": self.budgets,
            "budgets.hosts": self.host_budgets, "network": self.network,
            "licences": self.licences, "images": self.images, "stop": self.stop,
            "sources": self.sources,
        }


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


def _check_sources(raw: Any, problems: Problems) -> list[dict]:
    # Imported here, not at the top: the source kinds import collector.schema, and loading the
    # registry (and any kinds from other packages) is only needed when a recipe has sources.
    import sources as adapters

    if not isinstance(raw, list) or not all(isinstance(t, dict) for t in raw):
        problems.add("sources", "must be an array of tables written as [[sources]]")
        return []
    seen: set[str] = set()
    for i, table in enumerate(raw):
        prefix = f"sources[{i}]"
        name = table.get("name")
        if not isinstance(name, str) or not name.strip():
            problems.add(f"{prefix}.name", "is required: a short unique name for this source")
        elif name in seen:
            problems.add(f"{prefix}.name",
                         f"{name!r} is used by an earlier source; names must be unique")
        else:
            seen.add(name)
        problems.extend(p for p in adapters.validate_source(table, prefix)
                        if p.key_path != f"{prefix}.name")
    return list(raw)


def parse_recipe(text: str, path: Path) -> Recipe:
    """Validate recipe text; raises RecipeError listing every problem."""
    file = str(path)
    problems = Problems(file)
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise RecipeError([RecipeProblem(file, "", f"not valid TOML: {exc}")]) from exc

    for key in data:
        if key not in ALL_TOP:
            problems.add(key, f"unknown key{did_you_mean(key, ALL_TOP)}; "
                         f"allowed at the top: {', '.join(ALL_TOP)}")
    top = check_table({k: v for k, v in data.items() if k in TOP_KEYS}, TOP_KEYS, "", problems)
    if "contact" not in data:
        problems.add("contact", check_contact("") or "")

    sections: dict[str, dict[str, Any]] = {}
    host_budgets: dict[str, dict[str, Any]] = {}
    for name, spec in SECTIONS.items():
        table = data.get(name, {})
        if not isinstance(table, dict):
            problems.add(name, f"must be a table ([{name}]), got {describe(table)}")
            table = {}
        table = dict(table)
        if name == "budgets" and "hosts" in table:
            host_budgets = _check_host_budgets(table.pop("hosts"), problems)
        sections[name] = check_table(table, spec, name, problems)

    images = sections["images"]
    if images["min_aspect"] and images["max_aspect"] and images["min_aspect"] > images[
            "max_aspect"]:
        problems.add("images.max_aspect", "must be greater than images.min_aspect")
    source_list = _check_sources(data["sources"], problems) if "sources" in data else []

    if problems:
        raise RecipeError(problems.items)
    return Recipe(
        path=path, sha256=hashlib.sha256(text.encode()).hexdigest(),
        contact=str(top["contact"]).strip(), product_token=top["product_token"],
        collection=sections["collection"], budgets=sections["budgets"],
        host_budgets=host_budgets, network=sections["network"],
        licences=sections["licences"], images=images, stop=sections["stop"],
        sources=source_list)


def load_recipe(path: Path) -> Recipe:
    """Read and validate a recipe file."""
    try:
        text = path.read_text(encoding="utf-8")
    except FileNotFoundError as exc:
        raise RecipeError([RecipeProblem(str(path), "", "file not found; create one with "
                                         "'collector init DIR'")]) from exc
    except UnicodeDecodeError as exc:
        raise RecipeError([RecipeProblem(str(path), "", f"not UTF-8 text: {exc}")]) from exc
    except OSError as exc:
        raise RecipeError([RecipeProblem(str(path), "", f"cannot be read: {exc}")]) from exc
    return parse_recipe(text, path)
