"""What a collection holds and how it was gathered, computed from the ledger alone.

Used at the end of ``gather``, by ``collector status`` (also while a run is going: the ledger is
in WAL mode) and by the dry-run estimate. Pure reads; formatting is plain text.
"""

from __future__ import annotations

import json
import math
from collections import Counter
from dataclasses import dataclass, field
from datetime import datetime
from typing import Any

from collector import sources
from collector.checks.hash_versions import COLOUR_ALGO, HASH_ALGO, WINDOW_ALGO
from collector.checks.reservations import RESERVATION_REASONS
from collector.config.recipe import Recipe
from collector.errors import CollectorError
from collector.storage import datasheet_queries, queries
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
    errors: int  # requests sent that failed (an error status, no answer, a body refused)
    bytes: int
    held_back: int = 0  # never sent: robots.txt, the address guard or a parked host refused


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
    # Requests refused before a host was read from their URL (not http or https, no host, or
    # unsafe to read: the fetches rows without a host); never sent, so no host's row.
    refused_before_host: int = 0
    licences: Counter[str] = field(default_factory=Counter)
    flags: Counter[str] = field(default_factory=Counter)
    notes: Counter[str] = field(default_factory=Counter)
    runs: int = 0
    last_run: dict[str, Any] | None = None
    run_seconds: float = 0.0  # all runs together
    last_run_seconds: float | None = None
    origins: list[queries.FileOrigin] = field(default_factory=list)
    set_aside: Counter[str] = field(default_factory=Counter)  # pixel rule -> files it sets aside
    measured_before: int = 0  # stored files whose facts `collector remeasure` would update
    reservations: datasheet_queries.ReservationFacts = field(
        default_factory=lambda: datasheet_queries.ReservationFacts((), (), (), ()))

    @property
    def total_items(self) -> int:
        return sum(self.states.values())


def summarise(ledger: Ledger) -> Summary:
    """Summarise the whole collection from its ledger."""
    t = queries.ledger_totals(ledger)
    s = Summary(files=t.files, file_bytes=t.file_bytes, fetched_bytes=t.fetched_bytes,
                requests=t.requests, runs=t.runs, last_run=t.last_run,
                run_seconds=t.run_seconds, last_run_seconds=t.last_run_seconds,
                origins=list(t.file_origins))
    for row in t.states:
        s.states[row.state] += row.n
        if row.reason:
            s.reasons[(row.state, row.reason)] += row.n
    s.hosts = [HostPoliteness(h.host, h.requests, h.too_many, h.unavailable,
                              h.waited_s, h.errors, h.bytes, h.held_back) for h in t.hosts
               if h.host is not None]
    s.refused_before_host = sum(h.requests + h.held_back for h in t.hosts if h.host is None)
    s.licences.update(dict(t.licences))
    for flags in t.flag_lists:
        for flag in json.loads(flags):
            s.flags[flag.split(":", 1)[0]] += 1
    s.notes.update(dict(t.notes))
    s.set_aside.update(dict(queries.set_aside_counts(ledger)))
    s.measured_before = queries.files_measured_before(ledger, HASH_ALGO, WINDOW_ALGO,
                                                       COLOUR_ALGO)
    s.reservations = datasheet_queries.reservation_facts(ledger, RESERVATION_REASONS)
    return s


def summary_as_dict(s: Summary) -> dict[str, Any]:
    """The summary as JSON-ready data (``collector status --json``)."""
    return {
        "items": s.total_items, "states": dict(s.states),
        "reasons": {f"{state}/{reason}": n for (state, reason), n in s.reasons.items()},
        "files": s.files, "file_bytes": s.file_bytes, "requests": s.requests,
        "fetched_bytes": s.fetched_bytes,
        "file_origins": [o._asdict() for o in s.origins],
        "hosts": [vars(h) for h in s.hosts], "refused_before_host": s.refused_before_host,
        "licences": dict(s.licences),
        "flags": dict(s.flags), "notes": dict(s.notes), "runs": s.runs,
        "set_aside": dict(s.set_aside), "measured_before": s.measured_before,
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
    lines += files_lines(s)
    if s.set_aside:
        lines.append(f"set aside by pixel rules: {sum(s.set_aside.values()):,} of the "
                     f"{s.files:,} files (" + ", ".join(
                         f"{k} {v}" for k, v in s.set_aside.most_common())
                     + "); kept in the store, left out of releases")
    if s.measured_before:
        lines.append(f"measured by an older collector: {s.measured_before:,} stored files "
                     "(hashes, transparency, crop windows or colour facts); `collector "
                     "remeasure` on this folder brings them up to date, offline")
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
        lines.append("politeness per host (requests sent; failed: sent but ended in an error; "
                     "held back: not sent, refused first by robots.txt or a pause):")
        for h in s.hosts:
            lines.append(f"  {h.host:<24} {plural(h.requests, 'request'):>14}, "
                         f"{h.too_many} x 429, {h.unavailable} x 503, waited "
                         f"{human_seconds(h.waited_s)}, {h.errors} failed"
                         + (f", {h.held_back} held back" if h.held_back else ""))
    if s.refused_before_host:
        lines.append(f"refused before any host: {plural(s.refused_before_host, 'request')} "
                     "whose URL collector would not read a host from (not http or https, no "
                     "host, or unsafe to read; the reasons are in the ledger's fetches table)")
    if s.flags:
        lines.append("flags (review before publishing): " + ", ".join(
            f"{k} {v}" for k, v in s.flags.most_common()))
    lines.extend(format_reservations(s.reservations))
    if s.notes:
        lines.append("source notes: " + ", ".join(f"{k} {v}" for k, v in s.notes.items())
                     + "  (see the ledger's notes table)")
    return lines


def plural(n: int, word: str) -> str:
    """1 request, 2 requests."""
    return f"{n:,} {word}" + ("" if n == 1 else "s")


def files_lines(s: Summary) -> list[str]:
    """Why the files stored differ from the items stored (near duplicates kept are files
    too), and why bytes stored can exceed bytes received (scans and their crops are read from
    a folder, not received)."""
    if not s.files:
        return []
    files: Counter[str] = Counter()
    size: Counter[str] = Counter()
    for o in s.origins:
        files[o.origin] += o.files
        size[o.origin] += o.bytes
    near = sum(o.files for o in s.origins if o.near_kept)
    own = s.files - near - files["unknown"]
    kinds = [f"{own:,} of stored items"] + (
        [f"{near:,} near duplicates kept (near_duplicates = \"keep\")"] if near else []) + (
        [f"{files['unknown']:,} recovered, provenance unknown"] if files["unknown"] else [])
    where = [f"{files['downloaded']:,} downloaded ({human_bytes(size['downloaded'])})"]
    local = files["local"] + files["crop"]
    if local:
        crops = f"; {files['crop']:,} of them crops cut from scans" if files["crop"] else ""
        where.append(f"{local:,} read from local folders, so not received "
                     f"({human_bytes(size['local'] + size['crop'])}{crops})")
    return ["files: " + " + ".join(kinds) + "; " + ", ".join(where)]


def format_reservations(r: datasheet_queries.ReservationFacts) -> list[str]:
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
    connections: dict[str, int] = field(default_factory=dict)
    # Listed image URLs no host can be read from: the run refuses them without a request.
    unreadable: int = 0

    def fits_within(self, seconds: float) -> int:
        """How many of the listed images the hosts can serve in ``seconds`` (each host in
        parallel, at its interval over its connections)."""
        return sum(min(n, int(max(0.0, seconds) * self.connections.get(host, 1)
                              // self.interval[host]))
                   for host, n in self.per_host.items())


def estimate(recipe: Recipe, ledger: Ledger) -> Estimate:
    """Estimate a run from what earlier runs listed: per host, pending items times the
    effective interval; hosts run in parallel, so the slowest host decides."""
    per_host: Counter[str] = Counter()
    unreadable = 0
    for url in queries.pending_image_urls(ledger):
        try:
            per_host[host_key(url)] += 1
        except CollectorError:  # refused before any request: no host's time, counted apart
            unreadable += 1
    listed = queries.listed_source_names(ledger)
    unknown = [s["name"] for s in recipe.sources
               if sources.get_kind(s["kind"]).uses_network and s["name"] not in listed]
    interval: dict[str, float] = {}
    connections: dict[str, int] = {}
    seconds = 0.0
    for host, n in per_host.items():
        budget = recipe.budget_for(host)
        host_row = ledger.get_host(host)
        effective = (host_row or {}).get("effective_budget") or {}
        step = max(float(budget.min_interval), 3600.0 / budget.requests_per_hour,
                   float(effective.get("effective_interval", 0) or 0))
        interval[host] = step
        connections[host] = max(1, budget.max_connections)
        seconds = max(seconds, n * step / connections[host])
    return Estimate(dict(per_host), interval, math.ceil(seconds), unknown, connections,
                    unreadable)


def default_interval(recipe: Recipe) -> float:
    """Seconds between two requests to one host at the recipe's default budget."""
    return max(float(recipe.budgets.min_interval), 3600.0 / recipe.budgets.requests_per_hour)


def format_estimate(recipe: Recipe, est: Estimate, *, deadline: float | None = None,
                    max_items: int = 0, now: float = 0.0) -> list[str]:
    """The dry-run report as plain text lines; ``deadline`` (epoch seconds) and ``max_items``
    are the stop rules a run would have, ``now`` the time they are measured from."""
    lines = ["dry run: nothing is requested.", "sources:"]
    for source in recipe.sources:
        lines.append(f"  {source['name']} ({source['kind']})")
    lines.append(f"budget defaults: one request every {recipe.budgets.min_interval:g} s at "
                 f"most, {recipe.budgets.requests_per_hour} per hour, "
                 f"{plural(recipe.budgets.max_connections, 'connection')} per host; robots.txt "
                 "Crawl-delay can only slow this down")
    if est.per_host:
        lines.append("candidates waiting per host (from earlier listings):")
        for host, n in sorted(est.per_host.items()):
            step = est.interval[host]
            lines.append(f"  {host:<24} {plural(n, 'image'):>13}, one every {step:g} s "
                         f"-> {human_seconds(n * step)}")
        lines.append(f"estimated time for the images already listed: "
                     f"{human_seconds(est.seconds)} (hosts are served in parallel)")
    if est.unreadable:
        lines.append(f"no host: {plural(est.unreadable, 'listed image URL')} from which no "
                     "host can be read (not http or https, or malformed); the run refuses "
                     "them without a request (state failed, reason unsafe_url)")
    if est.unknown_sources:
        step = default_interval(recipe)
        lines.append(f"not listed yet: {', '.join(est.unknown_sources)}. Their size is unknown "
                     f"until a run lists them; at these budgets one host gives at most "
                     f"{3600 / step:,.0f} images per hour (20,000 images at one request every "
                     f"{step:g} s take about {human_seconds(20_000 * step)}).")
    return lines + stop_lines(est, deadline=deadline, max_items=max_items, now=now)


def stop_lines(est: Estimate, *, deadline: float | None, max_items: int,
               now: float) -> list[str]:
    """When a run with these stop rules would stop, and how much of the estimate fits."""
    if deadline is None and not max_items:
        return ["stop: none set; the run goes on until everything listed is done "
                "(--until 07:00, --for 8h or --max-items N set a stop)"]
    lines = []
    if deadline is not None:
        left = max(0.0, deadline - now)
        at = datetime.fromtimestamp(deadline).astimezone().strftime("%Y-%m-%d %H:%M")
        line = f"stop: at {at} local time, in {human_seconds(left)}"
        total = sum(est.per_host.values())
        if total:
            fit = est.fits_within(left)
            everything = ("; the one image already listed fits before then" if total == 1
                          else f"; all {total:,} images already listed fit before then")
            line += everything if fit >= total else (
                f"; about {fit:,} of the {total:,} images already listed fit before then "
                "(the next run resumes with the rest)")
        lines.append(line)
    if max_items:
        lines.append(f"stop: after {max_items:,} newly stored items")
    return lines
