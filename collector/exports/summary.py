"""What a collection holds and how it was gathered, computed from the ledger alone.

Used at the end of ``gather``, by ``collector status`` (also while a run is going: the ledger is
in WAL mode) and by the dry-run estimate. Pure reads; formatting is plain text.
"""

from __future__ import annotations

import json
import math
from collections import Counter
from dataclasses import dataclass, field
from typing import Any

from collector import sources
from collector.checks.reservations import RESERVATION_REASONS
from collector.config.recipe import Recipe
from collector.errors import CollectorError
from collector.storage import queries
from collector.storage.ledger import Ledger
from collector.urls import host_key

STORED_STATES = ("stored", "near_duplicate")


@dataclass
class HostPoliteness:
    """Requests sent to one host and how the host answered."""

    host: str
    requests: int
    too_many: int  # 429 answers received
    unavailable: int  # 503 answers received
    waited_s: float
    errors: int
    bytes: int


@dataclass
class Summary:
    """Counts by state and reason, bytes, time, politeness, licences and flags."""

    states: Counter[str] = field(default_factory=Counter)
    reasons: Counter[tuple[str, str]] = field(default_factory=Counter)
    files: int = 0
    file_bytes: int = 0
    fetched_bytes: int = 0
    requests: int = 0
    hosts: list[HostPoliteness] = field(default_factory=list)
    licences: Counter[str] = field(default_factory=Counter)
    flags: Counter[str] = field(default_factory=Counter)
    notes: Counter[str] = field(default_factory=Counter)
    runs: int = 0
    last_run: dict[str, Any] | None = None
    run_seconds: float = 0.0  # all runs together
    last_run_seconds: float | None = None
    reservations: queries.ReservationFacts = field(
        default_factory=lambda: queries.ReservationFacts((), (), (), ()))

    @property
    def total_items(self) -> int:
        return sum(self.states.values())


def summarise(ledger: Ledger) -> Summary:
    """Summarise the whole collection from its ledger."""
    t = queries.ledger_totals(ledger)
    s = Summary(files=t.files, file_bytes=t.file_bytes, fetched_bytes=t.fetched_bytes,
                requests=t.requests, runs=t.runs, last_run=t.last_run,
                run_seconds=t.run_seconds, last_run_seconds=t.last_run_seconds)
    for row in t.states:
        s.states[row.state] += row.n
        if row.reason:
            s.reasons[(row.state, row.reason)] += row.n
    s.hosts = [HostPoliteness(h.host or "?", h.requests, h.too_many, h.unavailable,
                              h.waited_s, h.errors, h.bytes) for h in t.hosts]
    s.licences.update(dict(t.licences))
    for flags in t.flag_lists:
        for flag in json.loads(flags):
            s.flags[flag.split(":", 1)[0]] += 1
    s.notes.update(dict(t.notes))
    s.reservations = queries.reservation_facts(ledger, RESERVATION_REASONS)
    return s


def summary_as_dict(s: Summary) -> dict[str, Any]:
    """The summary as JSON-ready data (``collector status --json``)."""
    return {
        "items": s.total_items, "states": dict(s.states),
        "reasons": {f"{state}/{reason}": n for (state, reason), n in s.reasons.items()},
        "files": s.files, "file_bytes": s.file_bytes, "requests": s.requests,
        "fetched_bytes": s.fetched_bytes,
        "hosts": [vars(h) for h in s.hosts], "licences": dict(s.licences),
        "flags": dict(s.flags), "notes": dict(s.notes), "runs": s.runs,
        "run_seconds": round(s.run_seconds, 3), "last_run": s.last_run,
        "last_run_seconds": s.last_run_seconds,
        "reservations": {
            "signals": [{"place": p, "name": n, "meaning": m, "items": c, "excluded": x}
                        for p, n, m, c, x in s.reservations.signals],
            "excluded": {f"{state}/{reason}": n for state, reason, n in s.reservations.excluded},
            "permissions": dict(s.reservations.permissions),
            "tdmrep_files": dict(s.reservations.files)},
    }


def human_bytes(n: float) -> str:
    """1234567 -> '1.2 MB' (decimal units)."""
    for unit in ("B", "kB", "MB", "GB", "TB"):
        if abs(n) < 1000 or unit == "TB":
            return f"{n:.0f} {unit}" if unit == "B" else f"{n:.1f} {unit}"
        n /= 1000
    return f"{n} B"


def human_seconds(seconds: float) -> str:
    """5400 -> '1 h 30 min'."""
    seconds = max(0.0, seconds)
    if seconds < 90:
        return f"{seconds:.0f} s"
    minutes = round(seconds / 60)
    if minutes < 90:
        return f"{minutes} min"
    return f"{minutes // 60} h {minutes % 60:02d} min"


def format_summary(s: Summary) -> list[str]:
    """The summary as plain text lines."""
    runs = f"{s.runs} run" + ("" if s.runs == 1 else "s")
    lines = [f"{s.total_items} items, {s.files} files stored ({human_bytes(s.file_bytes)}), "
             f"{s.requests} requests ({human_bytes(s.fetched_bytes)} received), {runs} "
             f"taking {human_seconds(s.run_seconds)}"]
    if s.last_run:
        lines.append(f"last run: #{s.last_run['id']} started {s.last_run['started_at']}, "
                     f"{human_seconds(s.last_run_seconds or 0)}, {s.last_run['outcome']}")
    lines.append("items by state:")
    for state, n in sorted(s.states.items(), key=lambda kv: -kv[1]):
        reasons = ", ".join(f"{r} {c}" for (st, r), c in sorted(s.reasons.items())
                            if st == state)
        lines.append(f"  {state:<15} {n:>6}" + (f"   ({reasons})" if reasons else ""))
    if s.licences:
        lines.append("licences of stored items: " + ", ".join(
            f"{k} {v}" for k, v in s.licences.most_common()))
    if s.hosts:
        lines.append("politeness per host:")
        for h in s.hosts:
            lines.append(f"  {h.host:<24} {h.requests:>5} requests, {h.too_many} x 429, "
                         f"{h.unavailable} x 503, waited {human_seconds(h.waited_s)}, "
                         f"{h.errors} errors")
    if s.flags:
        lines.append("flags (review before publishing): " + ", ".join(
            f"{k} {v}" for k, v in s.flags.most_common()))
    lines.extend(format_reservations(s.reservations))
    if s.notes:
        lines.append("source notes: " + ", ".join(f"{k} {v}" for k, v in s.notes.items())
                     + "  (see the ledger's notes table)")
    return lines


def format_reservations(r: queries.ReservationFacts) -> list[str]:
    """What status says about reservations against text-and-data mining (none: nothing)."""
    lines: list[str] = []
    if r.signals:
        lines.append("reservation signals seen (items, of which excluded): " + ", ".join(
            f"{place} {name} {meaning} {n}" + (f" ({x})" if x else "")
            for place, name, meaning, n, x in r.signals))
    if r.excluded:
        lines.append("items excluded by reservations: " + ", ".join(
            f"{reason} {n} {state}" for state, reason, n in r.excluded))
    if r.files:
        lines.append("tdmrep.json per host: " + ", ".join(f"{k} {n}" for k, n in r.files))
    for name, reference in r.permissions:
        lines.append(f"gathered despite reservations under permission: {name}: {reference}")
    return lines


@dataclass
class Estimate:
    """How long a run would take at the budgets in force (``gather --dry-run``)."""

    per_host: dict[str, int]
    interval: dict[str, float]
    seconds: float
    unknown_sources: list[str]


def estimate(recipe: Recipe, ledger: Ledger) -> Estimate:
    """Estimate a run from what earlier runs listed: per host, pending items times the
    effective interval; hosts run in parallel, so the slowest host decides."""
    per_host: Counter[str] = Counter()
    for url in queries.pending_image_urls(ledger):
        try:
            per_host[host_key(url)] += 1
        except CollectorError:  # a malformed URL is counted under an unknown host
            per_host["?"] += 1
    listed = queries.listed_source_names(ledger)
    unknown = [s["name"] for s in recipe.sources
               if sources.get_kind(s["kind"]).uses_network and s["name"] not in listed]
    interval: dict[str, float] = {}
    seconds = 0.0
    for host, n in per_host.items():
        budget = recipe.budget_for(host)
        host_row = ledger.get_host(host)
        effective = (host_row or {}).get("effective_budget") or {}
        step = max(float(budget.min_interval), 3600.0 / budget.requests_per_hour,
                   float(effective.get("effective_interval", 0) or 0))
        interval[host] = step
        seconds = max(seconds, n * step / max(1, budget.max_connections))
    return Estimate(dict(per_host), interval, math.ceil(seconds), unknown)


def format_estimate(recipe: Recipe, est: Estimate) -> list[str]:
    """The dry-run report as plain text lines."""
    lines = ["dry run: nothing is requested.", "sources:"]
    for source in recipe.sources:
        lines.append(f"  {source['name']} ({source['kind']})")
    lines.append(f"budget defaults: one request every {recipe.budgets.min_interval:g} s at "
                 f"most, {recipe.budgets.requests_per_hour} per hour, "
                 f"{recipe.budgets.max_connections} connection(s) per host; robots.txt "
                 "Crawl-delay can only slow this down")
    if est.per_host:
        lines.append("candidates waiting per host (from earlier listings):")
        for host, n in sorted(est.per_host.items()):
            lines.append(f"  {host:<24} {n:>6} images, one every {est.interval[host]:g} s "
                         f"-> {human_seconds(n * est.interval[host])}")
        lines.append(f"estimated time for the images already listed: "
                     f"{human_seconds(est.seconds)} (hosts are served in parallel)")
    if est.unknown_sources:
        per_hour = 3600 / max(recipe.budgets.min_interval, 3600 /
                              recipe.budgets.requests_per_hour)
        lines.append(f"not listed yet: {', '.join(est.unknown_sources)}. Their size is unknown "
                     f"until a run lists them; at these budgets one host gives at most "
                     f"{per_hour:.0f} images per hour (20,000 images at one request every 3 s "
                     f"take about 17 h).")
    return lines
