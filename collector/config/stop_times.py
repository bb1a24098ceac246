"""When a run stops: the local time of ``--until`` / ``[stop] until`` and the length of
``--for`` / ``[stop] duration``, read and checked in one place for the recipe and the command
line."""

from __future__ import annotations

import re
from datetime import time
from typing import Any

from collector.errors import RecipeError, RecipeProblem

DURATION_RE = re.compile(r"^(?:(\d+)h)?\s*(?:(\d+)m)?\s*(?:(\d+)s)?$")


def parse_clock(value: str) -> time:
    """Parse a 24-hour local time "HH:MM"."""
    match = re.fullmatch(r"(\d{1,2}):(\d{2})", str(value).strip())
    if not match:
        raise ValueError(value)
    hour, minute = int(match[1]), int(match[2])
    if hour > 23 or minute > 59:  # time() would say "hour must be in 0..23": ours is clearer
        raise ValueError(value)
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


def check_clock(value: Any) -> str | None:
    try:
        parse_clock(value)
    except ValueError:
        return f"must be a local time like \"07:00\" (24-hour HH:MM), got {value!r}"
    return None


def check_duration(value: Any) -> str | None:
    try:
        parse_duration(value)
    except ValueError:
        unit = (f'; a number needs a unit: "{value}h" for hours, "{value}m" for minutes'
                if str(value).strip().isdigit() else "")
        return f"must be a duration like \"8h\", \"90m\" or \"1h30m\", got {value!r}{unit}"
    return None


class StopOptionsError(RecipeError):
    """--until, --for or --max-items cannot be read; all problems are listed at once."""

    what = "the command line"


def check_stop_options(until: str | None, duration: str | None, max_items: int | None) -> None:
    """Refuse unreadable --until, --for and --max-items (all at once, worded like the recipe's
    [stop] keys) before a run or a dry run starts: StopOptionsError, exit 2."""
    found = [("--until", until, check_clock), ("--for", duration, check_duration)]
    problems = [RecipeProblem(option, "", why) for option, value, check in found
                if value is not None and (why := check(value))]
    if max_items is not None and max_items < 0:
        problems.append(RecipeProblem("--max-items", "",
                                      f"must be 0 (no limit) or more, got {max_items}"))
    if problems:
        raise StopOptionsError(problems)
