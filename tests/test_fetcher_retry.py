"""Retry-After parsing, back-off and settings: narrow unit tests (fake clock; the answers come
from a real loopback server, scripted per path)."""

from __future__ import annotations

import random
import threading
from collections.abc import Callable, Iterator
from pathlib import Path

import pytest

from collector import urls
from collector.config.recipe import parse_recipe
from collector.demo_site.loopback import Answer, Handler, LoopbackServer
from collector.errors import FetchError, HostParked
from collector.fetching.answers import parse_http_date, parse_retry_after
from collector.fetching.budgets import Budget, FakeClock
from collector.fetching.fetcher import Fetcher, FetchSettings
from collector.fetching.retry import Retryable, RetryPolicies, first_then_retried
from collector.storage.ledger import Ledger

# RFC 9110 §5.6.7 examples; all three forms are Unix 784111777 (standards.md §4).
DATE_FORMS = [
    "Sun, 06 Nov 1994 08:49:37 GMT",  # IMF-fixdate
    "Sunday, 06-Nov-94 08:49:37 GMT",  # obsolete RFC 850
    "Sun Nov  6 08:49:37 1994",  # obsolete asctime, naive -> UTC
]


@pytest.mark.parametrize("value", DATE_FORMS)
def test_all_three_http_date_forms_parse_to_the_same_instant(value: str) -> None:
    """IMF-fixdate, RFC 850 and asctime all give 784111777 (RFC 9110 §5.6.7)."""
    assert parse_http_date(value) == 784111777.0


def test_retry_after_delay_seconds_and_date_check_values() -> None:
    """'120' -> 120 s; 'Fri, 31 Dec 1999 23:59:59 GMT' is Unix 946684799 (RFC 9110 §10.2.3)."""
    assert parse_retry_after("120", now=0.0) == (120.0, None)
    assert parse_retry_after("Fri, 31 Dec 1999 23:59:59 GMT", now=946684789.0) == (10.0, None)


def test_retry_after_date_in_the_past_means_no_wait() -> None:
    """A date already passed asks for no further delay."""
    assert parse_retry_after(DATE_FORMS[0], now=784111800.0) == (0.0, None)


@pytest.mark.parametrize("value", ["-1", "1.5", "", "120s", "soon", "Sun, 06 Nov 1994"])
def test_invalid_retry_after_values_are_ignored_with_a_note(value: str) -> None:
    """Values outside `HTTP-date / 1*DIGIT` are ignored and noted (RFC 9110 §10.2.3 ABNF)."""
    wait, note = parse_retry_after(value, now=0.0)
    assert wait is None and note and "ignored" in note


def _settings(**kw: object) -> FetchSettings:
    recipe = {"contact": "curator@example.org",
              "budgets": {"min_interval": 0.0, "max_attempts": 4, "backoff_base": 1.0,
                          "backoff_max": 300.0},
              "network": {"allow_addresses": ["127.0.0.1"]}}
    return FetchSettings.from_recipe(recipe, **kw)


@pytest.fixture
def server() -> Iterator[LoopbackServer]:
    """A loopback server answering robots.txt with 404 (RFC 9309 §2.3.1.3: no rules)."""
    with LoopbackServer("127.0.0.1") as loopback:
        loopback.route("/robots.txt", (404, b""))
        yield loopback


def _in_turn(*answers: Answer) -> Callable[[Handler], Answer]:
    """A route giving ``answers`` one per request, then the last one again."""
    left = list(answers)

    def answer(h: Handler) -> Answer:
        return left.pop(0) if len(left) > 1 else left[0]

    return answer


def test_backoff_is_exponential_with_full_jitter(server: LoopbackServer) -> None:
    """No Retry-After: wait n is uniform in [0, base * 2^(n-1)] (common practice, no source)."""
    server.route("/x", (502, b""))
    clock = FakeClock()
    fetcher = Fetcher(_settings(), None, clock=clock, rng=random.Random(4))
    with pytest.raises(FetchError) as err:
        fetcher.get_page(server.url("/x"))
    assert err.value.reason == "http_502" and err.value.status == 502
    assert len(clock.sleeps) == 3
    for n, slept in enumerate(clock.sleeps, start=1):
        assert 0.0 <= slept <= 2 ** (n - 1)


def test_retry_after_is_slept_exactly_through_the_clock(server: LoopbackServer) -> None:
    """A 503 with Retry-After: 7 sleeps exactly 7 s on the injected clock, then retries."""
    server.route("/y", _in_turn((503, b"", {"Retry-After": "7"}), (200, b"ok")))
    clock = FakeClock()
    page = Fetcher(_settings(), None, clock=clock).get_page(server.url("/y"))
    assert page.body == b"ok" and 7.0 in clock.sleeps
    assert sum(clock.sleeps) == pytest.approx(7.0)


def test_total_back_off_is_capped(server: LoopbackServer) -> None:
    """Retrying stops before the summed waits pass max_total_delay."""
    server.route("/z", (429, b"", {"Retry-After": "60"}))
    clock = FakeClock()
    with pytest.raises(FetchError):
        Fetcher(_settings(max_total_delay=100.0), None, clock=clock).get_page(server.url("/z"))
    assert sum(clock.sleeps) <= 100.0
    assert server.paths() == ["/robots.txt", "/z", "/z"]  # two attempts: 60 s + 60 s > 100 s


def _parking_settings() -> FetchSettings:
    return FetchSettings.from_recipe(
        {"contact": "c@example.org", "budgets": {"min_interval": 0.0, "max_retry_after": 600},
         "network": {"allow_addresses": ["127.0.0.1"]}})


def test_retry_after_over_cap_parks_without_sleeping(server: LoopbackServer) -> None:
    """Retry-After: 3600 over a 600 s cap raises HostParked at once; nothing sleeps an hour."""
    server.route("/p", (429, b"", {"Retry-After": "3600"}))
    clock = FakeClock()
    with pytest.raises(HostParked) as err:
        Fetcher(_parking_settings(), None, clock=clock).get_page(server.url("/p"))
    assert err.value.until == pytest.approx(clock.time() + 3600.0)
    assert clock.sleeps == []


def test_parking_outlives_the_run_for_a_day_at_most(tmp_path: Path,
                                                    server: LoopbackServer) -> None:
    """A ten-year Retry-After parks the host in this run; the ledger keeps it 24 h at most,
    so a later run tries again (project policy; RFC 9110 section 10.2.3 sets no maximum)."""
    server.route("/p", (503, b"", {"Retry-After": "315360000"}))
    clock = FakeClock()
    ledger = Ledger.create(tmp_path / "l.sqlite")
    with pytest.raises(HostParked) as err:
        Fetcher(_parking_settings(), ledger, clock=clock).get_page(server.url("/p"))
    assert err.value.until == pytest.approx(clock.time() + 315360000.0)
    host = urls.host_key(server.url("/p"))
    assert ledger.get_host(host)["parked_until"] == pytest.approx(clock.time() + 86400.0)
    clock.advance(86401.0)
    server.route("/p", (200, b"{}"))
    assert Fetcher(_parking_settings(), ledger, clock=clock).get_page(
        server.url("/p")).status == 200
    ledger.close()


def test_a_429_slows_the_host_and_the_ledger_shows_it(tmp_path: Path,
                                                      server: LoopbackServer) -> None:
    """After a 429 the host's interval is doubled for the run, and hosts.effective_budget
    records the slow-down (RFC 6585 section 4: the client sent too many requests)."""
    server.route("/p", _in_turn((429, b"", {"Retry-After": "1"}), (200, b"{}")))
    ledger = Ledger.create(tmp_path / "l.sqlite")
    page = Fetcher(_settings(), ledger, clock=FakeClock()).get_page(server.url("/p"))
    assert page.status == 200
    budget = ledger.get_host(urls.host_key(server.url("/p")))["effective_budget"]
    assert budget["slowdown"] == 2.0
    ledger.close()


def test_not_found_is_not_retried(server: LoopbackServer) -> None:
    """A 404 is final: one attempt, FetchError http_404."""
    server.route("/gone", (404, b""))
    with pytest.raises(FetchError) as err:
        Fetcher(_settings(), None, clock=FakeClock()).get_page(server.url("/gone"))
    assert err.value.reason == "http_404" and server.paths() == ["/robots.txt", "/gone"]


def test_settings_are_built_from_a_validated_recipe(tmp_path: Path) -> None:
    """FetchSettings.from_recipe reads contact, token, budgets, host overrides and network."""
    text = """
contact = "curator@example.org"
product_token = "fernbot"
[budgets]
min_interval = 2.0
[budgets.hosts."127.0.0.2:8080"]
min_interval = 0.5
[network]
allow_addresses = ["127.0.0.2"]
max_image_bytes = 1000
secret_params = ["key"]
"""
    recipe = parse_recipe(text, tmp_path / "recipe.toml")
    s = FetchSettings.from_recipe(recipe)
    assert s.user_agent.startswith("collector/") and s.user_agent.endswith("(+curator@example.org)")
    assert (s.product_token, s.budget.min_interval, s.max_image_bytes) == ("fernbot", 2.0, 1000)
    assert s.host_budgets["127.0.0.2:8080"].min_interval == 0.5
    assert s.allow_addresses == ("127.0.0.2",) and s.secret_params == ("key",)


def test_a_shared_retry_policy_counts_each_threads_attempts_apart() -> None:
    """One policy serves every thread of the fetcher: two threads retrying at the same time
    (both waiting between attempts together) each get exactly their own three attempts and
    their own answer (tenacity keeps a call's state per thread)."""
    both_waiting = threading.Barrier(2, timeout=10)
    policies = RetryPolicies(900.0, random.Random(7), lambda s: both_waiting.wait())
    budget = Budget(max_attempts=3, backoff_base=0.0)
    policy = policies.get(3, budget)
    assert policies.get(3, budget) is policy
    calls: dict[str, int] = {"a": 0, "b": 0}
    answers: dict[str, object] = {}

    def work(name: str) -> None:
        def attempt() -> str:
            calls[name] += 1
            if calls[name] < 3:
                raise Retryable("connection", None, "refused")
            return name

        answers[name] = policy(attempt)

    threads = [threading.Thread(target=work, args=(n,)) for n in calls]
    for t in threads:
        t.start()
    for t in threads:
        t.join(20)
    assert calls == {"a": 3, "b": 3}
    assert answers == {"a": "a", "b": "b"}


# Scripted outcomes of successive attempts: a Retryable (with or without Retry-After), another
# error, or an answer.
_SCRIPTS = {
    "answer at once": ["ok"],
    "answer at the second": [Retryable("connection", None, "refused"), "ok"],
    "three failures": [Retryable("http_503", 503, "busy")] * 3,
    "Retry-After then answer": [Retryable("http_429", 429, "slow", 2.0), "ok"],
    "over the wait cap": [Retryable("http_429", 429, "slow", 600.0)] * 3,
    "other error first": [FetchError("http://x/", "http_404", 404)],
    "other error second": [Retryable("timeout", None, "slow"), FetchError("http://x/", "x", 1)],
}


def _outcome(policy_call: object, script: list) -> tuple:
    """(answer or exception type and reason, attempts made, sleeps) of one scripted request."""
    clock = FakeClock()
    policy = RetryPolicies(900.0, random.Random(5), clock.sleep).get(
        3, Budget(max_attempts=3, backoff_base=1.0))
    made = [0]

    def attempt() -> str:
        made[0] += 1
        step = script[made[0] - 1]
        if isinstance(step, Exception):
            raise step
        return str(step)

    try:
        got: object = policy_call(attempt, policy)  # type: ignore[operator]
    except (Retryable, FetchError) as exc:
        got = (type(exc).__name__, exc.reason)
    return got, made[0], clock.sleeps


@pytest.mark.parametrize("name", list(_SCRIPTS))
def test_first_attempt_outside_the_policy_changes_nothing(name: str) -> None:
    """The fetcher makes a request's first attempt before entering tenacity
    (first_then_retried); every scripted sequence ends exactly as tenacity's own
    ``policy(attempt)`` ends it: the same answer or error, the same number of attempts and the
    same waits (the same seeded jitter; Retry-After slept exactly, RFC 9110 §10.2.3). The
    reference is tenacity itself."""
    script = _SCRIPTS[name]
    reference = _outcome(lambda attempt, policy: policy(attempt), script)
    assert _outcome(first_then_retried, script) == reference
    assert reference[1] == min(len(script), 3) or name == "over the wait cap"
