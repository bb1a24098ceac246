"""Listed candidates admitted in groups (listed.ListedGroup, Ingest.admit_group): one ledger
transaction per group, the same rows, states, reasons and jobs as admitting them one by one,
and every item row committed before its image can be requested.

The rule checked: the run records each candidate before any image byte is requested, and a
crash at any point loses nothing but what it was doing (DEVELOPERS.md, "Data flows one way";
issue 20 Part 0: an image URL that is queued or in flight is not requested again). Committed
is checked from a second SQLite connection to the same file, as a process started after a
kill would read it. No request is made: the recipe's source URL is on an unlisted loopback
address and the run has no fetcher; jobs are only collected.
"""

from __future__ import annotations

import sqlite3
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import Any

import pytest

from collector.demo_site.recipes import listing_source
from collector.run.gather import prepared_run
from collector.run.ingest import Ingest
from collector.run.listed import LISTED_GROUP, ListedGroup
from collector.run.scheduling import Gatherer
from collector.sources.base import Candidate
from collector.storage.collection import Collection, init_collection

RECIPE = ('contact = "tests@example.org"\n[network]\nallow_addresses = ["127.0.0.0/8"]\n'
          + listing_source("api", "http://127.0.0.9:8000/items"))
IMG = "http://127.0.0.9:8001/img/{}.png"


class _Jobs:
    """Collects the jobs the run hands its hosts (scheduling.HostDispatch); ``check`` runs
    on each before it is taken, as a host would start its request."""

    def __init__(self, check: Callable[[Any], None] = lambda job: None) -> None:
        self.jobs: list[tuple[int, str]] = []
        self.check = check

    def attach(self, gatherer: Any) -> None:
        pass

    def put(self, host: str, job: Any) -> None:
        self.check(job)
        self.jobs.append((job.item_id, job.url))

    def finish(self) -> None:
        pass


def _committed_ids(col: Collection) -> set[int]:
    """Item ids another connection can read now (committed rows only)."""
    path = col.ledger_path
    conn = sqlite3.connect(f"file:{path}?mode=ro", uri=True)
    try:
        return {row[0] for row in conn.execute("SELECT id FROM items")}
    finally:
        conn.close()


@contextmanager
def _run(folder: Path, jobs: _Jobs) -> Iterator[tuple[Collection, Gatherer, int]]:
    col = Collection(folder) if folder.exists() else init_collection(
        folder, contact="tests@example.org")
    col.recipe_path.write_text(RECIPE)
    with prepared_run(col) as (recipe, ledger):
        g = Gatherer(col, recipe, ledger, None, dispatch=jobs)
        g.run_id = ledger.start_run("test", {}, "test")
        yield col, g, g._source_ids[0]
        ledger.end_run(g.run_id, "finished")


def _mixed() -> list[Candidate]:
    """One of each admission outcome, an image URL listed twice, a withdrawn record, and a
    key listed again."""
    return [
        Candidate("a", IMG.format("a"), licence_raw="CC0-1.0"),
        Candidate("b", IMG.format("b"), licence_raw="All rights reserved"),  # licence_unknown
        Candidate("c", IMG.format("c"), licence_raw="CC BY-NC 4.0"),  # licence_not_allowed
        Candidate("d", None, licence_raw="CC0-1.0"),  # rejected: no_image_url
        Candidate("e", IMG.format("a"), licence_raw="CC-BY-4.0"),  # waits for a's request
        Candidate("f", withdrawn="deleted in the archive"),  # never had it: only counted
        Candidate("g", IMG.format("g"), licence_url="https://creativecommons.org/licenses/by/4.0/"),
        Candidate("a", IMG.format("a"), licence_raw="CC0-1.0", title="listed again"),
        *[Candidate(f"n{i}", IMG.format(f"n{i}"), licence_raw="CC0-1.0") for i in range(70)],
    ]


def _rows(col: Collection) -> list[dict[str, Any]]:
    with col.ledger(readonly=True) as ledger:
        rows = ledger.query("SELECT * FROM items ORDER BY id")
    return [{k: v for k, v in r.items() if k not in ("created_at", "updated_at")}
            for r in rows]


def _admit(folder: Path, grouped: bool) -> tuple[list[dict[str, Any]], list[Any], dict]:
    """Two runs over the same listing (the second finds every item in the ledger)."""
    every_job: list[Any] = []
    counts: dict[str, int] = {}
    for _ in range(2):
        jobs = _Jobs()
        with _run(folder, jobs) as (col, g, sid):
            if grouped:
                listed = ListedGroup(g, sid, None)
                for c in _mixed():
                    listed.add(c)
                listed.flush()
            else:
                for c in _mixed():
                    if (job := g.ingest.admit(sid, c)) is not None:
                        g._enqueue(job)
            counts = dict(g.counts)
        every_job.append(jobs.jobs)
    return _rows(col), every_job, counts


def test_grouped_admission_records_what_one_by_one_records(tmp_path: Path) -> None:
    """Same rows (every column but the two timestamps), same jobs, same counts, in a new
    run and in a resumed one."""
    one = _admit(tmp_path / "one", grouped=False)
    grouped = _admit(tmp_path / "grouped", grouped=True)
    assert grouped == one
    rows, jobs, counts = grouped
    by_key = {r["source_key"]: r for r in rows}
    assert (by_key["b"]["state"], by_key["b"]["reason"]) == ("skipped", "licence_unknown")
    assert (by_key["c"]["state"], by_key["c"]["reason"]) == ("skipped", "licence_not_allowed")
    assert (by_key["d"]["state"], by_key["d"]["reason"]) == ("rejected", "no_image_url")
    assert by_key["a"]["title"] == "listed again" and "f" not in by_key
    # One request per image URL (issue 20 Part 0): a's URL once although e lists it too.
    assert [url for _, url in jobs[0]].count(IMG.format("a")) == 1
    assert len(jobs[0]) == 1 + 1 + 70  # a, g and the 70 plain items
    assert counts["withdrawn_unseen"] == 1


def test_every_row_is_committed_before_its_job(tmp_path: Path) -> None:
    """More candidates than one group holds: each job's item row is readable from another
    connection when the job reaches its host."""
    seen: list[int] = []
    folder = tmp_path / "c"

    def check(job: Any) -> None:
        assert job.item_id in _committed_ids(Collection(folder))
        seen.append(job.item_id)

    with _run(folder, _Jobs(check)) as (_col, g, sid):
        listed = ListedGroup(g, sid, None)
        for i in range(LISTED_GROUP + 10):
            listed.add(Candidate(f"k{i}", IMG.format(i), licence_raw="CC0-1.0"))
        listed.flush()
    assert len(seen) == LISTED_GROUP + 10


class _Pages:
    """The page fetcher a source is handed: records what was committed at each request."""

    def __init__(self, col: Collection, jobs: _Jobs) -> None:
        self.col, self.jobs = col, jobs
        self.at_request: list[tuple[int, int]] = []

    def get_page(self, url: str, **kwargs: Any) -> str:
        self.at_request.append((len(_committed_ids(self.col)), len(self.jobs.jobs)))
        return "page"


def test_held_candidates_are_admitted_before_the_next_page_request(tmp_path: Path) -> None:
    """A source asking for its next page first has every candidate it listed admitted (rows
    committed, jobs handed over): no candidate waits for a request."""
    jobs = _Jobs()
    with _run(tmp_path / "p", jobs) as (col, g, sid):
        pages = _Pages(col, jobs)
        listed = ListedGroup(g, sid, pages)
        for i in range(5):
            listed.add(Candidate(f"p{i}", IMG.format(i), licence_raw="CC0-1.0"))
        assert listed.fetcher.get_page("http://127.0.0.9:8000/items?page=2") == "page"
        listed.add(Candidate("p5", IMG.format(5), licence_raw="CC0-1.0"))
        listed.flush()
    assert pages.at_request == [(5, 5)]
    assert len(jobs.jobs) == 6


def test_a_bug_admitting_one_candidate_fails_it_and_admits_the_rest(
        tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    """Deciding the fourth candidate of a group raises (a stand-in for a bug): that item is
    failed (internal_error, the error in its detail) and the group's other candidates are
    decided as usual (jobs handed over, a licence skip recorded), none left pending
    undecided; the bug is raised after the group, so the run still fails loudly."""
    real = Ingest._decide

    def decide(self: Ingest, source_id: int, c: Any, registered: Any) -> Any:
        if c.source_key == "k3":
            raise RuntimeError("injected for the test")
        return real(self, source_id, c, registered)
    monkeypatch.setattr(Ingest, "_decide", decide)
    group = [Candidate(f"k{i}", IMG.format(i), licence_raw="CC0-1.0") for i in range(8)]
    group[6] = Candidate("k6", IMG.format(6), licence_raw="All rights reserved")
    jobs = _Jobs()
    with _run(tmp_path / "c", jobs) as (col, g, sid):
        listed = ListedGroup(g, sid, None)
        with pytest.raises(RuntimeError, match="injected for the test"):
            for c in group:
                listed.add(c)
            listed.flush()
    by_key = {r["source_key"]: r for r in _rows(col)}
    assert (by_key["k3"]["state"], by_key["k3"]["reason"]) == ("failed", "internal_error")
    assert "RuntimeError: injected for the test" in by_key["k3"]["detail"]
    assert (by_key["k6"]["state"], by_key["k6"]["reason"]) == ("skipped", "licence_unknown")
    assert sorted(url for _, url in jobs.jobs) == sorted(
        IMG.format(i) for i in (0, 1, 2, 4, 5, 7))
