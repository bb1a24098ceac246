"""Request rows committed in batches (collector.storage.fetch_batch), and what a killed run
leaves the next one.

Every request's ``fetches`` row is in the ledger file within FLUSH_S seconds, before any other
write or read of the same ledger, and at close. A killed process loses at most the rows made
after the committed first row of its last batch, and the next run gives every host a full
interval after that batch's end: the issue's rule that a resumed host waits one full interval
first (common practice, no source), checked on the server's side (arrival times).
"""

from __future__ import annotations

import random
import sqlite3
import subprocess
import sys
import time
from datetime import UTC, datetime
from pathlib import Path

import pytest

from collector.demo_site.loopback import LoopbackServer
from collector.fetching import budgets
from collector.fetching.budgets import FakeClock, HostBudgets
from collector.fetching.fetcher import Fetcher, FetchSettings
from collector.storage import fetch_batch
from collector.storage.fetch_batch import BATCH_FACT
from collector.storage.ledger import Ledger
from collector.storage.row_codec import iso_time

ROOT = Path(__file__).resolve().parent.parent


def _row(i: int, host: str = "127.0.0.9:80") -> dict[str, object]:
    return {"purpose": "listing", "url": f"http://{host}/item/{i}", "host": host,
            "attempt": 1, "status": 200, "ended_at": iso_time(time.time())}


def _seen_by_another_reader(path: Path) -> list[str]:
    """The fetch rows' URLs as another process sees the file (its own connection)."""
    conn = sqlite3.connect(f"file:{path}?mode=ro", uri=True)
    try:
        return [r[0] for r in conn.execute("SELECT url FROM fetches ORDER BY id")]
    finally:
        conn.close()


@pytest.fixture
def ledger(tmp_path: Path) -> Ledger:
    return Ledger.create(tmp_path / "ledger.sqlite")


def test_a_batch_commits_its_first_row_at_once_and_the_rest_together(
        ledger: Ledger, monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setattr(fetch_batch, "FLUSH_S", 60.0)  # nothing ends this batch in the test
    for i in range(5):
        ledger.record_fetch(**_row(i))
    urls = [f"http://127.0.0.9:80/item/{i}" for i in range(5)]
    assert _seen_by_another_reader(ledger.path) == urls[:1]
    assert ledger.fact(BATCH_FACT) is not None  # committed with the first row
    # a read of this ledger commits the waiting rows first: the run sees every row it made
    assert ledger.scalar("SELECT count(*) FROM fetches") == 5
    assert _seen_by_another_reader(ledger.path) == urls
    ledger.close()


def test_the_batch_thread_commits_a_batch_within_its_time(
        ledger: Ledger, monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setattr(fetch_batch, "FLUSH_S", 0.2)
    for i in range(3):
        ledger.record_fetch(**_row(i))
    deadline = time.monotonic() + 20  # generous: the thread may wake late on a busy CI
    while len(_seen_by_another_reader(ledger.path)) < 3 and time.monotonic() < deadline:
        time.sleep(0.05)
    assert len(_seen_by_another_reader(ledger.path)) == 3
    ledger.record_fetch(**_row(3))  # the batch is over: this row opens a new one, at once
    assert len(_seen_by_another_reader(ledger.path)) == 4
    ledger.close()


def test_a_failing_block_rolls_back_itself_and_never_the_waiting_rows(
        ledger: Ledger, monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setattr(fetch_batch, "FLUSH_S", 60.0)
    for i in range(3):
        ledger.record_fetch(**_row(i))
    with pytest.raises(RuntimeError), ledger.transaction():
        ledger.add_note("test", "rolled back")
        ledger.record_fetch(**_row(99))  # inside the block: rolled back with it
        raise RuntimeError("the block fails")
    assert [u.rsplit("/", 1)[1] for u in _seen_by_another_reader(ledger.path)] == ["0", "1", "2"]
    assert ledger.scalar("SELECT count(*) FROM notes") == 0
    ledger.close()


def test_rows_keep_the_order_they_were_made_in(ledger: Ledger,
                                               monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setattr(fetch_batch, "FLUSH_S", 60.0)
    rng = random.Random(5)
    made = []
    for i in range(40):
        ledger.record_fetch(**_row(i))
        made.append(f"http://127.0.0.9:80/item/{i}")
        if rng.random() < 0.2:
            ledger.add_note("test", f"a write after row {i}")  # commits the waiting rows first
    ledger.close()
    assert _seen_by_another_reader(ledger.path) == made


def test_a_clean_close_commits_everything_and_leaves_no_wait(tmp_path: Path) -> None:
    path = tmp_path / "ledger.sqlite"
    ledger = Ledger.create(path)
    for i in range(4):
        ledger.record_fetch(**_row(i))
    ledger.close()
    assert len(_seen_by_another_reader(path)) == 4
    again = Ledger.open(path)
    assert again.fact(BATCH_FACT) is None
    assert again.last_contact("127.0.0.10:80") is None  # a host no run contacted
    again.close()


_KILLED_RUN = """
import os, sys, time
from pathlib import Path
from collector.storage.ledger import Ledger
from collector.storage.row_codec import iso_time
from collector.storage.row_codec import iso_time
ledger = Ledger.open(Path(sys.argv[1]))
host = sys.argv[2]
for i in range(6):
    now = iso_time(time.time())
    ledger.record_fetch(purpose="listing", url=f"http://{host}/item/{i}", host=host,
                        attempt=1, status=200, ended_at=now)
    print(now, flush=True)
    time.sleep(0.05)
os._exit(9)  # killed: no close, the batch never ends
"""


def test_after_a_killed_run_every_host_waits_a_full_interval_after_the_lost_rows(
        tmp_path: Path) -> None:
    path = tmp_path / "ledger.sqlite"
    Ledger.create(path).close()
    with LoopbackServer("127.0.0.1") as server:
        server.route("/robots.txt", (200, b"user-agent: *\nallow: /\n"))
        server.fallback = (200, b"{}")
        killed = subprocess.run([sys.executable, "-c", _KILLED_RUN, str(path), server.key],
                                cwd=ROOT, capture_output=True, text=True, timeout=60)
        assert killed.returncode == 9, killed.stderr
        made = killed.stdout.split()
        assert len(made) == 6
        # the batch's first row is in the file, the rows after it were lost with the process
        assert _seen_by_another_reader(path) == [f"http://{server.key}/item/0"]

        ledger = Ledger.open(path)
        lost_until = ledger.last_contact("127.0.0.10:80")  # a host the killed run never met
        assert lost_until is not None and all(t <= lost_until for t in made)
        assert ledger.last_contact(server.key) == lost_until
        interval = 0.5
        settings = FetchSettings.from_recipe({
            "contact": "curator@example.org",
            "budgets": {"min_interval": interval},
            "network": {"allow_addresses": ["127.0.0.1/32"]}})
        fetcher = Fetcher(settings, ledger)
        try:
            fetcher.get_page(server.url("/item/again"))
        finally:
            fetcher.close()
            ledger.close()
        first = min(hit.wall for hit in server.hits)  # robots.txt: the run's first request
        ends = datetime.fromisoformat(lost_until.replace("Z", "+00:00")).timestamp()
        assert first >= ends + interval - 0.002  # the lost rows' end has millisecond steps


def test_a_contact_ahead_counts_up_to_its_limit() -> None:
    clock = FakeClock()
    keeper = HostBudgets(clock=clock)
    interval = keeper.interval("a:80")
    keeper.contacted("a:80", -0.8)  # the end of a killed run's lost rows, 0.8 s from now
    assert keeper.wait_time("a:80") == pytest.approx(interval + 0.8)
    keeper.contacted("b:80", -(budgets.AHEAD_MAX + 100))  # a clock set back: counts as now
    assert keeper.wait_time("b:80") == pytest.approx(interval)


def test_request_times_are_written_as_datetime_writes_them() -> None:
    """iso_time formats a second once; the text equals datetime's ISO 8601 for any moment
    (Python documentation, datetime.isoformat(timespec="milliseconds"))."""
    rng = random.Random(11)
    moments = [rng.uniform(0, 4e9) for _ in range(20_000)]
    moments += [rng.randrange(0, 4 * 10**15) / 1e6 for _ in range(20_000)]
    moments += [base + part for base in (0.0, 86_399.0, 1_800_000_000.0)
                for part in (0.0, 0.0005, 0.0009995, 0.4999995, 0.9995, 0.9999995)]
    for moment in moments:
        expected = datetime.fromtimestamp(moment, UTC).isoformat(timespec="milliseconds")
        assert iso_time(moment) == expected.replace("+00:00", "Z"), moment
