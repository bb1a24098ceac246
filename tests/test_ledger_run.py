"""The ledger methods and queries the run asks and changes through (collector.run holds no
SQL)."""

from __future__ import annotations

from pathlib import Path

from collector.storage import queries
from collector.storage.ledger import Ledger

SHA_A = "a" * 64
SHA_B = "b" * 64


def _items(ledger: Ledger) -> tuple[int, int, int]:
    """Three items of one source: 1 stored with file A, 2 a duplicate of 1, 3 pending."""
    source = ledger.source_id("api", "json_api", {})
    ledger.add_file({"sha256": SHA_A, "size": 1, "first_item_id": 1})
    one = ledger.add_item(source, "1", {"image_url": "http://127.0.0.59/a.jpg",
                                        "state": "stored", "file_sha256": SHA_A})
    two = ledger.add_item(source, "2", {"image_url": "http://127.0.0.59/b.jpg",
                                        "state": "duplicate", "file_sha256": SHA_A,
                                        "duplicate_of": one})
    three = ledger.add_item(source, "3", {"image_url": "http://127.0.0.59/a.jpg"})
    return one, two, three


def test_stored_with_image_url_finds_another_kept_item(tmp_path: Path) -> None:
    """Only another item in a kept state with a file counts as "same image URL"."""
    with Ledger.create(tmp_path / "l.sqlite") as ledger:
        one, _, three = _items(ledger)
        assert queries.stored_with_image_url(ledger, "http://127.0.0.59/a.jpg", three) == {
            "id": one, "file_sha256": SHA_A}
        assert queries.stored_with_image_url(ledger, "http://127.0.0.59/a.jpg", one) is None
        assert queries.stored_with_image_url(
            ledger, "http://127.0.0.59/b.jpg", three) is None  # dup


def test_gone_runs_counts_runs_not_requests(tmp_path: Path) -> None:
    """Two 404s in one run and a 410 in another are two runs; other statuses do not count."""
    with Ledger.create(tmp_path / "l.sqlite") as ledger:
        one, _, _ = _items(ledger)
        for run, status, purpose in [(1, 404, "image"), (1, 404, "image"), (2, 410, "image"),
                                     (3, 500, "image"), (4, 404, "listing")]:
            ledger.record_fetch(run_id=run, item_id=one, purpose=purpose, status=status,
                                url="http://127.0.0.59/a.jpg")
        assert queries.gone_runs(ledger, one) == 2


def test_pass_file_to_moves_the_file_and_its_duplicates(tmp_path: Path) -> None:
    """After a take-over the file and every duplicate point at the new item."""
    with Ledger.create(tmp_path / "l.sqlite") as ledger:
        one, two, three = _items(ledger)
        ledger.pass_file_to(SHA_A, one, three)
        assert ledger.file(SHA_A)["first_item_id"] == three
        assert ledger.item(two)["duplicate_of"] == three


def test_forget_file_removes_the_row_and_every_link(tmp_path: Path) -> None:
    """A dropped near copy leaves no files row and no item pointing at it."""
    with Ledger.create(tmp_path / "l.sqlite") as ledger:
        ledger.add_file({"sha256": SHA_B, "size": 1})
        one, two, _ = _items(ledger)
        ledger.forget_file(SHA_A)
        assert ledger.file(SHA_A) is None
        assert ledger.file(SHA_B) is not None
        assert ledger.item(one)["file_sha256"] is None
        assert ledger.item(two)["file_sha256"] is None


def test_mark_killed_runs_ends_only_running_runs(tmp_path: Path) -> None:
    """A run left "running" becomes killed; ended runs keep their outcome."""
    with Ledger.create(tmp_path / "l.sqlite") as ledger:
        done = ledger.start_run("x", {}, "test")
        ledger.end_run(done, "finished")
        left = ledger.start_run("x", {}, "test")
        ledger.mark_killed_runs()
        outcomes = {r["id"]: r["outcome"] for r in ledger.query("SELECT id, outcome FROM runs")}
        assert outcomes == {done: "finished", left: "killed: did not end cleanly"}
