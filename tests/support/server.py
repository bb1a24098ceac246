"""The one loopback server for tests (``demo_site.loopback``, shared with the benches) and
answer helpers for its routes and for ``FakeFetcher`` pages."""

from __future__ import annotations

import json
from collections.abc import Callable, Mapping
from typing import Any

from collector.demo_site.loopback import Answer, Hit, LoopbackServer, Route, query_of, send

__all__ = ["Answer", "Hit", "LoopbackServer", "Route", "html_answer", "json_answer", "on_query",
           "query_of", "send"]


def json_answer(data: Any, status: int = 200, headers: Mapping[str, str] | None = None,
                ) -> Answer:
    """A JSON answer."""
    return status, json.dumps(data).encode(), {"Content-Type": "application/json",
                                                **(headers or {})}


def html_answer(text: str, status: int = 200) -> Answer:
    """An HTML answer (UTF-8)."""
    return status, text.encode("utf-8"), {"Content-Type": "text/html; charset=utf-8"}


def on_query(func: Callable[[dict[str, str]], Answer]) -> Route:
    """A route answering from the request's query parameters alone."""
    return lambda h: func(query_of(h))
