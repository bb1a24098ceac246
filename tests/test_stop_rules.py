"""Stop rules for the overnight run: --until, --for, --max-items."""

from __future__ import annotations

from datetime import datetime, timedelta, timezone
from pathlib import Path

import pytest

from collector.config.recipe import parse_recipe
from collector.config.stop_times import StopOptionsError
from collector.errors import RecipeError
from collector.exports.summary import Estimate, format_estimate
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


@pytest.mark.parametrize(("until", "duration"), [("25:00", None), ("07:60", None),
                                                 (None, "8"), (None, "0h")])
def test_out_of_range_clock_and_unitless_duration_are_refused(until: str | None,
                                                              duration: str | None) -> None:
    """A clock has hours 0-23 and minutes 0-59 (24-hour local time as in ISO 8601, from
    memory; "24:00" is not accepted) and a duration needs a unit: each is a StopOptionsError
    naming the option, never a raw library message."""
    with pytest.raises(StopOptionsError) as caught:
        stop_rules(RECIPE, until=until, duration=duration)
    text = str(caught.value)
    assert text.startswith("the command line has 1 problem:")
    assert ("--until" if until else "--for") in text
    assert "must be in" not in text  # datetime.time's own wording stays out


def test_dry_run_says_when_the_run_stops_and_what_fits() -> None:
    """The estimate names the stop time and counts the listed images that fit before it:
    each host in parallel, its interval times its connections."""
    est = Estimate(per_host={"a.example": 100, "b.example": 10},
                   interval={"a.example": 3.0, "b.example": 3.0}, seconds=300,
                   unknown_sources=[], connections={"a.example": 1, "b.example": 1})
    now = datetime(2026, 12, 1, 22, 0, tzinfo=TZ).timestamp()
    lines = format_estimate(RECIPE, est, deadline=now + 60, now=now)
    # 60 s at one request every 3 s: 20 from a.example (of 100), all 10 from b.example.
    assert lines[-1].endswith("in 60 s; about 30 of the 110 images already listed fit before "
                              "then (the next run resumes with the rest)")
    assert "all 110 images" in format_estimate(RECIPE, est, deadline=now + 3600, now=now)[-1]
    assert format_estimate(RECIPE, est, max_items=5, now=now)[-1] == \
        "stop: after 5 newly stored items"
    assert format_estimate(RECIPE, est, now=now)[-1].startswith("stop: none set")


@pytest.mark.parametrize(("outcome", "code"), [
    ("finished", 0), ("stopped: the time limit was reached", 0), ("interrupted", 130),
    ("failed: the disk is full", 1)])
def test_exit_codes_follow_the_outcome(outcome: str, code: int) -> None:
    """Interrupted runs exit 130 (128 + SIGINT, common practice, no source); failures 1."""
    assert RunResult(1, outcome).exit_code == code
