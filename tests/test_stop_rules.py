"""Stop rules for the overnight run: --until, --for, --max-items."""

from __future__ import annotations

from datetime import datetime, timedelta, timezone
from pathlib import Path

import pytest

from collector.config.recipe import parse_recipe
from collector.errors import RecipeError
from collector.run.scheduling import RunResult, stop_rules

RECIPE = parse_recipe('contact = "me@example.org"\n[stop]\nmax_items = 7\n', Path("r.toml"))
TZ = timezone(timedelta(hours=1))


def test_until_in_the_evening_means_tomorrow_morning() -> None:
    """--until 07:00 given at 22:00 stops at 07:00 the next day, local time."""
    now = datetime(2026, 12, 1, 22, 0, tzinfo=TZ)
    rules = stop_rules(RECIPE, until="07:00", now=now)
    assert rules.deadline == datetime(2026, 12, 2, 7, 0, tzinfo=TZ).timestamp()


def test_until_later_today_stays_today() -> None:
    """--until 23:30 given at 22:00 stops the same day."""
    now = datetime(2026, 12, 1, 22, 0, tzinfo=TZ)
    assert stop_rules(RECIPE, until="23:30", now=now).deadline == \
        datetime(2026, 12, 1, 23, 30, tzinfo=TZ).timestamp()


def test_earliest_of_until_and_for_wins() -> None:
    """With both --until and --for, the earlier deadline applies."""
    now = datetime(2026, 12, 1, 22, 0, tzinfo=TZ)
    rules = stop_rules(RECIPE, until="07:00", duration="2h", now=now)
    assert rules.deadline == (now + timedelta(hours=2)).timestamp()


def test_max_items_comes_from_the_recipe_unless_given() -> None:
    """The recipe's [stop] max_items applies; a command-line value overrides it."""
    assert stop_rules(RECIPE).max_items == 7
    assert stop_rules(RECIPE, max_items=3).max_items == 3
    assert stop_rules(RECIPE).deadline is None


def test_unreadable_until_is_a_clear_error() -> None:
    """A bad --until value is reported as a usage problem (exit 2)."""
    with pytest.raises(RecipeError, match="HH:MM"):
        stop_rules(RECIPE, until="seven")


@pytest.mark.parametrize(("outcome", "code"), [
    ("finished", 0), ("stopped: the time limit was reached", 0), ("interrupted", 130),
    ("failed: the disk is full", 1)])
def test_exit_codes_follow_the_outcome(outcome: str, code: int) -> None:
    """Interrupted runs exit 130 (128 + SIGINT, common practice, no source); failures 1."""
    assert RunResult(1, outcome).exit_code == code
