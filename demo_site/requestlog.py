"""Counting a server's request log: the busiest window of request start times.

Shared by the politeness tests and ``bench/politeness.py`` so both judge a host's rate the
same way, from server-side ``time.monotonic()`` stamps (``demo_site.server.RequestRecord.t``,
``demo_site.loopback.Hit.mono``).
"""

from __future__ import annotations

from collections.abc import Iterable


def max_in_window(stamps: Iterable[float], window: float) -> int:
    """Largest number of stamps inside any half-open window [t, t + window)."""
    ordered = sorted(stamps)
    best, j = 0, 0
    for i, start in enumerate(ordered):
        while j < len(ordered) and ordered[j] < start + window:
            j += 1
        best = max(best, j - i)
    return best
