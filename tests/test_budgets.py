"""Per-host budgets with a fake clock: intervals, hourly limits, hints, throttling, connections."""

from __future__ import annotations

import itertools
import threading
from datetime import time as dtime

import pytest

from collector.fetching.budgets import Budget, FakeClock, HostBudgets, budgets_from_recipe
from collector.fetching.robots import Hints

H = "127.0.0.2:8080"


def make(clock: FakeClock, **kw: float) -> HostBudgets:
    return HostBudgets(Budget(**kw), clock=clock)


def test_request_starts_are_spaced_by_min_interval() -> None:
    """Consecutive starts to one host are at least min_interval apart (recipe [budgets])."""
    clock = FakeClock()
    budgets = make(clock, min_interval=3.0)
    starts = []
    for _ in range(4):
        with budgets.acquire(H) as slot:
            starts.append(slot.started)
    assert [b - a for a, b in itertools.pairwise(starts)] == [3.0, 3.0, 3.0]


def test_hosts_do_not_wait_for_each_other() -> None:
    """Another host's budget does not delay this one."""
    clock = FakeClock()
    budgets = make(clock, min_interval=10.0)
    budgets.acquire("a:80").release()
    slot = budgets.acquire("b:80")
    assert slot.waited == 0.0
    slot.release()


def test_requests_per_hour_is_a_sliding_window() -> None:
    """With 3 requests/hour the 4th start waits until the 1st is an hour old."""
    clock = FakeClock()
    budgets = make(clock, min_interval=0.0, requests_per_hour=3)
    first = budgets.acquire(H)
    first.release()
    for _ in range(2):
        budgets.acquire(H).release()
    fourth = budgets.acquire(H)
    assert fourth.started - first.started == pytest.approx(3600.0)


def test_bytes_per_hour_holds_the_next_start() -> None:
    """After bytes_per_hour bytes, the next start waits until those bytes are an hour old."""
    clock = FakeClock()
    budgets = make(clock, min_interval=0.0, bytes_per_hour=1000)
    with budgets.acquire(H) as slot:
        slot.add_bytes(1000)
        t0 = clock.monotonic()
    assert budgets.wait_time(H) == pytest.approx(3600.0)
    clock.advance(3600.0)
    assert budgets.wait_time(H) == 0.0
    assert budgets.next_allowed_at(H) <= t0 + 3600.0


def test_bytes_counted_in_one_second_share_one_entry_and_never_leave_early() -> None:
    """Chunks counted within a second share one entry of the bytes/hour log (10,000 chunks
    over 100 s leave at most ~100 entries), and the hour runs from an entry's last bytes: the
    next start is never earlier than counting byte by byte would allow (common practice, no
    source: a sliding-hour byte budget)."""
    clock = FakeClock()
    budgets = make(clock, min_interval=0.0, bytes_per_hour=10_000_000)
    for _ in range(10_000):
        budgets.record_bytes(H, 100)
        clock.advance(0.01)
    log = budgets._state(H).byte_log
    assert log is not None and len(log) <= 101
    assert sum(n for _, _, n in log) == 1_000_000
    tight = make(clock, min_interval=0.0, bytes_per_hour=1000)
    tight.record_bytes(H, 600)
    clock.advance(0.5)
    tight.record_bytes(H, 400)
    last = clock.monotonic()
    assert tight.next_allowed_at(H) == pytest.approx(last + 3600.0)
    clock.advance(3600.0)
    assert tight.wait_time(H) == 0.0


def test_crawl_delay_stricter_than_recipe_is_honoured() -> None:
    """Crawl-delay above the recipe interval wins (not RFC 9309; standards.md §2)."""
    clock = FakeClock()
    budgets = make(clock, min_interval=1.0)
    budgets.apply_hints(H, Hints(crawl_delay=5.0))
    assert budgets.interval(H) == 5.0


def test_looser_robots_hints_never_speed_up() -> None:
    """A Crawl-delay or Request-rate below the recipe interval is ignored (standards.md §2)."""
    clock = FakeClock()
    budgets = make(clock, min_interval=3.0)
    budgets.apply_hints(H, Hints(crawl_delay=0.5, request_interval=1.0))
    assert budgets.interval(H) == 3.0


def test_request_rate_becomes_an_interval() -> None:
    """Request-rate 1/10 means at least 10 s between starts (standards.md §2, common practice)."""
    clock = FakeClock()
    budgets = make(clock, min_interval=1.0)
    budgets.apply_hints(H, Hints(request_interval=10.0))
    assert budgets.interval(H) == 10.0


def test_closed_visit_window_delays_until_it_opens() -> None:
    """Outside the Visit-time window (UTC) the host waits until the window opens."""
    clock = FakeClock(start=1_800_000_000.0)  # 2027-01-15T08:00:00Z
    budgets = make(clock, min_interval=0.0)
    budgets.apply_hints(H, Hints(visit_window=(dtime(9, 0), dtime(10, 0))))
    assert budgets.wait_time(H) == pytest.approx(3600.0)
    slot = budgets.acquire(H)
    assert slot.waited == pytest.approx(3600.0)


def test_window_over_midnight_is_open_late_at_night() -> None:
    """A Visit-time window like 2200-0600 is open at 23:00 UTC."""
    clock = FakeClock(start=1_800_000_000.0 + 15 * 3600)  # 23:00Z
    budgets = make(clock, min_interval=0.0)
    budgets.apply_hints(H, Hints(visit_window=(dtime(22, 0), dtime(6, 0))))
    assert budgets.wait_time(H) == 0.0


def test_throttle_pushes_next_start_and_doubles_interval() -> None:
    """A 429/503 moves the host's next start out and doubles its interval for the run."""
    clock = FakeClock()
    budgets = make(clock, min_interval=2.0)
    budgets.acquire(H).release()
    budgets.throttle(H, until=clock.monotonic() + 30.0)
    assert budgets.wait_time(H) == pytest.approx(30.0)
    assert budgets.interval(H) == 4.0


def test_next_allowed_at_lets_a_scheduler_pick_ready_hosts() -> None:
    """next_allowed_at is on the clock's monotonic timeline and orders hosts by readiness."""
    clock = FakeClock()
    budgets = make(clock, min_interval=5.0)
    budgets.acquire("a:80").release()
    clock.advance(2.0)
    budgets.acquire("b:80").release()
    ready = sorted(["a:80", "b:80", "c:80"], key=budgets.next_allowed_at)
    assert ready == ["c:80", "a:80", "b:80"]
    assert budgets.next_allowed_at("a:80") == pytest.approx(clock.monotonic() + 3.0)


def test_per_host_override_applies_to_that_host_only() -> None:
    """[budgets.hosts."host:port"] overrides the defaults for that host (CONTRACT recipe)."""
    default, overrides = budgets_from_recipe(
        {"min_interval": 3.0, "hosts": {"127.0.0.2:8080": {"min_interval": 0.5}, "x.org": {}}}
    )
    budgets = HostBudgets(default, overrides, clock=FakeClock())
    assert budgets.budget_for("127.0.0.2:8080").min_interval == 0.5
    assert budgets.budget_for("127.0.0.2:9090").min_interval == 3.0
    assert budgets.budget_for("x.org:443").min_interval == 3.0


def test_max_connections_limits_concurrent_slots() -> None:
    """No more than max_connections slots of one host are held at once."""
    budgets = HostBudgets(Budget(min_interval=0.0, max_connections=2), clock=FakeClock())
    held = [budgets.acquire(H), budgets.acquire(H)]
    got = threading.Event()

    def third() -> None:
        budgets.acquire(H).release()
        got.set()

    worker = threading.Thread(target=third)
    worker.start()
    assert not got.wait(0.3)
    held[0].release()
    assert got.wait(5.0)
    worker.join()
    held[1].release()


def test_concurrent_threads_never_start_closer_than_interval() -> None:
    """Eight threads hammering one host still get starts spaced by min_interval."""
    clock = FakeClock()
    budgets = HostBudgets(Budget(min_interval=1.0, max_connections=4), clock=clock)
    starts: list[float] = []
    lock = threading.Lock()

    def work() -> None:
        for _ in range(5):
            with budgets.acquire(H) as slot, lock:
                starts.append(slot.started)

    threads = [threading.Thread(target=work) for _ in range(8)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    starts.sort()
    assert len(starts) == 40
    assert min(b - a for a, b in itertools.pairwise(starts)) >= 1.0 - 1e-9


def test_the_next_start_counts_from_when_the_answer_began_to_arrive() -> None:
    """A request that reached the server late (the client was busy, or the server slow to
    answer) moves the next start: it is a full interval after the answer's headers arrived,
    so no two arrivals at the server are closer than the interval (the server has received
    request A by the time A's answer starts; common practice, no source)."""
    clock = FakeClock()
    budgets = make(clock, min_interval=0.1)
    first = budgets.acquire(H)
    clock.advance(0.04)  # 40 ms until the status line and headers of the answer are in
    first.answered()
    clock.advance(0.5)  # the body takes a while; answered() is not moved by the end
    first.release()
    assert budgets.next_allowed_at(H) == pytest.approx(first.started + 0.04 + 0.1)


def test_an_attempt_without_an_answer_counts_from_its_end() -> None:
    """A timeout or a reset gives no headers: the next start is an interval after it ended."""
    clock = FakeClock()
    budgets = make(clock, min_interval=0.1)
    with budgets.acquire(H) as slot:
        clock.advance(2.0)
    assert budgets.next_allowed_at(H) == pytest.approx(slot.started + 2.0 + 0.1)


def test_a_host_contacted_just_before_this_run_waits_the_rest_of_its_interval() -> None:
    """A resumed run: the ledger says the host was last contacted 1 s ago, the interval is 3 s,
    so the first request waits 2 s; a host last seen long ago starts at once."""
    clock = FakeClock()
    budgets = make(clock, min_interval=3.0)
    budgets.contacted(H, seconds_ago=1.0)
    budgets.contacted("127.0.0.3:80", seconds_ago=3600.0)
    with budgets.acquire(H) as slot:
        assert slot.waited == pytest.approx(2.0)
    with budgets.acquire("127.0.0.3:80") as other:
        assert other.waited == 0.0
