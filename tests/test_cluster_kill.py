"""A cluster run on real processes: ``dask scheduler`` and two ``dask worker`` processes on
127.0.0.1 (loopback only), one worker killed by its PID (SIGKILL) while it fetches.

Checked against the demo archive's own record (its server log and its manifest): no request
arrival closer than 0.98 x the host's interval and no sliding 1.0 s window over the budget,
every manifest item in the state an uninterrupted run reaches (tests/test_gather_demo.py checks
the same manifest for the local run), and the images asked for twice are at most the images
the killed worker held (at-least-once delivery, scale.md lesson 3: only work in flight at the
kill is done again); with the shared folder's batch journals (collector.run.cluster_journal) at
most one image per task of the killed worker, the one whose request was under way.
"""

from __future__ import annotations

import itertools
import json
import os
import signal
import subprocess
import sys
import threading
import time
from collections import Counter
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pytest
from support.cluster import is_image_request, wrong_items

from collector.demo_site import DemoServer
from collector.demo_site.recipes import render
from collector.demo_site.requestlog import max_in_window
from collector.fetching.fetcher import FetchSettings
from collector.run.cluster import ClusterDispatch
from collector.run.cluster_setup import connect
from collector.run.gather import prepared_run, run_prepared
from collector.storage.collection import init_collection

pytestmark = pytest.mark.slow
WORKER_ENV = {"DASK_DISTRIBUTED__WORKER__PROFILE__ENABLED": "False"}  # README, cluster_worker


def _dask(*args: str, log: Path) -> subprocess.Popen[bytes]:
    """``dask ARGS`` as the README starts it (python -m dask: the same command)."""
    env = {**os.environ, **WORKER_ENV,
           "PYTHONPATH": os.pathsep.join(filter(None, [str(Path(__file__).parents[1]),
                                                       os.environ.get("PYTHONPATH")]))}
    with log.open("wb") as out:
        return subprocess.Popen([sys.executable, "-m", "dask", *args], stdout=out,
                                stderr=subprocess.STDOUT, env=env, start_new_session=True)


@pytest.fixture
def real_cluster(tmp_path: Path) -> Iterator[str]:
    """A scheduler and two workers (with their nannies) on 127.0.0.1; their address."""
    info = tmp_path / "scheduler.json"
    procs = [_dask("scheduler", "--host", "127.0.0.1", "--port", "0", "--no-dashboard",
                   "--scheduler-file", str(info), log=tmp_path / "scheduler.log")]
    try:
        deadline = time.monotonic() + 60
        while not info.exists() or not info.read_text().strip():
            assert time.monotonic() < deadline, (tmp_path / "scheduler.log").read_text()
            time.sleep(0.1)
        address = json.loads(info.read_text())["address"]
        assert address.startswith("tcp://127.0.0.1:")
        for n in range(2):
            procs.append(_dask("worker", address, "--host", "127.0.0.1", "--nthreads", "8",
                               "--no-dashboard", log=tmp_path / f"worker{n}.log"))
        yield address
    finally:
        for proc in procs:
            with_group = os.getpgid(proc.pid) if proc.poll() is None else None
            if with_group is not None:
                os.killpg(with_group, signal.SIGTERM)
        for proc in procs:
            try:
                proc.wait(20)
            except subprocess.TimeoutExpired:
                os.killpg(proc.pid, signal.SIGKILL)
                proc.wait(5)


def _kill_one(client: Any, dispatch: ClusterDispatch, batches: list[Any],
              out: dict[str, int]) -> None:
    """Once some batches came back and a task runs: SIGKILL the worker process running one,
    counting its tasks and the images they held (running, or finished and not collected)."""
    deadline = time.monotonic() + 60
    while time.monotonic() < deadline:
        if batches:
            busy = {w: keys for w, keys in client.processing().items() if keys}
            if busy:
                victim = sorted(busy)[0]
                pids = client.run(os.getpid, workers=[victim])
                held = set(busy[victim]) | set(client.has_what([victim]).get(victim, ()))
                out["in_flight"] = sum(len(b) for b in dispatch.batches(held).values())
                out["tasks"] = len(busy[victim])
                os.kill(pids[victim], signal.SIGKILL)
                out["killed"] = pids[victim]
                return
        time.sleep(0.05)


def test_a_worker_killed_mid_run_changes_nothing_but_the_work_it_held(
        real_cluster: str, demo_server: DemoServer, demo_content: Path,
        tmp_path: Path) -> None:
    """One of two worker processes killed by PID mid-run: zero politeness violations in the
    server's log, every item as in an uninterrupted run, images asked twice <= in flight."""
    demo_server.reset()
    col = init_collection(tmp_path / "c", contact="x@example.org")
    col.recipe_path.write_text(render("demo", demo_server.port, demo_content / "scans"))
    batches: list[Any] = []
    out = {"in_flight": 0, "tasks": 0, "killed": 0}
    with connect(real_cluster) as client, prepared_run(col) as (recipe, ledger):
        dispatch = ClusterDispatch(client, FetchSettings.from_recipe(recipe),
                                   on_batch=batches.append)
        killer = threading.Thread(target=_kill_one, args=(client, dispatch, batches, out),
                                  daemon=True)
        killer.start()
        result = run_prepared(col, recipe, ledger, dispatch=dispatch)
        killer.join(5)
    log = demo_server.log
    assert out["killed"], "no worker was killed while a task ran"
    assert result.outcome == "finished"
    assert wrong_items(col, demo_server) == []
    for host, records in itertools.groupby(sorted(log, key=lambda r: (r.host_index, r.t)),
                                           key=lambda r: r.host_index):
        times = [r.t for r in records]
        floor = 0.2 if host == 1 else 0.1  # the API host's Crawl-delay, else min_interval
        gaps = [b - a for a, b in itertools.pairwise(times)]
        assert not gaps or min(gaps) >= 0.98 * floor, (host, min(gaps))
        # RFC 9309 and the recipe say nothing of windows: common practice, no source.
        assert max_in_window(times, 1.0) <= round(1 / floor), host
    asked = Counter(r.path for r in log if is_image_request(r))
    twice = sum(n - 1 for n in asked.values() if n > 1)
    assert twice <= out["in_flight"], (twice, out)
    # A task journals each image before its next request: one request per task at most.
    assert twice <= out["tasks"], (twice, out)
