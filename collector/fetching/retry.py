"""When an attempt is retried and how long the fetcher waits first.

An attempt that failed in a way worth retrying raises :class:`Retryable` (a connection error,
a timeout, 429 or a temporary 5xx). :func:`retry_policy` is the tenacity policy around the
attempts of one request: at most ``attempts`` tries and at most ``max_total_delay`` seconds of
waiting, each wait being the server's Retry-After or exponential back-off with full jitter.
"""

from __future__ import annotations

import random
import threading
from collections.abc import Callable
from typing import Any, TypeVar

from tenacity import Retrying, retry_if_exception_type, stop_after_attempt, stop_any
from tenacity.stop import stop_base
from tenacity.wait import wait_base

from collector.fetching.budgets import Budget

T = TypeVar("T")


class Retryable(Exception):
    """One attempt failed in a way worth retrying."""

    def __init__(self, reason: str, status: int | None, detail: str,
                 retry_after: float | None = None) -> None:
        super().__init__(detail)
        self.reason, self.status, self.detail = reason, status, detail
        self.retry_after = retry_after


class StopAfterWaiting(stop_base):
    """Stop retrying once the waits so far plus the next one would pass ``limit`` seconds."""

    def __init__(self, limit: float) -> None:
        self.limit = limit

    def __call__(self, retry_state: Any) -> bool:
        return bool(retry_state.idle_for + retry_state.upcoming_sleep > self.limit)


class BackoffWait(wait_base):
    """Retry-After when the server gave one, else exponential back-off with full jitter."""

    def __init__(self, budget: Budget, rng: random.Random) -> None:
        self.budget, self.rng = budget, rng

    def __call__(self, retry_state: Any) -> float:
        exc = retry_state.outcome.exception() if retry_state.outcome else None
        if isinstance(exc, Retryable) and exc.retry_after is not None:
            return exc.retry_after  # RFC 9110 §10.2.3, honoured exactly
        # Full jitter: uniform in [0, min(cap, base * 2^(n-1))] (common practice, no source).
        ceiling = min(self.budget.backoff_max,
                      self.budget.backoff_base * 2 ** (retry_state.attempt_number - 1))
        return self.rng.uniform(0.0, ceiling)


def retry_policy(attempts: int, max_total_delay: float, budget: Budget, rng: random.Random,
                 sleep: Callable[[float], None]) -> Retrying:
    """The tenacity policy for one request; the last Retryable is re-raised when it gives up."""
    return Retrying(
        stop=stop_any(stop_after_attempt(attempts), StopAfterWaiting(max_total_delay)),
        wait=BackoffWait(budget, rng),
        retry=retry_if_exception_type(Retryable),
        sleep=sleep,
        reraise=True,
    )


class RetryPolicies:
    """The fetcher's policies, one per (attempts, budget), built once and shared by its
    threads. tenacity keeps the state of each call per thread (``threading.local``), and no
    attempt makes another request, so a thread never re-enters a policy it is running. A
    policy built for every request left about 16 objects in reference cycles per request for
    the garbage collector to find (bench/politeness.py)."""

    def __init__(self, max_total_delay: float, rng: random.Random,
                 sleep: Callable[[float], None]) -> None:
        self.max_total_delay, self.rng, self.sleep = max_total_delay, rng, sleep
        self._lock = threading.Lock()
        self._made: dict[tuple[int, Budget], Retrying] = {}

    def get(self, attempts: int, budget: Budget) -> Retrying:
        """The policy for ``attempts`` tries under ``budget`` (made on first use)."""
        with self._lock:
            policy = self._made.get((attempts, budget))
            if policy is None:
                policy = retry_policy(attempts, self.max_total_delay, budget, self.rng,
                                      self.sleep)
                self._made[(attempts, budget)] = policy
            return policy


def first_then_retried(attempt: Callable[[], T], policy: Retrying) -> T:
    """``policy(attempt)``, with the first attempt made before tenacity is entered: most
    requests succeed at once, and the policy's bookkeeping was a few per cent of a request's
    CPU (bench/politeness.py). After a Retryable first attempt the policy starts from that same
    failure (replayed, no request made), so its attempt count, stop rules and waits are exactly
    those of ``policy(attempt)``; any other exception passes through as it does there."""
    try:
        return attempt()
    except Retryable as exc:
        first = [exc]

    def again() -> T:
        if first:
            raise first.pop()
        return attempt()

    return policy(again)
