"""The fetcher's settings, read from a recipe: contact and tokens, budgets, timeouts, caps,
the address allowlist and secrets (:class:`FetchSettings`)."""

from __future__ import annotations

import socket
from collections.abc import Callable, Mapping
from dataclasses import asdict, dataclass, field
from typing import Any

from collector import __version__
from collector.fetching.budgets import Budget, budgets_from_recipe
from collector.fetching.robots import ROBOTS_TTL, UNREACHABLE_RETRY


@dataclass(frozen=True)
class FetchSettings:
    """Everything the fetcher needs from the recipe; build with :meth:`from_recipe`."""

    contact: str
    product_token: str = "collector"
    extra_tokens: tuple[str, ...] = ()  # [reservations] robots_tokens: their groups bind too
    budget: Budget = field(default_factory=Budget)
    host_budgets: Mapping[str, Budget] = field(default_factory=dict)
    connect_timeout: float = 10.0
    read_timeout: float = 30.0
    download_deadline: float = 300.0
    max_image_bytes: int = 50_000_000
    max_page_bytes: int = 10_000_000
    allow_addresses: tuple[str, ...] = ()
    secret_params: tuple[str, ...] = ()
    secret_headers: tuple[str, ...] = ("Authorization", "Cookie")
    headers: Mapping[str, str] = field(default_factory=dict)
    max_redirects: int = 10
    max_total_delay: float = 900.0  # s of back-off per request before giving up
    breaker_threshold: int = 5  # consecutive failed attempts that open a host's breaker
    breaker_cooldown: float = 600.0  # s a host stays parked after its breaker opens
    robots_ttl: float = ROBOTS_TTL
    robots_retry: float = UNREACHABLE_RETRY
    resolver: Callable[..., list] = socket.getaddrinfo

    @property
    def user_agent(self) -> str:
        """The User-Agent header: ``collector/<version> (+<contact>)``."""
        return f"collector/{__version__} (+{self.contact})"

    @classmethod
    def from_recipe(cls, recipe: Any, **overrides: Any) -> FetchSettings:
        """Build settings from a :class:`collector.config.recipe.Recipe` or a recipe dict.

        A dict may be the parsed TOML (``budgets.hosts`` nested) or ``Recipe.as_dict()``
        (``"budgets.hosts"`` as a top-level key). ``overrides`` set fields directly (tests).
        """
        if isinstance(recipe, Mapping):
            get = recipe.get
            budgets = dict(get("budgets") or {})
            hosts = budgets.pop("hosts", None) or get("budgets.hosts") or {}
            network = dict(get("network") or {})
            contact, token = get("contact", ""), get("product_token") or "collector"
            extra = tuple((get("reservations") or {}).get("robots_tokens") or ())
        else:
            budgets = asdict(recipe.budgets)
            hosts = dict(recipe.host_budgets)
            network = asdict(recipe.network)
            contact, token = recipe.contact, recipe.product_token or "collector"
            extra = tuple(recipe.reservations.robots_tokens)
        default, per_host = budgets_from_recipe({**budgets, "hosts": hosts})
        values: dict[str, Any] = {
            "contact": contact, "product_token": token, "extra_tokens": extra, "budget": default,
            "host_budgets": per_host,
        }
        for key in ("connect_timeout", "read_timeout", "download_deadline", "max_image_bytes",
                    "max_page_bytes"):
            if key in network:
                values[key] = network[key]
        for key in ("allow_addresses", "secret_params", "secret_headers"):
            if key in network:
                values[key] = tuple(network[key])
        if "headers" in network:
            values["headers"] = dict(network["headers"])
        values.update(overrides)
        return cls(**values)
