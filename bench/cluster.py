"""Cluster bench: a local Dask cluster of 2 worker processes fetches from 40 loopback hosts at
5 requests/s each, once undisturbed and once with a worker killed (SIGKILL, by PID) mid-run.

The 40 image hosts (127.0.0.10-49) and the listing host (127.0.0.50, one JSON page listing
every image) run in a child process (demo_site.loopback.LoopbackServer), which logs arrivals
with server-side monotonic stamps. Politeness is judged strictly from those logs: the busiest
sliding 1.0 s window per host (demo_site.requestlog.max_in_window, no tolerance) against the
budget of 5, and the smallest gap between two arrivals at one host against 0.98 x the 0.2 s
interval. Printed per run: images, wall time, the aggregate image rate as % of the sum of
budgets (40 x 5 = 200/s; all image requests over the time from the first to the last image
arrival: the target's figure), and beside it where the rest goes: the mean of each host's own
rate over its own first-to-last arrival (per host %), the spread of the hosts' first arrivals
(ramp s: the coordinator admits the listed items one after another, host by host) and of their
last arrivals (tail s); the worst window, hosts over budget, images fetched more than once,
and for the killed run the images in flight at the kill: those of the killed worker's tasks
whose request had reached the server (by the kill + 0.9 interval; a rerun waits a full
interval) and that no journal line of the killed worker records (cluster_journal), beside the
images its tasks held in all (held). Targets: aggregate >= 90 %, zero violations, every item in
the same state as in the undisturbed run, images fetched twice <= those in flight at the kill.
Usage: python bench/cluster.py [--bytes] (--bytes: files come back as bytes, not through the
shared folder).
"""

from __future__ import annotations

import io
import itertools
import json
import multiprocessing as mp
import os
import signal
import socket
import sys
import tempfile
import threading
import time
from collections import Counter
from pathlib import Path
from typing import Any
from urllib.parse import urlsplit

import numpy as np
from PIL import Image

from collector.demo_site.loopback import LoopbackServer
from collector.demo_site.recipes import listing_source
from collector.demo_site.requestlog import max_in_window
from collector.fetching.fetcher import FetchSettings
from collector.run.cluster import ClusterDispatch
from collector.run.cluster_journal import SUFFIX, read_journal
from collector.run.cluster_setup import connect
from collector.run.gather import prepared_run, run_prepared
from collector.storage.collection import Collection, init_collection

HOSTS, PER_HOST, INTERVAL = 40, 40, 0.2
BUDGET = round(1 / INTERVAL)
LISTING = "127.0.0.50"


def _picture(n: int) -> bytes:
    pixels = np.random.default_rng(n).integers(0, 256, (48, 48, 3), dtype=np.uint8)
    out = io.BytesIO()
    Image.fromarray(pixels).save(out, "PNG")
    return out.getvalue()


def _serve(conn: Any) -> None:
    """Child process: the image hosts and the listing host; on request, logs and stop."""
    addresses = [f"127.0.0.{10 + i}" for i in range(HOSTS)]
    servers = {a: LoopbackServer(a) for a in [*addresses, LISTING]}
    items = []
    for h, addr in enumerate(addresses):
        srv = servers[addr]
        srv.route("/robots.txt", (200, b"user-agent: *\nallow: /\n"))
        for i in range(PER_HOST):
            srv.route(f"/img/{i}.png", (200, _picture(h * 1000 + i),
                                        {"Content-Type": "image/png"}))
            items.append({"id": f"{h}-{i}", "title": f"h{h} i{i}", "licence": "CC0-1.0",
                          "image": srv.url(f"/img/{i}.png")})
    servers[LISTING].route("/robots.txt", (404, b""))
    servers[LISTING].route("/items", (200, json.dumps({"results": items}).encode(),
                                      {"Content-Type": "application/json"}))
    conn.send(servers[LISTING].port)
    conn.recv()
    logs = {a: [(h.mono, h.path) for h in s.hits] for a, s in servers.items()}
    for s in servers.values():
        s.close()
    conn.send(logs)


def _recipe(port: int) -> str:
    return f'''contact = "bench@example.org"
[budgets]
min_interval = {INTERVAL}
requests_per_hour = 1000000
max_attempts = 1
[budgets.hosts."{LISTING}:{port}"]
min_interval = 0.01
[network]
allow_addresses = ["127.0.0.0/8"]
''' + listing_source("bench", f"http://{LISTING}:{port}/items")


def _states(col: Collection) -> dict[str, tuple[str, str | None]]:
    with col.ledger(readonly=True) as ledger:
        rows = ledger.query("SELECT source_key, state, reason FROM items")
    return {r["source_key"]: (r["state"], r["reason"]) for r in rows}


def _killer(client: Any, dispatch: ClusterDispatch, incoming: Path,
            out: dict[str, Any]) -> None:
    """Kill one worker process a fifth of a host's ideal time (1.6 s) after the first task
    started; note what it held."""
    while not any(client.processing().values()):
        time.sleep(0.05)
    time.sleep(PER_HOST * INTERVAL / 5)
    pids = client.run(os.getpid)
    victim = sorted(pids)[0]
    # What the worker holds: tasks running there and results not yet collected from it.
    keys = set(client.processing(workers=[victim]).get(victim, ()))
    keys |= set(client.has_what([victim]).get(victim, ()))
    held = dispatch.batches(keys)
    # Stopped first (SIGSTOP: it writes nothing more, nobody notices yet), its journal lines
    # are read as they stand at the kill.
    os.kill(pids[victim], signal.SIGSTOP)
    by = f"{socket.gethostname()}:{pids[victim]}"
    recorded = {e.result.item_id for path in incoming.glob(f"*{SUFFIX}")
                for e in read_journal(path)[1] if e.by == by}
    os.kill(pids[victim], signal.SIGKILL)
    out["kill_at"] = time.monotonic()
    out["held"] = sum(len(b) for b in held.values())
    out["unrecorded"] = [_where(url) for b in held.values() for item_id, url in b
                         if item_id not in recorded]
    out["killed"] = 1


def _where(url: str) -> str:
    parts = urlsplit(url)
    return f"{parts.hostname}{parts.path}"


def _in_flight(logs: dict[str, Any], out: dict[str, Any]) -> int:
    """The killed worker's unrecorded images that the server saw asked for by then."""
    if not out["killed"]:
        return 0
    by = out["kill_at"] + 0.9 * INTERVAL
    asked = {f"{a}{p}" for a, hits in logs.items() for t, p in hits if t <= by}
    return sum(u in asked for u in out["unrecorded"])


def run(folder: Path, *, kill: bool, force_bytes: bool) -> dict[str, Any]:
    parent, child = mp.Pipe()
    proc = mp.Process(target=_serve, args=(child,), daemon=True)
    proc.start()
    port = parent.recv()
    col = init_collection(folder, contact="bench@example.org")
    col.recipe_path.write_text(_recipe(port))
    out: dict[str, Any] = {"held": 0, "unrecorded": [], "killed": 0}
    with connect(local_workers=2, threads=24) as client, \
            prepared_run(col) as (recipe, ledger):
        dispatch = ClusterDispatch(client, FetchSettings.from_recipe(recipe),
                                   force_bytes=force_bytes)
        if kill:
            threading.Thread(target=_killer, args=(client, dispatch, col.store.incoming_dir,
                                                   out),
                             daemon=True).start()
        began = time.monotonic()
        result = run_prepared(col, recipe, ledger, dispatch=dispatch)
        wall = time.monotonic() - began
    parent.send("stop")
    logs = parent.recv()
    proc.join(5)
    images = [(t, p) for a, hits in logs.items() if a != LISTING for t, p in hits
              if p.startswith("/img/")]
    stamps = sorted(t for t, _ in images)
    span = stamps[-1] - stamps[0]
    worst = {a: max_in_window([t for t, _ in hits], 1.0) for a, hits in logs.items()
             if a != LISTING}
    gaps = [b - a for a_, hits in logs.items() if a_ != LISTING
            for a, b in itertools.pairwise(sorted(t for t, _ in hits))]
    hosts = [sorted(t for t, p in hits if p.startswith("/img/"))
             for a, hits in logs.items() if a != LISTING]
    own = [100 * (len(h) - 1) / (h[-1] - h[0]) / BUDGET for h in hosts if len(h) > 1]
    twice = Counter(f"{a}{p}" for a, hits in logs.items() for _, p in hits
                    if p.startswith("/img/"))
    return {"outcome": result.outcome, "images": len(images), "wall": wall,
            "aggregate": 100 * (len(images) - 1) / span / (HOSTS * BUDGET),
            "per_host": sum(own) / len(own),
            "ramp": max(h[0] for h in hosts) - min(h[0] for h in hosts),
            "tail": max(h[-1] for h in hosts) - min(h[-1] for h in hosts),
            "worst": max(worst.values()), "over": sum(w > BUDGET for w in worst.values()),
            "min_gap": min(gaps), "close": sum(g < 0.98 * INTERVAL for g in gaps),
            "twice": sum(n - 1 for n in twice.values() if n > 1), "states": _states(col),
            "in_flight": _in_flight(logs, out), **out}


def main() -> None:
    force_bytes = "--bytes" in sys.argv[1:]
    print(f"{HOSTS} hosts x {PER_HOST} images at {BUDGET} req/s each, 2 local worker "
          f"processes; files {'as bytes' if force_bytes else 'through the shared folder'}")
    print(f"{'run':<8} {'outcome':<9} {'images':>6} {'wall s':>6} {'aggregate %':>11} "
          f"{'per host %':>10} {'ramp s':>6} {'tail s':>6} "
          f"{'worst 1 s':>9} {'hosts over':>10} {'min gap s':>9} {'gaps < 0.98x':>12} "
          f"{'fetched twice':>13} {'in flight':>9} {'held':>5} {'same states':>11}")
    with tempfile.TemporaryDirectory() as tmp:
        plain = run(Path(tmp) / "plain", kill=False, force_bytes=force_bytes)
        killed = run(Path(tmp) / "killed", kill=True, force_bytes=force_bytes)
    for name, r in (("plain", plain), ("killed", killed)):
        same = "yes" if r["states"] == plain["states"] else "NO"
        flight = str(r["in_flight"]) if r["killed"] else "-"
        held = str(r["held"]) if r["killed"] else "-"
        print(f"{name:<8} {r['outcome']:<9} {r['images']:>6} {r['wall']:>6.1f} "
              f"{r['aggregate']:>11.1f} {r['per_host']:>10.1f} {r['ramp']:>6.2f} "
              f"{r['tail']:>6.2f} {r['worst']:>5}/{BUDGET:<3} {r['over']:>10} "
              f"{r['min_gap']:>9.3f} {r['close']:>12} "
              f"{r['twice']:>13} {flight:>9} {held:>5} {same:>11}")


if __name__ == "__main__":
    main()
