"""The one polite fetcher: every request of a run (robots.txt, API and HTML pages, images).

For each URL, and again for each redirect hop (followed by hand, at most 10):

1. the URL must be http/https and its host must resolve to addresses the recipe allows;
2. robots.txt of that authority must allow it (fetched once per scheme+host+port, kept 24 h,
   persisted in the ledger's ``hosts`` table);
3. the contacted host's budget must allow a request start (:mod:`collector.fetching.budgets`);
4. the request is sent, retried with tenacity on connection errors, timeouts, 429 and 5xx
   (honouring Retry-After; :mod:`collector.fetching.retry`), and every attempt becomes a
   ``fetches`` row with a redacted URL.

Bodies are streamed with a byte cap on decoded bytes and an overall deadline
(:mod:`collector.fetching.body`). Errors raised are
:class:`collector.errors.FetchError` subclasses whose messages carry only redacted URLs.

Requests are sent by :mod:`collector.fetching.transport` (the standard library's
``http.client``, with a keep-alive connection cache of its own).

DNS rebinding: the address check resolves the name just before each request, and the
transport connects to the addresses that were checked, never to a second answer for the name.
"""

from __future__ import annotations

import logging
import random
import threading
from collections.abc import Callable, Iterable, Mapping
from dataclasses import dataclass, replace
from pathlib import Path
from typing import Any
from urllib.parse import urljoin

from requests.structures import CaseInsensitiveDict

from collector.errors import (
    DownloadTimeout,
    FetchError,
    HostParked,
    RobotsDenied,
    TooLarge,
    UnsafeURL,
)
from collector.fetching.answers import (
    REDIRECT_STATUSES,
    RETRY_STATUSES,
    SLOW_DOWN_STATUSES,
    Download,
    Page,
    parse_retry_after,
)
from collector.fetching.body import Body, exc_size, read_body
from collector.fetching.budgets import SYSTEM_CLOCK, Clock, HostBudgets
from collector.fetching.http_target import Target, transport_target
from collector.fetching.kept_pages import keep_answer, kept_answer
from collector.fetching.retry import Retryable, RetryPolicies, first_then_retried
from collector.fetching.robots import (
    MAX_ROBOTS_BYTES,
    MAX_ROBOTS_REDIRECTS,
    RobotsPolicy,
    Verdict,
    policy_from_fetch,
    policy_from_stored,
)
from collector.fetching.settings import FetchSettings  # also the fetcher's import path
from collector.fetching.transport import Answer, Transport, TransportError, TransportTimeout
from collector.safe_text import valid_unicode
from collector.schema import expand_env
from collector.storage.row_codec import epoch_of, iso_time
from collector.urls import (
    MIN_SECRET_LEN,
    add_params,
    check_address,
    header_secrets,
    host_key,
    is_secret_header,
    parse_allow_list,
    redact,
    robots_url,
    scrub,
    secret_values,
)

log = logging.getLogger(__name__)

PERSISTED_PARK_MAX = 86_400.0  # seconds a parking outlives the run that saw it
# Connection pools kept, one per host: with more hosts in turn, each request closed the least
# recently used pool and connected anew. 256 sockets fit a 1,024-descriptor limit.
KEPT_POOLS = 256


@dataclass
class _Result:
    url: str
    status: int
    headers: CaseInsensitiveDict
    body: Body
    encoding: str | None


def filled_from_env(values: Mapping[str, Any], url: str,
                    secrets: Iterable[str]) -> dict[str, Any]:
    """values (query parameters or headers) with each "${NAME}" filled from the environment.

    The one place collector expands ``${NAME}``: right before a request is sent, so expanded
    secrets never sit in a recipe, a source table or the ledger. An unset variable stops the
    request before anything is sent (gather names them all before it starts, see
    collector.config.recipe_env.env_problems).
    """
    try:
        return {k: expand_env(v, strict=True) if isinstance(v, str) else v
                for k, v in values.items()}
    except KeyError as exc:
        name = exc.args[0]
        raise FetchError(redact(url, secrets), "unset_variable", None,
                         f"the recipe refers to ${{{name}}}, but the environment variable "
                         f"{name} is not set; set it and run again") from None

class Fetcher:
    """The polite fetcher. Thread-safe: one instance serves the whole worker pool."""

    def __init__(self, settings: FetchSettings, ledger: Any | None, *,
                 clock: Clock = SYSTEM_CLOCK, transport: Transport | None = None,
                 run_id: int | None = None, rng: random.Random | None = None) -> None:
        self.settings = settings
        self.ledger = ledger
        self.clock = clock
        self.run_id = run_id
        self.rng = rng or random.Random()
        self._policies = RetryPolicies(settings.max_total_delay, self.rng, clock.sleep)
        self.budgets = HostBudgets(settings.budget, settings.host_budgets, clock=clock)
        self._allowed = parse_allow_list(settings.allow_addresses)
        # An IP-literal host's check depends on nothing but the host and the allowlist: its
        # address, once allowed, is kept (names are resolved and checked on every request).
        self._allowed_literals: dict[str, tuple[str, ...]] = {}
        self._addresses: dict[str, str] = {}  # host name -> the address last connected to
        self._secret_names: dict[str, bool] = {}  # header name -> is_secret_header
        # The recipe's headers when none refers to ${NAME} (nothing to fill in): the headers
        # a request without headers of its own sends, and their secret parts, made once.
        self._plain_headers: Mapping[str, str] | None = None
        if not any("${" in str(v) for v in settings.headers.values()):
            self._plain_headers = dict(settings.headers)
            sent = self._sent_headers(self._plain_headers)
            self._plain_sent = (sent, self._header_secrets(sent))
        self._own_transport = transport is None
        self.transport = transport or Transport(pools=KEPT_POOLS)
        self._lock = threading.Lock()
        self._robots: dict[str, RobotsPolicy] = {}
        self._robots_locks: dict[str, threading.Lock] = {}
        self._parked: dict[str, float] = {}  # host -> epoch until
        self._failures: dict[str, int] = {}
        self._seen_hosts: set[str] = set()
        # Called with (host key, URL, purpose) before each request and redirect hop;
        # it may raise to stop there (a cluster task keeps to its one host: run/cluster_task).
        self.host_check: Callable[[str, str, str], None] | None = None

    # -- public API ----------------------------------------------------------------------------
    def get_page(self, url: str, *, purpose: str = "listing", item_id: int | None = None,
                 params: Mapping[str, Any] | None = None,
                 headers: Mapping[str, str] | None = None,
                 secret_params: Iterable[str] = (), max_bytes: int | None = None,
                 keep_for: float = 0.0) -> Page:
        """GET a page (JSON/HTML) politely; raises FetchError unless the final status is 2xx.
        ``max_bytes`` caps the body below ``max_page_bytes`` (small files such as tdmrep.json).
        ``keep_for`` (seconds): a 2xx answer is kept in the ledger and given again, with no
        request, until it is that old (a IIIF service's info.json across runs)."""
        secrets = (*self.settings.secret_params, *secret_params)
        if params:
            params = filled_from_env(params, url, secrets)
        full = add_params(url, params)
        kept = kept_answer(self.ledger, full, keep_for, self.clock.time())
        if kept is not None:
            return kept
        result = self._fetch(full, purpose=purpose, item_id=item_id, headers=headers or {},
                             secret_params=secrets,
                             max_bytes=min(max_bytes or self.settings.max_page_bytes,
                                           self.settings.max_page_bytes))
        if not 200 <= result.status < 300:
            raise FetchError(redact(result.url, secrets), f"http_{result.status}", result.status)
        page = Page(result.url, result.status, result.headers, result.body.data or b"",
                    result.encoding)
        if keep_for > 0 and not secrets:  # a page asked with a secret is never kept
            keep_answer(self.ledger, full, page, self.clock.time())
        return page

    def download(self, url: str, dest_dir: Path, *, item_id: int | None = None,
                 etag: str | None = None, last_modified: str | None = None,
                 secret_params: Iterable[str] = ()) -> Download:
        """Stream ``url`` into a temp file in ``dest_dir``; 304 with ``not_modified=True``."""
        secrets = (*self.settings.secret_params, *secret_params)
        cond: dict[str, str] = {}
        if etag:
            cond["If-None-Match"] = etag  # RFC 9110 §13.1.2
        if last_modified:
            # RFC 9110 §13.1.3: ignored by the server when If-None-Match is present; harmless.
            cond["If-Modified-Since"] = last_modified
        result = self._fetch(url, purpose="image", item_id=item_id, headers=cond,
                             secret_params=secrets, max_bytes=self.settings.max_image_bytes,
                             dest_dir=Path(dest_dir))
        hdr = result.headers
        if result.status == 304:  # RFC 9110 §15.4.5: not modified, no content
            return Download(url, result.url, 304, None, None, 0, hdr.get("Content-Type"),
                            hdr.get("ETag") or etag, hdr.get("Last-Modified") or last_modified,
                            not_modified=True)
        if not 200 <= result.status < 300:
            if result.body.path is not None:
                result.body.path.unlink(missing_ok=True)
            raise FetchError(redact(result.url, secrets), f"http_{result.status}", result.status)
        return Download(url, result.url, result.status, result.body.path, result.body.sha256,
                        result.body.size, hdr.get("Content-Type"), hdr.get("ETag"),
                        hdr.get("Last-Modified"), headers=hdr)

    def robots_verdict(self, url: str) -> Verdict:
        """What robots.txt says about ``url`` (fetching robots.txt politely if needed)."""
        return self._robots_policy(url).verdict(url, self.settings.product_token)

    def close(self) -> None:
        """Close the kept connections if this fetcher made its transport."""
        if self._own_transport:
            self.transport.close()

    # -- the pipeline --------------------------------------------------------------------------
    def _fetch(self, url: str, *, purpose: str, item_id: int | None,
               headers: Mapping[str, str], secret_params: Iterable[str], max_bytes: int,
               dest_dir: Path | None = None, robots: bool = False) -> _Result:
        secret_params = tuple(secret_params)
        if headers or self._plain_headers is None:
            headers = filled_from_env({**self.settings.headers, **headers}, url, secret_params)
        else:
            headers = self._plain_headers
        max_hops = MAX_ROBOTS_REDIRECTS if robots else self.settings.max_redirects
        current = url
        hops = 0
        while True:
            shown, _ = valid_unicode(redact(current, secret_params))  # what the ledger keeps
            row = {"purpose": purpose, "item_id": item_id, "url": shown}
            try:
                target = transport_target(current, shown)
                hk = host_key(current)
                row["host"] = hk
                target = replace(target, addresses=self._checked_addresses(target, shown))
            except UnsafeURL as exc:
                self._record(row, attempt=0, error=str(exc))
                raise
            if self.host_check is not None:
                self.host_check(hk, current, purpose)
            self._first_contact(hk)
            if robots:
                verdict = Verdict(True, "implicit", None)  # RFC 9309 §2.2.2
            else:
                verdict, by = self._robots_policy(current).binding_verdict(
                    current, self.settings.product_token, self.settings.extra_tokens)
                if not verdict.allowed:
                    rule = (verdict.rule or "unreachable") + (f" (for {by})" if by else "")
                    reason = ("robots_unreachable" if verdict.verdict == "unreachable"
                              else "robots_token_disallowed" if by else "robots_disallowed")
                    self._record(row, attempt=0, robots_verdict=verdict.verdict,
                                 robots_rule=verdict.rule, error=reason)
                    raise RobotsDenied(shown, rule, reason)
            self._check_parked(hk, shown, row)
            result = self._attempts(current, target, shown, hk, row, verdict, headers,
                                    secret_params, max_bytes, dest_dir, retry=not robots)
            location = result.headers.get("Location")
            if result.status not in REDIRECT_STATUSES or not location:
                return result
            if hops >= max_hops:
                if robots:
                    return result  # RFC 9309 §2.3.1.2: more than 5 -> unavailable
                raise FetchError(shown, "redirect_blocked", result.status,
                                 f"more than {max_hops} redirects")
            hops += 1
            try:
                current = urljoin(current, location)
            except ValueError:
                current = location  # malformed: transport_target refuses it with its reason

    def _attempts(self, url: str, target: Target, shown: str, hk: str, row: dict[str, Any],
                  verdict: Verdict, headers: Mapping[str, str],
                  secret_params: tuple[str, ...], max_bytes: int, dest_dir: Path | None,
                  retry: bool) -> _Result:
        budget = self.budgets.budget_for(hk)
        attempts = max(1, int(budget.max_attempts)) if retry else 1
        # Secret values in the URL: those of the secret parameters and a password.
        secrets = secret_values(url, secret_params) if secret_params or "@" in url else []
        counter = [0]

        def one() -> _Result:
            counter[0] += 1
            return self._attempt(url, target, shown, hk, row, verdict, headers, secrets,
                                 max_bytes, dest_dir, counter[0], final=counter[0] >= attempts,
                                 truncate=not retry)

        try:
            return first_then_retried(one, self._policies.get(attempts, budget))
        except Retryable as exc:
            # Retries are used up: one more failed request for the host's circuit breaker.
            self._failed(hk, shown)
            if not retry and exc.status is None:
                raise
            raise FetchError(shown, exc.reason, exc.status, exc.detail) from None

    def _attempt(self, url: str, target: Target, shown: str, hk: str, row: dict[str, Any],
                 verdict: Verdict, headers: Mapping[str, str], secrets: list[str], max_bytes: int,
                 dest_dir: Path | None, attempt: int, final: bool, truncate: bool) -> _Result:
        if headers is self._plain_headers:
            send_headers, header_parts = self._plain_sent
        else:
            send_headers = self._sent_headers(headers)
            header_parts = self._header_secrets(send_headers)
        all_secrets = secrets + header_parts
        base = {**row, "attempt": attempt, "robots_verdict": verdict.verdict,
                "robots_rule": verdict.rule}
        slot = self.budgets.acquire(hk)
        started = self.clock.time()
        base.update(started_at=iso_time(started), waited_s=round(slot.waited, 3))
        try:
            try:
                # target is the URL exactly as transport_target checked it (http_target.py)
                # and its address the one check_address checked (no second DNS answer)
                resp = self.transport.get(target, send_headers,
                                          connect_timeout=self.settings.connect_timeout,
                                          read_timeout=self.settings.read_timeout)
                slot.answered()  # status line and headers are in: the next start counts from here
                if resp.address is not None:
                    self._addresses[target.host] = resp.address
            except TransportError as exc:
                reason = "timeout" if isinstance(exc, TransportTimeout) else "connection"
                detail = scrub(str(exc), all_secrets)
                self._record(base, error=f"{reason}: {detail}", ended=True)
                raise Retryable(reason, None, detail) from None
            except (ValueError, UnicodeError) as exc:
                # Not a network failure: the HTTP library could not handle this exchange (a
                # header it cannot encode or parse). One item fails; retrying would not help.
                detail = scrub(f"the HTTP library refused the exchange ({type(exc).__name__}: "
                               f"{exc})", all_secrets)
                self._record(base, error=f"connection: {detail}", ended=True)
                raise FetchError(shown, "connection", None, detail) from None
            with resp:
                return self._handle(resp, url, shown, hk, base, max_bytes, dest_dir,
                                    all_secrets, slot, truncate)
        finally:
            slot.release()

    def _handle(self, resp: Answer, url: str, shown: str, hk: str,
                base: dict[str, Any], max_bytes: int, dest_dir: Path | None,
                secrets: list[str], slot: Any, truncate: bool) -> _Result:
        status = resp.status_code
        hdr = resp.headers
        meta = {"status": status, "etag": hdr.get("ETag"),
                "last_modified": hdr.get("Last-Modified"),
                "content_type": hdr.get("Content-Type")}
        if status in RETRY_STATUSES:
            wait, note = parse_retry_after(hdr.get("Retry-After"), self.clock.time())
            now_mono = self.clock.monotonic()
            if status in SLOW_DOWN_STATUSES or wait is not None:
                self.budgets.throttle(hk, now_mono + wait if wait is not None else None,
                                      slow_down=status in SLOW_DOWN_STATUSES)
                if self.ledger is not None:  # the ledger shows the budget actually in force
                    self.ledger.put_host(hk, effective_budget=self.budgets.effective(hk))
            error = f"http_{status}" + (f"; {note}" if note else "")
            if wait is not None:
                error += f"; Retry-After {wait:g} s"
            self._record({**base, **meta}, error=error, ended=True)
            budget = self.budgets.budget_for(hk)
            if wait is not None and wait > budget.max_retry_after:
                until = self.clock.time() + wait
                self._park(hk, until, now_mono + wait)
                raise HostParked(shown, hk, until,
                                 f"Retry-After {wait:g} s is over the {budget.max_retry_after:g}"
                                 " s cap (budgets.max_retry_after)")
            raise Retryable(f"http_{status}", status, error, wait)
        body = Body()
        if status not in REDIRECT_STATUSES and status != 304:
            try:
                body = read_body(resp, shown=shown, max_bytes=max_bytes, dest_dir=dest_dir,
                                 slot=slot, truncate=truncate, clock=self.clock,
                                 deadline_s=self.settings.download_deadline)
            except (TooLarge, DownloadTimeout) as exc:
                self._record({**base, **meta}, error=str(exc), ended=True, size=exc_size(exc))
                raise
            except Retryable as exc:
                exc.detail = scrub(exc.detail, secrets)
                self._record({**base, **meta}, error=exc.detail, ended=True)
                raise
        self._record({**base, **meta}, ended=True, size=body.size)
        self._succeeded(hk)
        return _Result(url, status, hdr, body, resp.encoding if "charset" in
                       (hdr.get("Content-Type") or "").lower() else None)

    def _checked_addresses(self, target: Target, shown: str) -> tuple[str, ...]:
        """The addresses to connect to for ``target``, in the order to try: its host's
        addresses, all checked against the allowlist (:func:`collector.urls.check_address`,
        UnsafeURL when one is refused), in the resolver's order, but the one last connected
        to first while it is among them (a DNS server rotating its answers does not cost the
        archive a new connection per request; robots.txt goes where the page will go)."""
        known = self._allowed_literals.get(target.host)
        if known is not None:
            return known
        checked = tuple(str(a) for a in check_address(target.host, target.port, self._allowed,
                                                      self.settings.resolver, shown))
        if checked == (target.host,):  # an IP literal (a name never equals its address)
            self._allowed_literals[target.host] = checked
            return checked
        last = self._addresses.get(target.host)
        if last in checked:
            return (last, *(a for a in checked if a != last))
        self._addresses[target.host] = checked[0]  # until an answer says which one took it
        return checked

    def _sent_headers(self, headers: Mapping[str, str]) -> dict[str, str]:
        """Our User-Agent and Accept-Encoding, then the recipe's headers and this request's
        (filled by _fetch)."""
        return {"User-Agent": self.settings.user_agent, "Accept-Encoding": "gzip", **headers}

    def _header_secrets(self, headers: Mapping[str, str]) -> list[str]:
        """The secret parts of the secret headers' values (hidden in errors)."""
        return [part for k, v in headers.items() if self._is_secret_header(k)
                for part in header_secrets(str(v)) if len(part) >= MIN_SECRET_LEN]

    def _is_secret_header(self, name: str) -> bool:
        known = self._secret_names.get(name)
        if known is None:
            known = self._secret_names[name] = is_secret_header(
                name, self.settings.secret_headers)
        return known

    # -- robots.txt ----------------------------------------------------------------------------
    def _robots_policy(self, url: str) -> RobotsPolicy:
        target = robots_url(url)
        now = self.clock.time()
        cached = self._robots.get(target)  # a fresh policy needs no lock (it is replaced whole)
        if cached is not None and cached.is_fresh(now, self.settings.robots_ttl,
                                                  self.settings.robots_retry):
            return cached
        with self._lock:
            lock = self._robots_locks.setdefault(target, threading.Lock())
        with lock:  # one fetch per authority even with many workers
            now = self.clock.time()
            cached = self._robots.get(target)
            if cached is not None and cached.is_fresh(now, self.settings.robots_ttl,
                                                      self.settings.robots_retry):
                return cached
            hk = host_key(url)
            if cached is None and self.ledger is not None:
                stored = self._stored_policy(hk, target)
                if stored is not None and stored.is_fresh(now, self.settings.robots_ttl,
                                                          self.settings.robots_retry):
                    self._use_policy(target, hk, stored)
                    return stored
            policy = self._fetch_robots(target)
            self._use_policy(target, hk, policy)
            if self.ledger is not None:
                self.ledger.put_host(
                    hk, robots_url=target, robots_fetched_at=iso_time(policy.fetched_at),
                    robots_status=policy.status, robots_sha256=policy.sha256,
                    robots_body=policy.body if policy.body else None,
                    effective_budget=self.budgets.effective(hk))
            return policy

    def _use_policy(self, target: str, hk: str, policy: RobotsPolicy) -> None:
        # Hints first: a thread that finds the policy without the lock paces by its hints.
        self.budgets.apply_hints(hk, policy.hints(self.settings.product_token))
        self._robots[target] = policy

    def _stored_policy(self, hk: str, target: str) -> RobotsPolicy | None:
        row = self.ledger.get_host(hk) if self.ledger is not None else None
        if not row or row.get("robots_url") != target or not row.get("robots_fetched_at"):
            return None
        fetched = epoch_of(row["robots_fetched_at"])
        if fetched is None:
            return None
        return policy_from_stored(row.get("robots_status"), row.get("robots_body"), fetched,
                                  row.get("robots_sha256"))

    def _fetch_robots(self, target: str) -> RobotsPolicy:
        """Fetch robots.txt once (no retries: 5xx/unreachable means disallow, retried later)."""
        fetched_at = self.clock.time()
        try:
            result = self._fetch(target, purpose="robots", item_id=None, headers={},
                                 secret_params=(), max_bytes=MAX_ROBOTS_BYTES, robots=True)
        except HostParked:
            raise
        except (FetchError, Retryable) as exc:
            # A final 429 is "unavailable" (§2.3.1.3); 5xx, a network error or an unsafe
            # redirect is "unreachable" -> complete disallow (§2.3.1.4). classify_status decides.
            status = getattr(exc, "status", None)
            return policy_from_fetch(status if isinstance(exc, Retryable) or
                                     exc.reason.startswith("http_") else None, b"", fetched_at)
        return policy_from_fetch(result.status, result.body.data or b"", fetched_at)

    # -- failures, parking ---------------------------------------------------------------------
    def _first_contact(self, hk: str) -> None:
        """Load a host's persisted parking (a resumed run keeps honouring it) and its last
        contact (the first request keeps a full interval after it)."""
        with self._lock:
            if hk in self._seen_hosts:
                return
            self._seen_hosts.add(hk)
        if self.ledger is None:
            return
        last = self.ledger.last_contact(hk)
        ended = epoch_of(last)
        if ended is not None:  # a resumed run: a full interval after the last contact
            self.budgets.contacted(hk, self.clock.time() - ended)
        row = self.ledger.get_host(hk)
        until = (row or {}).get("parked_until")
        if until and until > self.clock.time():
            self._park(hk, float(until), self.clock.monotonic() + until - self.clock.time(),
                       persist=False)

    def _check_parked(self, hk: str, shown: str, row: dict[str, Any]) -> None:
        with self._lock:
            until = self._parked.get(hk)
        if until is not None and until > self.clock.time():
            self._record(row, attempt=0, error="host_parked")
            raise HostParked(shown, hk, until, "parked earlier in this run; try it later")

    def _park(self, hk: str, until: float, until_mono: float, persist: bool = True) -> None:
        with self._lock:
            self._parked[hk] = max(until, self._parked.get(hk, 0.0))
            failures = self._failures.get(hk, 0)
        self.budgets.park(hk, until_mono)
        if persist and self.ledger is not None:
            # Later runs honour the parking too, but for a day at most: a server that says
            # "come back in ten years" is wrong more often than it means it.
            stored = min(until, self.clock.time() + PERSISTED_PARK_MAX)
            self.ledger.put_host(hk, parked_until=stored, failures=failures)

    def _failed(self, hk: str, shown: str) -> None:
        """Count a failed request (retries used up); at the threshold the breaker opens."""
        with self._lock:
            count = self._failures.get(hk, 0) + 1
            self._failures[hk] = count
        if count >= self.settings.breaker_threshold:
            cooldown = self.settings.breaker_cooldown
            until = self.clock.time() + cooldown
            self._park(hk, until, self.clock.monotonic() + cooldown)
            with self._lock:
                self._failures[hk] = 0  # half-open after the cooldown
            raise HostParked(shown, hk, until,
                             f"{count} consecutive failures; retrying after {cooldown:g} s")

    def _succeeded(self, hk: str) -> None:
        with self._lock:
            self._failures[hk] = 0

    # -- ledger --------------------------------------------------------------------------------
    def _record(self, row: dict[str, Any], *, attempt: int | None = None,
                error: str | None = None, ended: bool = False, size: int | None = None,
                **extra: Any) -> None:
        if self.ledger is None:
            return
        now = iso_time(self.clock.time())
        fields = {**row, **extra, "run_id": self.run_id, "error": error}
        if attempt is not None:
            fields["attempt"] = attempt
        fields.setdefault("started_at", now)
        if ended or attempt == 0:
            fields["ended_at"] = now
        if size is not None:
            fields["bytes"] = size
        # A 304 answers a conditional request: the copy we hold is current (RFC 9110 15.4.5).
        fields["from_cache"] = int(fields.get("status") == 304)
        self.ledger.record_fetch(**fields)

