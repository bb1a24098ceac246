"""Politeness bench: does the fetcher keep every host's budget, and how close does it get?

For 1, 10, 50 and 200 loopback hosts (one ThreadingHTTPServer per 127.0.0.x address) the
fetcher downloads a bounded number of small pages per host, one worker thread per host, as a
run's per-host workers do. The servers run in one child process and the client in another, so
the client's CPU time and memory are its own: ``time.process_time`` of the client process (all
its threads, user and system time) and its resident memory (Linux: the peak resident size
``VmHWM`` of ``/proc/self/status`` at the end of the row, reset to the resident size at its
start through ``/proc/self/clear_refs``, so no thread of the measured process wakes to sample
it; "-" where that is not possible). The client writes a ``fetches`` row per request into a real
ledger (a SQLite file in a temporary folder), as every run does; the CPU spent in those writes
is shown on its own too (``record_fetch`` in the request threads: the rows the ledger's batch
thread commits a second later, collector.storage.fetch_batch, count in the total only). The
servers log server-side monotonic timestamps (CLOCK_MONOTONIC is system-wide on Linux, so
they compare across processes).

Printed per row: the per-host budget, achieved per-host rate as % of budget, the worst 1 s
window seen by any host against the budget, violations (hosts whose worst window, shortened by
a 50 ms jitter tolerance, exceeds the budget), aggregate rate, client CPU seconds per 1000
requests and the part of it spent writing the ledger, the same figure for plain
``requests.Session.get`` at the same hosts and pace (no politeness, guard or ledger: what a
script using requests would spend; the fetcher sent through requests, then through urllib3's
pools, and now sends through ``http.client`` with a connection cache of its own,
``collector.fetching.transport``), the client's memory growth over the row
and per host, the smallest gap between two arrivals at one host, and strict violations: hosts
with a sliding 1.0 s window (no tolerance) over the budget or two arrivals closer than 0.98 x
the interval. Below the table, at one host's
pace: the fetcher's transport alone (``Transport.get``, the floor under the fetcher),
http.client alone (the floor under the transport) and, as a reference, urllib3's pool alone
(the transport's previous sender); then the fetcher itself at one host and ten times the pace
(100 req/s), where a request does not start after 100 ms of idle with the processor's caches
cold. Targets: zero violations of either kind, >= 95 % of budget, CPU <= 1.0 s per 1000
requests, memory per host flat in the number of hosts. Whole run takes about 2 minutes.
"""

from __future__ import annotations

import http.client
import itertools
import multiprocessing as mp
import os
import tempfile
import threading
import time
from collections.abc import Callable
from dataclasses import replace
from multiprocessing.connection import Connection
from pathlib import Path
from typing import Any
from urllib.parse import urlsplit

import requests
import urllib3

from collector.demo_site.loopback import LoopbackServer
from collector.demo_site.requestlog import max_in_window  # the same window count the tests use
from collector.fetching.fetcher import KEPT_POOLS, Fetcher, FetchSettings
from collector.fetching.http_target import Target, transport_target
from collector.fetching.transport import Transport
from collector.storage.ledger import Ledger

INTERVAL = 0.1  # s between request starts per host -> budget 10 requests/s
TOLERANCE = 0.05  # s of arrival jitter allowed: half an interval, less than one request
# (hosts, requests per host, interval): 200 hosts at 10 req/s each would ask 2,000 req/s of a
# 2-core machine that also runs the 200 servers; they get 1 req/s each (still 200 req/s).
# One host gets 200 requests (20 s): with 60, the run's one-off first request (robots.txt and a
# new connection, 6-10 ms) was a tenth of the row's CPU, and the figure moved by 0.1-0.15 from
# run to run; a thousand requests, which the target is counted per, carry that cost once.
PLAN = [(1, 200, INTERVAL), (10, 40, INTERVAL), (50, 20, INTERVAL), (200, 8, 1.0)]
FLOOR_REQUESTS = 60  # requests of each floor below the table (the transport, http.client...)
# One host at a ten times faster pace: what the fetcher's own code costs with warm caches.
WARM_REQUESTS, WARM_INTERVAL = 300, 0.01
MIN_GAP_SHARE = 0.98  # strict: no two arrivals at one host closer than 0.98 x the interval
PAGE = os.sysconf("SC_PAGE_SIZE") if hasattr(os, "sysconf") else 4096


def _serve(addresses: list[str], conn: Connection) -> None:
    """Child process: one server per address; on request, send back the logs and stop."""
    servers = []
    for addr in addresses:
        server = LoopbackServer(addr)
        server.route("/robots.txt", (200, b"user-agent: *\nallow: /\n"))
        server.fallback = (200, b"{}")
        servers.append(server)
    conn.send([s.port for s in servers])
    conn.recv()
    for s in servers:
        s.close()
    conn.send({a: [h.mono for h in s.hits] for a, s in zip(addresses, servers, strict=True)})


def _peak_from_now() -> int | None:
    """The resident memory of this process in bytes, with its peak reset to it (Linux 4.0+:
    "5" written to /proc/self/clear_refs), or None where that cannot be done."""
    try:
        with open("/proc/self/clear_refs", "w") as f:
            f.write("5")
    except OSError:
        return None
    return _rss()


def _peak() -> int | None:
    """The peak resident memory of this process since the last reset (VmHWM), in bytes."""
    try:
        with open("/proc/self/status") as f:
            for line in f:
                if line.startswith("VmHWM:"):
                    return int(line.split()[1]) * 1024
    except OSError:
        pass
    return None


def _rss() -> int | None:
    """The resident memory of this process in bytes, or None without /proc."""
    try:
        with open("/proc/self/statm") as f:
            return int(f.read().split()[1]) * PAGE
    except OSError:
        return None


def _timed_writes(ledger: Ledger, spent: list[float]) -> None:
    """Count the CPU time of this thread spent in each ``fetches`` write (thread_time)."""
    write = ledger.record_fetch

    def timed(**fields: Any) -> int:
        t0 = time.thread_time()
        try:
            return write(**fields)
        finally:
            spent.append(time.thread_time() - t0)

    ledger.record_fetch = timed  # type: ignore[method-assign]


def _client(urls: list[str], per_host: int, interval: float, conn: Connection) -> None:
    """Child process: the fetcher, one thread per host, a fresh ledger; sends back figures."""
    settings = FetchSettings.from_recipe({
        "contact": "bench@example.org",
        "budgets": {"min_interval": interval, "requests_per_hour": 1_000_000},
        "network": {"allow_addresses": ["127.0.0.0/8"]},
    })
    with tempfile.TemporaryDirectory() as folder:
        ledger = Ledger.create(Path(folder) / "ledger.sqlite")
        spent: list[float] = []
        _timed_writes(ledger, spent)
        fetcher = Fetcher(settings, ledger)

        def worker(base: str) -> None:
            for i in range(per_host):
                fetcher.get_page(f"{base}/item/{i}")

        rss0 = _peak_from_now()
        cpu0, wall0 = time.process_time(), time.monotonic()
        threads = [threading.Thread(target=worker, args=(u,)) for u in urls]
        for t in threads:
            t.start()
        for t in threads:
            t.join()
        cpu, wall = time.process_time() - cpu0, time.monotonic() - wall0
        peak = _peak() if rss0 is not None else None
        fetcher.close()
        ledger.close()
    growth = None if peak is None or rss0 is None else peak - rss0
    conn.send({"cpu": cpu, "wall": wall, "ledger_cpu": sum(spent), "growth": growth})


def _library_client(urls: list[str], per_host: int, interval: float, conn: Connection) -> None:
    """Child process: the floor under the fetcher's CPU per request at the same hosts and pace.

    Plain ``requests.Session().get`` (as a script would use it, with as many kept connection
    pools as the fetcher), one thread per host: a GET of /robots.txt, then ``per_host`` pages,
    each started ``interval`` after the previous start. No robots.txt rules, budgets, address
    guard, retry policy or ledger. CPU is the whole process's over the same span as the
    fetcher's (``time.process_time``, all threads)."""
    session = requests.Session()
    session.mount("http://", requests.adapters.HTTPAdapter(pool_connections=KEPT_POOLS))

    def worker(base: str) -> None:
        session.get(f"{base}/robots.txt", timeout=10).close()
        last = time.monotonic()
        for i in range(per_host):
            time.sleep(max(0.0, last + interval - time.monotonic()))
            last = time.monotonic()
            session.get(f"{base}/item/{i}", timeout=10).close()

    cpu0 = time.process_time()
    threads = [threading.Thread(target=worker, args=(u,)) for u in urls]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    cpu = time.process_time() - cpu0
    session.close()
    conn.send(cpu)


def _paced_cpu(one: Callable[[int], object], count: int, interval: float) -> float:
    """CPU seconds of ``one(i)`` for i in range(count), each call ``interval`` after the end
    of the one before (a host's pace), the idle time not counted."""
    cpu = 0.0
    for i in range(count):
        time.sleep(interval)
        t0 = time.process_time()
        one(i)
        cpu += time.process_time() - t0
    return cpu


def _plain_alone(url: str, count: int, interval: float, conn: Connection) -> None:
    """Child process: ``count`` GETs of one host at the same pace with http.client alone (the
    standard library the transport sends through): the floor under the transport."""
    parts = urlsplit(url)
    plain = http.client.HTTPConnection(parts.hostname or "", parts.port)

    def one(path: str) -> None:
        plain.request("GET", path)
        plain.getresponse().read()

    one("/robots.txt")  # the connection, as the fetcher's robots.txt opens it
    cpu = _paced_cpu(lambda i: one(f"/item/{i}"), count, interval)
    plain.close()
    conn.send(cpu)


def _transport_alone(url: str, count: int, interval: float, conn: Connection) -> None:
    """Child process: ``count`` GETs of one host at the same pace through the fetcher's
    transport (collector.fetching.transport), called as the fetcher calls it, its targets
    made beforehand (the URL checks are the fetcher's work): the floor under the fetcher."""
    sender = Transport(pools=KEPT_POOLS)
    headers = {"User-Agent": "bench/1 (+bench@example.org)", "Accept-Encoding": "gzip"}
    targets = [transport_target(f"{url}{path}")
               for path in ["/robots.txt", *(f"/item/{i}" for i in range(count))]]
    targets = [replace(target, addresses=(target.host,)) for target in targets]

    def one(target: Target) -> None:
        with sender.get(target, headers, connect_timeout=10.0, read_timeout=30.0) as answer:
            while answer.read1(65536):
                pass

    one(targets[0])
    cpu = _paced_cpu(lambda i: one(targets[i + 1]), count, interval)
    sender.close()
    conn.send(cpu)


def _pool_alone(url: str, count: int, interval: float, conn: Connection) -> None:
    """Child process: ``count`` GETs of one host at the same pace through one urllib3 pool,
    called as collector.fetching.transport called it before it sent through http.client: a
    reference."""
    parts = urlsplit(url)
    pool = urllib3.HTTPConnectionPool(parts.hostname or "", parts.port, maxsize=10)
    pool.urlopen("GET", "/robots.txt", retries=False).read()

    def one(i: int) -> None:
        answer = pool.urlopen("GET", f"/item/{i}", redirect=False, assert_same_host=False,
                              preload_content=False, decode_content=False, retries=False,
                              timeout=urllib3.Timeout(connect=10.0, read=30.0))
        answer.read(decode_content=True)
        answer.release_conn()

    cpu = _paced_cpu(one, count, interval)
    pool.close()
    conn.send(cpu)


def _servers(addresses: list[str]) -> tuple[mp.Process, Connection, list[str]]:
    """Start the child process serving ``addresses``: (process, pipe end, base URLs)."""
    parent, child = mp.Pipe()
    servers = mp.Process(target=_serve, args=(addresses, child), daemon=True)
    servers.start()
    ports = parent.recv()
    return servers, parent, [f"http://{a}:{p}" for a, p in zip(addresses, ports, strict=True)]


def _in_child(target: Any, *args: Any) -> Any:
    """Run ``target(*args, conn)`` in a child process and return what it sends back."""
    mine, theirs = mp.Pipe()
    child = mp.Process(target=target, args=(*args, theirs), daemon=True)
    child.start()
    out = mine.recv()
    child.join(10)
    return out


def library_floor(hosts: int, per_host: int, interval: float) -> float:
    """CPU s per 1000 requests of plain requests.Session.get at ``hosts`` hosts' pace."""
    servers, pipe, urls = _servers([f"127.0.0.{10 + i}" for i in range(hosts)])
    cpu = _in_child(_library_client, urls, per_host, interval)
    pipe.send("stop")
    total = sum(len(stamps) for stamps in pipe.recv().values())
    servers.join(5)
    return 1000 * cpu / total


def plain_floor(count: int, interval: float, alone: Any = _plain_alone) -> float:
    """CPU s per 1000 requests of http.client (or ``alone``) at one host's pace."""
    servers, pipe, urls = _servers(["127.0.0.10"])
    cpu = _in_child(alone, urls[0], count, interval)
    pipe.send("stop")
    pipe.recv()
    servers.join(5)
    return 1000 * cpu / count


def run(hosts: int, per_host: int, interval: float) -> dict[str, Any]:
    budget = round(1 / interval)
    servers, parent, urls = _servers([f"127.0.0.{10 + i}" for i in range(hosts)])
    figures = _in_child(_client, urls, per_host, interval)
    parent.send("stop")
    logs = parent.recv()
    servers.join(5)
    rates, worst, violations, strict, total = [], 0, 0, 0, 0
    gaps: list[float] = []
    for stamps in logs.values():
        stamps.sort()
        total += len(stamps)
        rates.append((len(stamps) - 1) / (stamps[-1] - stamps[0]))
        worst = max(worst, max_in_window(stamps, 1.0))
        gaps.append(min(b - a for a, b in itertools.pairwise(stamps)))
        if max_in_window(stamps, 1.0 - TOLERANCE) > budget:
            violations += 1
        if (max_in_window(stamps, 1.0) > budget
                or gaps[-1] < MIN_GAP_SHARE * interval):
            strict += 1
    growth = figures["growth"]
    return {"hosts": hosts, "budget": budget, "requests": total,
            "achieved": 100 * min(rates) / budget,
            "mean": 100 * sum(rates) / len(rates) / budget, "worst": worst,
            "violations": violations, "strict": strict, "aggregate": total / figures["wall"],
            "wall": figures["wall"], "cpu_per_1000": 1000 * figures["cpu"] / total,
            "ledger_per_1000": 1000 * figures["ledger_cpu"] / total,
            "growth_mib": None if growth is None else growth / 2**20,
            "kib_per_host": None if growth is None else growth / 1024 / hosts,
            "min_gap": min(gaps)}


def _memory(r: dict[str, Any]) -> str:
    if r["growth_mib"] is None:
        return f"{'-':>8} {'-':>8}"
    return f"{r['growth_mib']:>8.1f} {r['kib_per_host']:>8.0f}"


def main() -> None:
    print(f"jitter tolerance of the old count {TOLERANCE * 1000:.0f} ms; strict: sliding 1.0 s "
          f"windows, arrivals >= {MIN_GAP_SHARE} x the interval apart; client CPU and memory "
          "measured in its own process")
    print(f"{'hosts':>5} {'requests':>8} {'achieved min/mean %':>20} {'worst 1 s':>10} "
          f"{'violations':>10} {'agg req/s':>9} {'wall s':>6} {'CPU s/1000':>10} "
          f"{'ledger':>6} {'requests':>8} {'RSS +MiB':>8} {'KiB/host':>8} {'min gap ms':>10} "
          f"{'strict viol.':>12}")
    for hosts, per_host, interval in PLAN:
        r = run(hosts, per_host, interval)
        floor = library_floor(hosts, per_host, interval)
        print(f"{r['hosts']:>5} {r['requests']:>8} {r['achieved']:>9.1f} / {r['mean']:<8.1f} "
              f"{r['worst']:>5}/{r['budget']:<4} {r['violations']:>10} {r['aggregate']:>9.1f} "
              f"{r['wall']:>6.1f} {r['cpu_per_1000']:>10.2f} {r['ledger_per_1000']:>6.2f} "
              f"{floor:>8.2f} {_memory(r)} {1000 * r['min_gap']:>10.1f} {r['strict']:>12}")
    hosts, _, interval = PLAN[0]
    per_host = FLOOR_REQUESTS
    print("requests: CPU s/1000 of plain requests.Session.get at the same hosts and pace (no "
          "robots.txt rules, budget, guard, retries or ledger); at "
          f"{hosts} host, the fetcher's transport alone (under the fetcher): "
          f"{plain_floor(per_host, interval, _transport_alone):.2f}, http.client alone (under "
          f"the transport): {plain_floor(per_host, interval):.2f}, urllib3's pool alone (the "
          f"transport's previous sender, for reference): "
          f"{plain_floor(per_host, interval, _pool_alone):.2f} CPU s/1000")
    warm = run(hosts, WARM_REQUESTS, WARM_INTERVAL)
    print(f"the fetcher at {hosts} host, {round(1 / WARM_INTERVAL)} req/s ({warm['requests']} "
          f"requests, strict violations {warm['strict']}): {warm['cpu_per_1000']:.2f} CPU s/1000 "
          "(the same code with its caches warm: at 10 req/s each request starts after 100 ms "
          "idle, and costs more)")


if __name__ == "__main__":
    main()
