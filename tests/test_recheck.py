"""Re-checking a gathered collection after the archive changed: exactly the changes are
reported, unchanged images cost a 304 (conditional requests, RFC 9110 §13.1), nothing stored
is overwritten; the datasheet's change log then lists runs, the recipe change, the withdrawal
and the findings with their dates; recipe history shows the difference."""

from __future__ import annotations

import hashlib
import io
from pathlib import Path
from typing import Any

import pytest
from PIL import Image
from support.collections import Gathered
from support.server import LoopbackServer, json_answer
from typer.testing import CliRunner

from collector.cli import app
from collector.demo_site import DemoServer
from collector.exports.datasheet import export_datasheet
from collector.exports.recipe_history import last_change_line, recipe_diff
from collector.run.gather import gather
from collector.run.recheck import RecheckResult, recheck, report_lines
from collector.run.scheduling import StopRules
from collector.storage import upkeep_queries as uq
from collector.storage.collection import Collection, init_collection
from collector.storage.withdrawals import withdraw

runner = CliRunner()
LICENCE_OF, REMOVED, REPLACED, WITHDRAWN = "FH-S-0001", ("FH-S-0003", "FH-S-0004"), "FH-S-0002", \
    "FH-S-0005"


class _Switch:
    """Stop rules a test can trip while a re-check runs (StopRules is frozen)."""

    deadline: float | None = None


def _store_snapshot(col: Collection) -> dict[str, tuple[str, int]]:
    """Every stored file: its path -> (sha256 of its bytes, mtime in ns)."""
    return {str(p): (hashlib.sha256(p.read_bytes()).hexdigest(), p.stat().st_mtime_ns)
            for _, p in col.store.iter_stored()}


@pytest.fixture(scope="module")
def changed(tmp_path_factory: pytest.TempPathFactory, demo_server: DemoServer,
            page_gathered: Gathered):
    """A collection gathered twice (the recipe changed between), one item withdrawn, then the
    archive changed (one licence, two objects removed, one image's bytes replaced) and a
    re-check run; the archive is restored afterwards. (The resume test, last, adds runs.)
    The first gather is a copy of the session's ``page_gathered`` (conftest.py)."""
    fresh_demo_server = demo_server
    fresh_demo_server.reset()
    assert page_gathered.result.outcome == "finished"
    col = page_gathered.copy_to(tmp_path_factory.mktemp("recheck") / "c")
    recipe = col.recipe_path.read_text()
    col.recipe_path.write_text(recipe.replace("min_interval = 0.1", "min_interval = 0.12"))
    assert gather(col).outcome == "finished"
    with col.ledger() as ledger:
        withdraw(col, ledger, f"key:api-pages:{WITHDRAWN}", reason="licence-error")
    before = _store_snapshot(col)
    changes = fresh_demo_server.change_archive(
        licence_of=LICENCE_OF, new_licence="CC0-1.0", remove=REMOVED, replace=REPLACED)
    fresh_demo_server.clear_log()
    try:
        result = recheck(col)
        log = fresh_demo_server.log
    finally:
        fresh_demo_server.restore_archive()
    return col, result, log, before, changes


def test_the_report_lists_exactly_the_four_changes(changed) -> None:
    """One licence changed (old -> new), two gone (404), one with new bytes; no other item
    is reported as changed."""
    _, result, _, _, changes = changed
    assert result.outcome == "finished"
    found = sorted((f.source_key, f.finding, f.old_value, f.new_value)
                   for f in result.changes())
    old_sha = next(f.old_value for f in result.changes() if f.finding == "changed_bytes")
    assert found == sorted([
        (LICENCE_OF, "licence_changed", "CC-BY-4.0", "CC0-1.0"),
        (REMOVED[0], "gone", None, None), (REMOVED[1], "gone", None, None),
        (REPLACED, "changed_bytes", old_sha, changes.replaced_sha256)])
    assert {f.status for f in result.changes() if f.finding == "gone"} == {404}
    lines = report_lines(result)
    assert any("licence changed: CC-BY-4.0 -> CC0-1.0" in line for line in lines)


def test_unchanged_images_were_answered_304_to_conditional_requests(changed) -> None:
    """Every image the archive did not change was asked for with its stored ETag and
    Last-Modified and answered 304 Not Modified (RFC 9110 §13.1.2, §15.4.5); the withdrawn
    item was not asked for at all (the server's own log)."""
    _, result, log, _, _ = changed
    images = [r for r in log if r.path.startswith("/media/")]
    assert not any(WITHDRAWN in r.path for r in images)
    assert all(r.if_none_match and r.if_modified_since for r in images)
    unchanged = {f.source_key for f in result.findings if f.finding == "unchanged"}
    assert len(unchanged) == 5  # 10 listed - 4 changed - 1 withdrawn
    not_modified = {r.path.rsplit("/", 1)[1].split(".")[0] for r in images if r.status == 304}
    assert not_modified == unchanged | {LICENCE_OF}  # its image did not change


def test_nothing_stored_is_overwritten(changed) -> None:
    """Every stored file keeps its bytes and its time; the new version is one more file."""
    col, result, _, before, changes = changed
    after = _store_snapshot(col)
    assert {p: after[p] for p in before} == before
    assert {sha for sha, _ in after.values()} - {sha for sha, _ in before.values()} == {
        changes.replaced_sha256}
    with col.ledger(readonly=True) as ledger:
        rows = uq.observations(ledger, run_id=result.run_id)
        assert len(rows) == 9 and all(r.observed_at for r in rows)
        item = uq.item_briefs(ledger, item_id=next(
            r.item_id for r in rows if r.finding == "changed_bytes"))[0]
        assert item.file_sha256 != changes.replaced_sha256  # the item still names the old


def test_the_change_log_lists_runs_recipe_change_withdrawal_and_findings(changed,
                                                                        tmp_path: Path) -> None:
    """The datasheet's change log is dated and holds every kind of event; the release says
    from which ledger state it was made."""
    col, result, _, _, _ = changed
    export = export_datasheet(col.root, out=tmp_path / "ds")
    events = export.facts["changelog"]
    kinds = [e["event"] for e in events]
    assert kinds.count("gather run") == 2 and kinds.count("re-check run") == 1
    assert kinds.count("recipe changed") == 1 and kinds.count("withdrawal") == 1
    assert kinds.count("re-check finding") == 4
    assert all(e["date"][:4].isdigit() and "T" in e["date"] for e in events)  # ISO 8601
    assert [e["date"] for e in events] == sorted(e["date"] for e in events)
    state = export.facts["selection"]["ledger_state"]
    assert state["run_id"] == result.run_id
    page = (tmp_path / "ds" / "datasheet.md").read_text()
    assert "recipe changed" in page and "re-check finding" in page
    assert f"Made from the ledger as of run #{result.run_id}" in page
    html = (tmp_path / "ds" / "datasheet.html").read_text()
    assert "re-check finding" in html and "withdrawal" in html


def test_recipe_history_names_the_change(changed) -> None:
    """status says when the recipe last changed; recipe-diff shows the changed line
    (a unified diff, as POSIX diff -u writes it)."""
    col, _, _, _, _ = changed
    with col.ledger(readonly=True) as ledger:
        assert "last changed for run #2" in (last_change_line(ledger) or "")
        lines = recipe_diff(ledger, 1, 2)
    assert "-min_interval = 0.1" in lines and "+min_interval = 0.12" in lines
    out = runner.invoke(app, ["recipe-diff", str(col.root), "2", "3"])
    assert out.exit_code == 0 and "same recipe" in out.output
    assert runner.invoke(app, ["recipe-diff", str(col.root), "1", "99"]).exit_code == 2
    assert "Recipe: last changed" in runner.invoke(app, ["status", str(col.root)]).output


def test_a_second_recheck_adds_rows_and_the_stopped_one_resumes(changed) -> None:
    """A re-check stopped by its time limit is resumed by the next one, which skips nothing
    twice; earlier observations stay."""
    col, first, _, _, _ = changed
    stopped = recheck(col, stop=StopRules(deadline=0.0))
    assert stopped.outcome.startswith("stopped") and stopped.findings == []
    seen: list[int] = []

    def stop_after_three(finding: Any) -> None:
        seen.append(finding.item_id)
        if len(set(seen)) == 3:
            stop.deadline = 0.0  # the next item is not started

    stop = _Switch()
    part = recheck(col, stop=stop, on_finding=stop_after_three)  # type: ignore[arg-type]
    assert part.outcome.startswith("stopped") and part.resumed_from == stopped.run_id
    resumed: RecheckResult = recheck(col)
    assert resumed.resumed_from == part.run_id and resumed.outcome == "finished"
    with col.ledger(readonly=True) as ledger:
        assert len(uq.observations(ledger, run_id=first.run_id)) == 9
        done_before = {o.item_id for o in uq.observations(ledger, run_id=part.run_id)}
        done_now = {o.item_id for o in uq.observations(ledger, run_id=resumed.run_id)}
    assert len(done_before) == 3 and not done_before & done_now  # nothing looked at twice
    assert len(done_before | done_now) == 9  # every kept item not withdrawn
    assert {f.item_id for f in resumed.findings} == done_before | done_now


def test_the_recheck_command_prints_the_report(changed) -> None:
    """The command line prints one line per change and the counts (the archive is back as
    generated now, so the earlier changes read as changes again)."""
    col, _, _, _, _ = changed
    result = runner.invoke(app, ["recheck", str(col.root), "--all"])
    assert result.exit_code == 0, result.output
    assert "Re-check run #" in result.output and "Findings: " in result.output
    assert "unchanged" in result.output  # --all lists unchanged items too


def _png() -> bytes:
    """A real 200x150 PNG (a Mandelbrot detail)."""
    buf = io.BytesIO()
    Image.effect_mandelbrot((200, 150), (-2, -1, 1, 1), 50).convert("RGB").save(buf, "PNG")
    return buf.getvalue()


def test_an_image_that_now_redirects_is_reported_moved_once(tmp_path: Path) -> None:
    """An image URL that starts to redirect (301, RFC 9110 §15.4.2) is reported moved, old ->
    new; the next re-check, which lands at the same place again, reports it unchanged."""
    data = _png()
    etag = '"v1"'
    with LoopbackServer("127.0.0.1") as srv:
        srv.route("/api", json_answer({"results": [
            {"id": "a", "img": f"{srv.base}/img/a.png", "lic": "CC0-1.0"}]}))

        def image(h: Any) -> Any:
            if h.headers.get("If-None-Match") == etag:
                return 304, b"", {"ETag": etag}
            return 200, data, {"Content-Type": "image/png", "ETag": etag}

        srv.route("/img/a.png", image)
        col = init_collection(tmp_path / "c", contact="me@example.org")
        col.recipe_path.write_text(
            'contact = "me@example.org"\n[network]\nallow_addresses = ["127.0.0.1"]\n'
            '[budgets]\nmin_interval = 0.05\n'
            f'[[sources]]\nname = "web"\nkind = "json_api"\nurl = "{srv.base}/api"\n'
            '[sources.fields]\nitems = "results"\nid = "id"\nimage_url = "img"\n'
            'licence = "lic"\n')
        assert gather(col).outcome == "finished"
        srv.route("/img/a.png", (301, b"", {"Location": f"{srv.base}/img/b.png"}))
        srv.route("/img/b.png", image)
        first = recheck(col)
        second = recheck(col)
    assert [(f.finding, f.old_value, f.new_value, f.status) for f in first.findings] == [
        ("moved", f"{srv.base}/img/a.png", f"{srv.base}/img/b.png", 304)]
    assert [f.finding for f in second.findings] == ["unchanged"]
