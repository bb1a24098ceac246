"""The one recipe schema vocabulary: key specs, type checks, value checks and their wording.

Used by :mod:`collector.config.recipe` for the top-level sections and by every source kind for
its ``[[sources]]`` table, so a problem reads the same wherever it is found ("must be a whole
number, got a string ('ten')"; "unknown key (did you mean 'pagination'?); allowed here: ...").

Also the one home of the ``${NAME}`` syntax: :func:`env_names` finds references (the recipe
checks them before a run), :func:`expand_env` fills them in. Values are filled only when a
request is sent (``collector.fetching.fetcher.filled_from_env``), so expanded secrets never sit
in a recipe, a source table or the ledger; the only other caller,
``collector.run.record.secret_values``, computes the same values solely to scrub them from
messages.

This module imports nothing from collector but the errors, so anything may import it.
"""

from __future__ import annotations

import difflib
import json
import os
import re
from collections.abc import Callable, Iterable, Mapping
from dataclasses import dataclass
from datetime import date, datetime
from typing import Any, TypeGuard
from urllib.parse import urlsplit

from collector.errors import RecipeProblem

Check = Callable[[Any], str | None]

ENV_REF_RE = re.compile(r"\$\{([A-Za-z_][A-Za-z0-9_]*)\}")  # "${NAME}" in params and headers

_REQUIRED = object()

# Type name -> (test, wording). "date" accepts a TOML date or date-time, or a string.
_TYPES: dict[str, tuple[Callable[[Any], bool], str]] = {
    "str": (lambda v: isinstance(v, str), "a string"),
    "int": (lambda v: isinstance(v, int) and not isinstance(v, bool), "a whole number"),
    "float": (lambda v: isinstance(v, int | float) and not isinstance(v, bool), "a number"),
    "bool": (lambda v: isinstance(v, bool), "true or false"),
    "list": (lambda v: isinstance(v, list), "a list"),
    "list[str]": (lambda v: isinstance(v, list) and all(isinstance(x, str) for x in v),
                  "a list of strings"),
    "table": (lambda v: isinstance(v, dict), "a table"),
    "table[str]": (lambda v: isinstance(v, dict) and all(isinstance(x, str) for x in v.values()),
                   "a table of strings"),
    "date": (lambda v: isinstance(v, str | date | datetime), "a date or a string"),
}


@dataclass(frozen=True)
class Key:
    """What one recipe key accepts: a type name (see ``TYPES``), a default, whether it is
    required (``hint`` then says what to write), an optional extra check, and the name the key
    had before it was renamed (``formerly``): a recipe that still uses the old name gets an
    error naming the new one, never a silent alias."""

    type: str
    default: Any = None
    required: bool = False
    hint: str = ""
    check: Check | None = None
    formerly: str = ""

    def __post_init__(self) -> None:
        if self.type not in _TYPES:
            raise ValueError(f"unknown key type {self.type!r}; use one of {', '.join(_TYPES)}")


TYPES = tuple(_TYPES)


class Problems:
    """Collects the RecipeProblems of one file (``file`` may be "" and filled in later)."""

    def __init__(self, file: str = "") -> None:
        self.file = file
        self.items: list[RecipeProblem] = []

    def add(self, key_path: str, message: str) -> None:
        """Record one problem at key_path."""
        self.items.append(RecipeProblem(self.file, key_path, message))

    def extend(self, problems: Iterable[RecipeProblem]) -> None:
        """Adopt problems found elsewhere, under this file's name."""
        for p in problems:
            self.add(p.key_path, p.message)

    def __bool__(self) -> bool:
        return bool(self.items)


def did_you_mean(word: str, choices: Iterable[str]) -> str:
    """A ' (did you mean "x"?)' suffix for an unknown word, or ''."""
    close = difflib.get_close_matches(word, list(choices), n=1, cutoff=0.6)
    return f" (did you mean {close[0]!r}?)" if close else ""


def describe(value: Any) -> str:
    """A value for a message: its kind in words and its repr, e.g. "a string ('two')"."""
    names = {str: "a string", bool: "a boolean", int: "a whole number", float: "a number",
             list: "a list", dict: "a table", date: "a date", datetime: "a date-time"}
    return f"{names.get(type(value), type(value).__name__)} ({value!r})"[:120]


def type_problem(type_name: str, value: Any) -> str | None:
    """Why ``value`` is not of the recipe type ``type_name``, or None."""
    test, wanted = _TYPES[type_name]
    return None if test(value) else f"must be {wanted}, got {describe(value)}"


def check_table(table: Mapping[str, Any], spec: Mapping[str, Key], prefix: str,
                problems: Problems) -> dict[str, Any]:
    """Check one table against its spec: unknown keys (with "did you mean"), types, extra
    checks, missing required keys. Returns the valid values with defaults filled in."""
    out: dict[str, Any] = {}
    renamed = {rule.formerly: key for key, rule in spec.items() if rule.formerly}
    for key, value in table.items():
        path = f"{prefix}.{key}" if prefix else str(key)
        rule = spec.get(key)
        if rule is None and key in renamed:
            problems.add(path, f"is the old name of {renamed[key]}: rename the key to "
                         f"{renamed[key]} (the value stays the same)")
            continue
        if rule is None:
            problems.add(path, f"unknown key{did_you_mean(str(key), spec)}; allowed here: "
                         f"{', '.join(spec)}")
            continue
        why = type_problem(rule.type, value)
        if why is None and rule.check is not None:
            why = rule.check(value)
        if why:
            problems.add(path, why)
        else:
            out[key] = value
    for key, rule in spec.items():
        if key in table or (rule.formerly and rule.formerly in table):
            continue
        if rule.required:
            hint = f" ({rule.hint})" if rule.hint else ""
            problems.add(f"{prefix}.{key}" if prefix else key, f"required key is missing{hint}")
        elif rule.default is not None:
            out[key] = rule.default
    return out


# --- value checks: each returns a message or None, for Key(check=...) ----------------------------


def at_least(minimum: float, *, strict: bool = False) -> Check:
    """A number at least ``minimum`` (greater than it with ``strict``)."""
    def check(value: Any) -> str | None:
        if strict and value <= minimum:
            return f"must be greater than {minimum:g}, got {value!r}"
        if not strict and value < minimum:
            return f"must be {minimum:g} or more, got {value!r}"
        return None
    return check


def between(low: float, high: float, *, open_low: bool = False) -> Check:
    """A number from ``low`` to ``high`` (above ``low`` with ``open_low``)."""
    def check(value: Any) -> str | None:
        if value < low or value > high or (open_low and value == low):
            return f"must be between {low:g} and {high:g}, got {value!r}"
        return None
    return check


def one_of(*choices: str) -> Check:
    """One of a few fixed strings, with a "did you mean" for a near miss."""
    def check(value: Any) -> str | None:
        if value not in choices:
            return (f"must be one of {', '.join(repr(c) for c in choices)}, got {value!r}"
                    f"{did_you_mean(str(value), choices)}")
        return None
    return check


def item_condition(value: Any) -> str | None:
    """A condition on an item's fields: a JMESPath expression that compiles (evaluated by
    :mod:`collector.checks.conditions`; "" means none)."""
    import jmespath  # imported here: most recipes have no condition
    from jmespath.exceptions import JMESPathError

    if value == "":
        return None
    try:
        jmespath.compile(value)
    except JMESPathError as exc:
        return (f"is not a JMESPath expression ({str(exc).splitlines()[0]}); e.g. "
                "\"year_to < `1900`\" or \"contains(lower(title), 'fern')\"")
    return None


def http_url(value: Any) -> str | None:
    """An absolute http or https URL with a host."""
    try:
        parts = urlsplit(value)
    except ValueError:  # e.g. "http://[::1": not a URL at all
        return f'must be an absolute http:// or https:// URL, got "{value}"'
    if parts.scheme.lower() not in ("http", "https") or not parts.netloc:
        return f'must be an absolute http:// or https:// URL, got "{value}"'
    return None


def not_blank(value: Any) -> str | None:
    """A string or list that is not empty (nor only spaces)."""
    if not (value.strip() if isinstance(value, str) else value):
        return "must not be empty"
    return None


# --- checks that report at sub-paths (list entries, table entries) -------------------------------


def check_str_list(value: Any, path: str, problems: Problems, *,
                   non_empty: bool = True) -> TypeGuard[list[str]]:
    """A list of non-empty strings, each bad entry named by index; returns whether it was one."""
    if not isinstance(value, list):
        return False
    if non_empty and not value:
        problems.add(path, "must not be empty")
        return False
    ok = True
    for i, v in enumerate(value):
        if not isinstance(v, str) or not v.strip():
            problems.add(f"{path}[{i}]", f"must be a non-empty string, got {describe(v)}")
            ok = False
    return ok


def check_str_table(value: Any, path: str, problems: Problems) -> None:
    """A table whose values are strings or numbers (query parameters, headers), by entry."""
    if not isinstance(value, dict):
        return
    for k, v in value.items():
        if isinstance(v, bool) or not isinstance(v, str | int | float):
            problems.add(f"{path}.{k}", f"must be a string or number, got {describe(v)}")


# RFC 9110 section 5.5: field values containing CR, LF or NUL are invalid and dangerous (a
# value with CR LF could end the header and start another).
_FIELD_BREAKERS = {"\r": "a carriage return (CR)", "\n": "a line feed (LF)", "\0": "a NUL"}


def header_value_problem(value: str) -> str | None:
    """Why ``value`` cannot be sent as an HTTP header value, or None."""
    found = [name for char, name in _FIELD_BREAKERS.items() if char in value]
    if found:
        return (f"holds {' and '.join(found)}, which a header value must not contain "
                "(RFC 9110 section 5.5)")
    return None


def check_header_table(value: Any, path: str, problems: Problems) -> None:
    """A table of HTTP headers: strings or numbers, none holding CR, LF or NUL."""
    check_str_table(value, path, problems)
    if isinstance(value, dict):
        for k, v in value.items():
            problem = header_value_problem(v) if isinstance(v, str) else None
            if problem:
                problems.add(f"{path}.{k}", problem)


def check_value(value: Any, check: Check, path: str, problems: Problems) -> None:
    """Run one value check on a value that may be absent (None): for keys whose type is
    already checked by the table's spec."""
    if value is None:
        return
    why = check(value)
    if why:
        problems.add(path, why)


def date_text(value: Any) -> str | None:
    """A recipe date (TOML date or string) as ISO 8601 text."""
    if value is None:
        return None
    if isinstance(value, date | datetime):
        return value.isoformat()
    return str(value)


# --- values shown as TOML ------------------------------------------------------------------------

_BARE_KEY = re.compile(r"[A-Za-z0-9_-]+")


def toml_key(key: str) -> str:
    """A key as TOML writes it: bare when it can be (TOML 1.0 "Keys"), else a quoted string."""
    return key if _BARE_KEY.fullmatch(key) else json.dumps(key, ensure_ascii=False)


def toml_value(value: Any) -> str:
    """A setting as it would be written in the recipe: ``true``, ``"keep"``, ``3.0``,
    ``["a", "b"]``, ``{ X-Token = "${TOKEN}" }``. JSON string escapes are valid TOML basic
    string escapes (TOML 1.0 "String"), so ``json.dumps`` writes the strings."""
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, int | float):
        return repr(value)
    if isinstance(value, list | tuple):
        return "[" + ", ".join(toml_value(v) for v in value) + "]"
    if isinstance(value, dict):
        inner = ", ".join(f"{toml_key(str(k))} = {toml_value(v)}" for k, v in value.items())
        return "{ " + inner + " }" if inner else "{}"
    if isinstance(value, date | datetime):
        return value.isoformat()
    return json.dumps(str(value), ensure_ascii=False)


# --- ${NAME} references -------------------------------------------------------------------------


def env_names(text: str) -> list[str]:
    """The NAMEs of the ``${NAME}`` references in text."""
    return ENV_REF_RE.findall(text)


def expand_env(text: str, *, strict: bool = False) -> str:
    """Replace each ``${NAME}`` with the environment variable NAME, so recipes can be shared
    without their keys. Unset names become "" unless ``strict`` (KeyError names the first)."""
    def value(match: re.Match[str]) -> str:
        name = match.group(1)
        if strict and name not in os.environ:
            raise KeyError(name)
        return os.environ.get(name, "")

    return ENV_REF_RE.sub(value, text)
