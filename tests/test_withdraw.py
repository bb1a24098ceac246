"""Withdrawing a file or item: left out of every release, reported by trace, never fetched
again, its bytes optionally deleted, and undone on request; plus the ledger migration that
adds the upkeep tables, tried on a ledger made by the previous schema."""

from __future__ import annotations

import csv
import hashlib
from pathlib import Path

import pytest
from support.collections import Gathered, scans_collection
from typer.testing import CliRunner

from collector.cli import app
from collector.demo_site import DemoServer
from collector.errors import CollectionError
from collector.exports.datasheet import export_datasheet
from collector.exports.trace import Tracer
from collector.exports.trace_format import format_record
from collector.run.gather import gather
from collector.storage import datasheet_queries
from collector.storage import ledger as ledger_module
from collector.storage import upkeep_queries as uq
from collector.storage.collection import Collection, open_collection
from collector.storage.ledger import Ledger
from collector.storage.migrations import MIGRATIONS
from collector.storage.withdrawals import undo, withdraw

runner = CliRunner()
KEY = "FH-S-0002"  # an item of the demo's first listing page, stored by every gather


def _gathered(root: Path, page: Gathered) -> Collection:
    """A private copy at ``root`` of the demo's first listing page gathered (the session's
    ``page_gathered``, conftest.py)."""
    assert page.result.outcome == "finished"
    return page.copy_to(root)


def _item(col: Collection, key: str) -> uq.ItemBrief:
    with col.ledger(readonly=True) as ledger:
        item_id = uq.item_ids_of_key(ledger, "api-pages", key)[0]
        return uq.item_briefs(ledger, item_id=item_id)[0]


def _released(col: Collection, out: Path) -> tuple[set[str], set[str]]:
    """(sha256 in provenance.csv, file names in attribution.csv) of a fresh export."""
    export_datasheet(col.root, out=out)
    with open(out / "provenance.csv", newline="") as fh:
        prov = {r["sha256"] for r in csv.DictReader(fh)}
    with open(out / "attribution.csv", newline="") as fh:
        names = {r["file_name"] for r in csv.DictReader(fh)}
    return prov, names


def _image_requests(server: DemoServer, key: str) -> int:
    return sum(1 for r in server.log if r.path.endswith(f"/{key}.png"))


def test_withdrawn_item_leaves_releases_and_trace_says_so(
        tmp_path: Path, page_gathered: Gathered, fresh_demo_server: DemoServer) -> None:
    """Withdrawn by source key (bytes kept): provenance.csv and attribution.csv leave it out,
    trace says "withdrawn on <date>: <reason>", a rerun does not request it, undo brings it
    back."""
    col = _gathered(tmp_path / "c", page_gathered)
    item = _item(col, KEY)
    assert item.file_sha256 is not None
    before, _ = _released(col, tmp_path / "r0")
    assert item.file_sha256 in before
    with col.ledger() as ledger:
        accepted = datasheet_queries.accepted_facts(ledger)["files"]
        done = withdraw(col, ledger, f"key:api-pages:{KEY}", reason="creator-request",
                        asked_by="R. Quillfeather", asked_on="2026-11-30")
        # every export leaves it out: the datasheet's own numbers too
        assert datasheet_queries.accepted_facts(ledger)["files"] == accepted - 1
    prov, names = _released(col, tmp_path / "r1")
    assert prov == before - {item.file_sha256}
    assert not any(item.file_sha256[:12] in name for name in names)
    stored = col.store.find(item.file_sha256)
    assert stored is not None  # bytes kept
    with Tracer.open(col.root) as tracer:
        record = "\n".join(format_record(tracer.trace_file(stored)))
    assert f"withdrawn on {done.recorded_at[:10]}: request by the creator" in record
    table = runner.invoke(app, ["trace", str(stored.parent), "--in", str(col.root), "--csv"])
    row = next(line for line in table.output.splitlines() if item.file_sha256 in line)
    assert "withdrawn" in row  # the folder table's flags name it too
    fresh_demo_server.clear_log()
    assert gather(col).outcome == "finished"
    assert _image_requests(fresh_demo_server, KEY) == 0  # the server's own log
    with col.ledger() as ledger:
        undo(ledger, done.id, undone_by="curator", note="asked by mistake")
        assert uq.withdrawal(ledger, done.id).undone_at is not None  # recorded, not deleted
        assert datasheet_queries.accepted_facts(ledger)["files"] == accepted
    again, _ = _released(col, tmp_path / "r2")
    assert again == before


def test_withdrawal_with_deleted_bytes_is_fetched_again_after_undo(
        tmp_path: Path, page_gathered: Gathered, fresh_demo_server: DemoServer) -> None:
    """Withdrawn by sha256 prefix with --delete-bytes: the store no longer holds the file,
    every command still opens the collection (the ledger-vs-store check), a rerun does not
    fetch it; after undo the next gather fetches it again and a release holds it."""
    col = _gathered(tmp_path / "c", page_gathered)
    sha = _item(col, KEY).file_sha256
    assert sha is not None
    result = runner.invoke(app, ["withdraw", str(col.root), sha[:10], "--reason",
                                 "personal-data", "--delete-bytes", "--asked-by", "a visitor"])
    assert result.exit_code == 0, result.output
    assert col.store.find(sha) is None
    open_collection(col.root)  # check_ledger accepts a file deleted on purpose
    status = runner.invoke(app, ["status", str(col.root)])
    assert status.exit_code == 0 and "Withdrawn: 1" in status.output
    assert "1 with their bytes deleted" in status.output
    fresh_demo_server.clear_log()
    assert gather(col).outcome == "finished"
    assert _image_requests(fresh_demo_server, KEY) == 0
    assert _item(col, KEY).state == "stored"  # recovery did not take it for a lost file
    listed = runner.invoke(app, ["withdrawals", str(col.root)])
    assert "personal data" in listed.output and "bytes deleted" in listed.output
    number = listed.output.split()[0].lstrip("#")
    assert runner.invoke(app, ["undo-withdrawal", str(col.root), number]).exit_code == 0
    fresh_demo_server.clear_log()
    assert gather(col).outcome == "finished"
    assert _image_requests(fresh_demo_server, KEY) == 1
    found = col.store.find(sha)
    assert found is not None
    assert hashlib.sha256(found.read_bytes()).hexdigest() == sha  # FIPS 180-4
    prov, _ = _released(col, tmp_path / "r")
    assert sha in prov


def test_withdrawing_every_file_with_its_bytes_keeps_the_collection_usable(
        tmp_path: Path) -> None:
    """A store emptied on purpose by withdrawals is not taken for an unmounted disk."""
    col = scans_collection(tmp_path / "c", count=1)
    with col.ledger() as ledger:
        (sha,) = ledger.known_sha256s()
        withdraw(col, ledger, sha[:8], reason="other", delete_bytes=True)
    open_collection(col.root)
    assert gather(col, fetcher_factory=lambda recipe, ledger: None).outcome == "finished"
    assert col.store.find(sha) is None  # the local file was not read in again


@pytest.mark.parametrize(("target", "words"), [
    ("item:999", "no item '999'"), ("key:desk:nothing.png", "no item is listed"),
    ("0000000000", "names nothing"), ("leaf", "names nothing"),
])
def test_a_target_that_names_nothing_is_a_clear_error(tmp_path: Path, target: str,
                                                       words: str) -> None:
    """Bad input gets a message that says what to write, and nothing is recorded."""
    col = scans_collection(tmp_path / "c", count=1)
    with col.ledger() as ledger, pytest.raises(CollectionError, match=words):
        withdraw(col, ledger, target, reason="other")
    with col.ledger() as ledger:
        assert uq.withdrawals(ledger) == []


def test_reason_and_date_are_checked(tmp_path: Path) -> None:
    """An unknown reason and a date that is not ISO 8601 are refused."""
    col = scans_collection(tmp_path / "c", count=1)
    with col.ledger() as ledger:
        with pytest.raises(CollectionError, match="unknown reason"):
            withdraw(col, ledger, "item:1", reason="because")
        with pytest.raises(CollectionError, match="YYYY-MM-DD"):
            withdraw(col, ledger, "item:1", reason="other", asked_on="30/11/2026")
        done = withdraw(col, ledger, "item:1", reason="other")
        with pytest.raises(CollectionError, match="already withdrawn"):
            withdraw(col, ledger, "item:1", reason="other")
        undo(ledger, done.id)
        with pytest.raises(CollectionError, match="already undone"):
            undo(ledger, done.id)


def test_the_migration_keeps_a_ledger_of_the_previous_schema(
        tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    """A ledger written by the previous schema (its rows in place) is migrated on open: the
    upkeep tables appear, nothing is lost, and a withdrawal can be recorded."""
    newest = max(MIGRATIONS)
    upkeep = next(n for n, migration in MIGRATIONS.items()  # the one adding the upkeep tables
                  if "withdrawals" in (migration.__doc__ or ""))
    path = tmp_path / "ledger.sqlite"
    monkeypatch.setattr(ledger_module, "SCHEMA_VERSION", upkeep - 1)
    with Ledger.create(path) as old:
        source = old.source_id("desk", "scans", {})
        item = old.add_item(source, "a.png", {"state": "stored", "file_sha256": "ab" * 32})
        old.add_file({"sha256": "ab" * 32, "size": 3, "ext": "png", "first_item_id": item})
        old.start_run("cd" * 32, {}, "old")
        assert old.schema_version() == upkeep - 1 and not old.has_table("withdrawals")
    monkeypatch.setattr(ledger_module, "SCHEMA_VERSION", newest)
    with Ledger.open(path) as ledger:
        assert ledger.schema_version() == newest
        assert all(ledger.has_table(t) for t in ("withdrawals", "recipes", "observations"))
        assert ledger.known_sha256s() == {"ab" * 32}
        assert ledger.file("ab" * 32)["removed_at"] is None
        assert uq.run_recipes(ledger)[0].text is None  # older runs: only the sha256 is known
        ledger.add_row("withdrawals", {"item_id": item, "target": "item:1", "reason": "other",
                                       "recorded_at": "2026-12-01T00:00:00.000Z"})
        assert uq.withdrawn_sha256s(ledger) == {"ab" * 32}


def test_an_image_file_names_what_to_withdraw_by_its_bytes(tmp_path: Path) -> None:
    """A copy of a stored picture, wherever it lies, names the stored file by its SHA-256
    (FIPS 180-4), not by its name."""
    col = scans_collection(tmp_path / "c", count=2)
    copy = tmp_path / "renamed-copy.bin"
    copy.write_bytes((col.root / "in" / "1.png").read_bytes())
    with col.ledger() as ledger:
        done = withdraw(col, ledger, str(copy), reason="licence-error")
        assert done.sha256 == hashlib.sha256(copy.read_bytes()).hexdigest()
        assert done.item_id is None and uq.withdrawn_sha256s(ledger) == {done.sha256}
