"""Per-host budgets: interval between request starts, requests/hour, bytes/hour, connections.

The interval is kept as the *server* sees it. A request reaches the server some time after the
client starts it (more when the client is busy), so counting from the previous start lets two
arrivals come closer than the interval. Each host's next start is therefore counted from the
later of the previous start and the moment the previous answer began to arrive (its status line
and headers, or the end of an attempt that got none): the server must have received the
previous request by then, so no two arrivals are closer than the interval. A host first met in
this run that the ledger says was contacted less than an interval ago (a resumed run) waits for
the rest of that interval (:meth:`HostBudgets.contacted`).

Every request start goes through :meth:`HostBudgets.acquire`, which blocks (through the injected
clock) until the host may be contacted and holds one of the host's connection slots until the
returned :class:`Slot` is released. :meth:`HostBudgets.next_allowed_at` lets a scheduler pick
hosts that are ready instead of blocking on one that is not.

All budget times are on the clock's monotonic timeline, except the Visit-time window, which is
a time of day in UTC and is read from the clock's wall time.
"""

from __future__ import annotations

import threading
import time as _time
from collections import deque
from collections.abc import Mapping
from dataclasses import asdict, dataclass
from datetime import UTC, datetime
from datetime import time as dtime
from typing import Any, Protocol

from collector.config.recipe import Budget
from collector.fetching.robots import Hints

HOUR = 3600.0
# After a 429/503 the host's interval is doubled, up to this factor (common practice, no source).
MAX_SLOWDOWN = 8.0
# Bytes counted within this many seconds share one entry of the bytes/hour log (see
# HostBudgets.record_bytes): an hour of a busy host is at most 3,600 entries, not one per chunk.
BYTE_BUCKET = 1.0
# A last contact the ledger puts ahead of now counts at most this far ahead (see contacted).
AHEAD_MAX = 5.0


class Clock(Protocol):
    """Time source: wall time (epoch s), monotonic time and sleep. Injected so tests use fakes."""

    def time(self) -> float: ...

    def monotonic(self) -> float: ...

    def sleep(self, seconds: float) -> None: ...


class SystemClock:
    """The real clock (its readings are the time module's own functions: called a few times
    a request, a method around each cost more than the reading)."""

    time = staticmethod(_time.time)
    monotonic = staticmethod(_time.monotonic)

    def sleep(self, seconds: float) -> None:
        if seconds > 0:
            _time.sleep(seconds)


SYSTEM_CLOCK = SystemClock()


class FakeClock:
    """A clock for tests: ``sleep`` advances time instantly and is recorded in ``sleeps``."""

    def __init__(self, start: float = 1_800_000_000.0) -> None:
        self._lock = threading.Lock()
        self._wall = start
        self._mono = 1000.0
        self.sleeps: list[float] = []

    def time(self) -> float:
        with self._lock:
            return self._wall

    def monotonic(self) -> float:
        with self._lock:
            return self._mono

    def sleep(self, seconds: float) -> None:
        self.advance(seconds, record=True)

    def advance(self, seconds: float, record: bool = False) -> None:
        """Move both timelines forward by ``seconds`` (negative values are ignored)."""
        seconds = max(0.0, seconds)
        with self._lock:
            if record:
                self.sleeps.append(seconds)
            self._wall += seconds
            self._mono += seconds


def budgets_from_recipe(table: Mapping[str, Any] | None) -> tuple[Budget, dict[str, Budget]]:
    """(defaults, per-host overrides) from the recipe's ``[budgets]`` table.

    ``[budgets.hosts."host:port"]`` (or ``"host"``) tables overlay the defaults.
    """
    table = dict(table or {})
    hosts = table.pop("hosts", {}) or {}
    default = Budget.from_table(table)
    overrides = {str(k).lower(): Budget.from_table(v, default) for k, v in hosts.items()}
    return default, overrides


def _slots(count: int) -> threading.BoundedSemaphore | threading.Lock:
    """A host's connection slots: a plain lock for one (the common budget; taken and given
    back in C, where a semaphore runs a few dozen lines of Python per request)."""
    return threading.Lock() if count <= 1 else threading.BoundedSemaphore(count)


@dataclass
class _HostState:
    budget: Budget
    semaphore: threading.BoundedSemaphore | threading.Lock  # connection slots (_slots)
    last_start: float | None = None
    last_answer: float | None = None  # when the latest answer began to arrive (see module doc)
    starts: deque[float] | None = None
    byte_log: deque[tuple[float, float, int]] | None = None  # (first, last stamp, bytes)
    byte_total: int = 0  # the sum of byte_log's counts, kept as entries come and go
    not_before: float = 0.0
    slowdown: float = 1.0
    hint_interval: float = 0.0
    visit_window: tuple[dtime, dtime] | None = None


class Slot:
    """One granted request start on a host; holds a connection slot until released."""

    def __init__(self, owner: HostBudgets, host: str, started: float, waited: float) -> None:
        self.host, self.started, self.waited = host, started, waited
        self._owner = owner
        self._released = False
        self._answered = False

    def answered(self) -> None:
        """The answer's status line and headers arrived: the server has the request, and
        the host's next start is counted from now (idempotent)."""
        if not self._answered:
            self._answered = True
            self._owner.record_answer(self.host)

    def add_bytes(self, count: int) -> None:
        """Count response bytes against the host's bytes/hour budget."""
        self._owner.record_bytes(self.host, count)

    def release(self) -> None:
        """Give the connection slot back (idempotent)."""
        if not self._released:
            self.answered()  # an attempt that got no answer counts from its end
            self._released = True
            self._owner._state(self.host).semaphore.release()

    def __enter__(self) -> Slot:
        return self

    def __exit__(self, *exc: object) -> None:
        self.release()


class HostBudgets:
    """Thread-safe budget keeper for every host of a run (keys are ``host:port``)."""

    def __init__(self, default: Budget | None = None,
                 overrides: Mapping[str, Budget] | None = None,
                 clock: Clock = SYSTEM_CLOCK) -> None:
        self.default = default or Budget()
        self.overrides = {k.lower(): v for k, v in (overrides or {}).items()}
        self.clock = clock
        self._lock = threading.Lock()
        self._hosts: dict[str, _HostState] = {}

    # -- configuration -------------------------------------------------------------------------
    def budget_for(self, host: str) -> Budget:
        """Recipe budget for ``host:port``: exact override, else host-only one, else default."""
        host = host.lower()
        if host in self.overrides:
            return self.overrides[host]
        bare = host.rsplit(":", 1)[0]
        return self.overrides.get(bare, self.default)

    def _state(self, host: str) -> _HostState:
        with self._lock:
            return self._state_locked(host)

    def _state_locked(self, host: str) -> _HostState:
        state = self._hosts.get(host)
        if state is None:
            budget = self.budget_for(host)
            state = _HostState(
                budget=budget,
                semaphore=_slots(int(budget.max_connections)),
                starts=deque(maxlen=max(1, int(budget.requests_per_hour))),
                byte_log=deque(),
            )
            self._hosts[host] = state
        return state

    def apply_hints(self, host: str, hints: Hints) -> None:
        """Honour robots.txt pacing hints when stricter than the recipe.

        Crawl-delay, Request-rate and Visit-time are NOT part of RFC 9309 (standards.md §2;
        §2.2.4 lets crawlers interpret other records). Common practice reads them as "at least
        N s between requests", "n requests per m s" and "only during this UTC window"; we use
        them only to slow down, never to go faster than the recipe.
        """
        with self._lock:
            state = self._state_locked(host)
            state.hint_interval = max(hints.crawl_delay or 0.0, hints.request_interval or 0.0)
            state.visit_window = hints.visit_window

    def interval(self, host: str) -> float:
        """Current minimum interval between request starts to ``host`` (after hints/slowdown)."""
        with self._lock:
            return self._interval(self._state_locked(host))

    @staticmethod
    def _interval(state: _HostState) -> float:
        base = max(float(state.budget.min_interval), state.hint_interval)
        if state.slowdown > 1.0:
            base = max(base, float(state.budget.backoff_base)) * state.slowdown
        return base

    def effective(self, host: str) -> dict[str, Any]:
        """The budget in force for ``host`` (for the ledger's hosts.effective_budget)."""
        with self._lock:
            state = self._state_locked(host)
            out = asdict(state.budget)
            out["effective_interval"] = self._interval(state)
            out["slowdown"] = state.slowdown
            if state.visit_window:
                out["visit_window_utc"] = [t.isoformat() for t in state.visit_window]
            return out

    # -- scheduling ----------------------------------------------------------------------------
    def next_allowed_at(self, host: str) -> float:
        """Monotonic time (clock.monotonic()) at which ``host`` may next start a request.

        Ignores connection slots (those are taken by :meth:`acquire`); a scheduler can compare
        this with ``clock.monotonic()`` to pick hosts that are ready.
        """
        with self._lock:
            return self._next_at(self._state_locked(host), self.clock.monotonic())

    def wait_time(self, host: str) -> float:
        """Seconds from now until ``host`` may next start a request (0 when ready)."""
        now = self.clock.monotonic()
        return max(0.0, self.next_allowed_at(host) - now)

    def _next_at(self, state: _HostState, now: float) -> float:
        at = state.not_before
        last, answer = state.last_start, state.last_answer
        if last is None or (answer is not None and answer > last):
            last = answer
        if last is not None:
            at = max(at, last + self._interval(state))
        starts = state.starts
        if starts is not None and len(starts) == starts.maxlen:
            # Sliding hour: the oldest of the last N starts must be an hour old.
            at = max(at, starts[0] + HOUR)
        log = state.byte_log
        if log:
            # An entry leaves the hour by its last stamp: its bytes never leave early.
            while log and log[0][1] <= now - HOUR:
                state.byte_total -= log.popleft()[2]
            total = state.byte_total  # a running sum: no walk over an hour of entries
            if total >= state.budget.bytes_per_hour:
                for _, last, n in log:
                    total -= n
                    if total < state.budget.bytes_per_hour:
                        at = max(at, last + HOUR)
                        break
        if state.visit_window is not None:
            at = max(at, now)
            at += self._until_window(state.visit_window, at - now)
        return at

    def _until_window(self, window: tuple[dtime, dtime], ahead: float) -> float:
        """Seconds from (now + ahead) until the UTC visit window is open (0 if it is)."""
        wall = self.clock.time() + ahead
        day = datetime.fromtimestamp(wall, UTC)
        secs = day.hour * 3600 + day.minute * 60 + day.second + day.microsecond / 1e6
        start = window[0].hour * 3600 + window[0].minute * 60
        end = window[1].hour * 3600 + window[1].minute * 60
        inside = start <= secs < end if start <= end else (secs >= start or secs < end)
        if inside:
            return 0.0
        return (start - secs) % 86400.0

    def acquire(self, host: str) -> Slot:
        """Block until ``host`` may start a request; take a connection slot and the start time.

        Sleeps through the injected clock. The caller must ``release()`` the slot (or use it as a
        context manager) when the response is complete.
        """
        state = self._state(host)
        began = self.clock.monotonic()
        # max_connections: other threads may hold every connection slot of this host.
        state.semaphore.acquire()
        try:
            while True:
                with self._lock:
                    now = self.clock.monotonic()
                    at = self._next_at(state, now)
                    if at <= now:
                        state.last_start = now
                        assert state.starts is not None
                        state.starts.append(now)
                        return Slot(self, host, now, now - began)
                self.clock.sleep(at - now)
        except BaseException:
            state.semaphore.release()
            raise

    # -- feedback ------------------------------------------------------------------------------
    def record_answer(self, host: str) -> None:
        """An answer from ``host`` began to arrive now (see :meth:`Slot.answered`)."""
        with self._lock:
            state = self._state_locked(host)
            now = self.clock.monotonic()
            state.last_answer = max(state.last_answer or now, now)

    def contacted(self, host: str, seconds_ago: float) -> None:
        """``host`` was last contacted ``seconds_ago`` (by an earlier run, from the ledger):
        its first request in this run keeps a full interval after that contact. A negative
        value (a moment ahead: the end of the request rows a killed run may not have
        written) counts up to AHEAD_MAX s ahead; a ledger time further ahead (a clock set
        back) counts as now."""
        with self._lock:
            state = self._state_locked(host)
            at = self.clock.monotonic() - (seconds_ago if seconds_ago >= -AHEAD_MAX else 0.0)
            state.last_answer = max(state.last_answer or at, at)

    def record_bytes(self, host: str, count: int) -> None:
        """Count ``count`` response bytes against the host's bytes/hour budget.

        Bytes counted less than BYTE_BUCKET s after an entry began join it and move its last
        stamp to now, so the log holds at most one entry a second (memory flat in the number
        of chunks read) and the hour is counted from the last bytes of each entry: at most
        BYTE_BUCKET s later than byte by byte, never earlier."""
        if count <= 0:
            return
        with self._lock:
            state = self._state_locked(host)
            log = state.byte_log
            assert log is not None
            now = self.clock.monotonic()
            if log and now - log[-1][0] < BYTE_BUCKET:
                first, _, held = log[-1]
                log[-1] = (first, now, held + int(count))
            else:
                log.append((now, now, int(count)))
            state.byte_total += int(count)

    def throttle(self, host: str, until: float | None = None, slow_down: bool = True) -> None:
        """The host said "too many requests" (429/503): push its next start out, slow it down.

        ``until`` is a monotonic time (e.g. from Retry-After). With ``slow_down`` the host's
        interval doubles for the rest of the run, up to MAX_SLOWDOWN (common practice, no
        source: RFC 6585 §4 leaves the client's reaction open).
        """
        with self._lock:
            state = self._state_locked(host)
            if until is not None:
                state.not_before = max(state.not_before, until)
            if slow_down:
                state.slowdown = min(MAX_SLOWDOWN, state.slowdown * 2.0)

    def park(self, host: str, until: float) -> None:
        """Close ``host`` until monotonic time ``until`` (Retry-After over the cap, breaker)."""
        self.throttle(host, until, slow_down=False)
