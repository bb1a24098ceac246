"""`collector gather` and `collector status` on the command line, against the demo archive."""

from __future__ import annotations

import json
import re
import signal
import sqlite3
import subprocess
import sys
import time
from pathlib import Path

import pytest
from support.probes import files_count
from typer.testing import CliRunner

from collector.cli import app
from collector.demo_site import DemoServer
from collector.demo_site.recipes import render
from collector.storage.collection import init_collection, recover

runner = CliRunner()


@pytest.fixture
def demo_folder(fresh_demo_server: DemoServer, demo_content: Path, tmp_path: Path) -> Path:
    """A collection folder with the demo recipe for the running demo server."""
    col = init_collection(tmp_path / "c", contact="x@example.org")
    col.recipe_path.write_text(render("demo", fresh_demo_server.port, demo_content / "scans"))
    return col.root


def test_dry_run_requests_nothing_and_explains_the_estimate(
        demo_folder: Path, fresh_demo_server: DemoServer) -> None:
    """--dry-run lists sources and budgets, says what is unknown, and sends no request."""
    result = runner.invoke(app, ["gather", str(demo_folder), "--dry-run"])
    assert result.exit_code == 0, result.output
    assert "dry run: nothing is requested." in result.output
    assert "api-pages (json_api)" in result.output
    assert "not listed yet: api-pages, api-objects, api-linked, gallery" in result.output
    # The example uses the recipe's own pace: the demo recipe's requests_per_hour = 20000
    # allows one request every 3600 / 20000 = 0.18 s; 20,000 x 0.18 s = 3,600 s.
    assert "20,000 images at one request every 0.18 s take about 60 min" in result.output
    # The demo recipe's [stop] duration = "10m" is the stop the run would have.
    assert re.search(r"^stop: at \d{4}-\d\d-\d\d \d\d:\d\d local time, in 10 min$",
                     result.output, re.MULTILINE)
    assert fresh_demo_server.log == []


@pytest.mark.parametrize("dry", [["--dry-run"], []])
def test_unreadable_stop_options_are_refused_before_anything_starts(
        demo_folder: Path, fresh_demo_server: DemoServer, dry: list[str]) -> None:
    """--until 25:00, --for 8 and --max-items -1 are all named at once, exit 2, for a dry
    run and a real one alike; no run is recorded and nothing is requested."""
    result = runner.invoke(app, ["gather", str(demo_folder), "--until", "25:00", "--for", "8",
                                 "--max-items", "-1", *dry])
    assert result.exit_code == 2
    assert result.stderr.startswith("Error: the command line has 3 problems:")
    assert '--until: must be a local time like "07:00" (24-hour HH:MM), got \'25:00\'' \
        in result.stderr
    assert '"8h" for hours' in result.stderr
    assert "--max-items: must be 0 (no limit) or more, got -1" in result.stderr
    assert fresh_demo_server.log == []
    with sqlite3.connect(demo_folder / "ledger.sqlite") as db:
        assert db.execute("SELECT count(*) FROM runs").fetchone()[0] == 0


def test_dry_run_after_a_partial_run_estimates_the_remaining_images(
        demo_folder: Path, fresh_demo_server: DemoServer) -> None:
    """After a run stopped by --max-items, the dry run counts waiting images per host and
    estimates time from the interval in force (images x interval; hosts in parallel)."""
    first = runner.invoke(app, ["gather", str(demo_folder), "--max-items", "5", "--quiet"])
    assert first.exit_code == 0, first.output
    assert "stopped: 5 new items stored" in first.output
    fresh_demo_server.clear_log()
    result = runner.invoke(app, ["gather", str(demo_folder), "--dry-run"])
    assert result.exit_code == 0
    assert "candidates waiting per host (from earlier listings):" in result.output
    assert "estimated time for the images already listed:" in result.output
    assert fresh_demo_server.log == []


def test_log_json_prints_one_json_object_per_event(demo_folder: Path) -> None:
    """--log-json output is JSON lines with an event name; the run's end is among them."""
    result = runner.invoke(app, ["gather", str(demo_folder), "--max-items", "3",
                                 "--log-json"])
    assert result.exit_code == 0, result.output
    events = [json.loads(line) for line in result.output.splitlines() if line.strip()]
    kinds = {e["event"] for e in events}
    assert {"run_started", "item", "run_ended"} <= kinds
    assert events[-1]["outcome"] == "stopped: 3 new items stored"


def test_status_reports_politeness_per_host(demo_folder: Path) -> None:
    """status shows requests, 429s and time waited per host, and the run's duration."""
    runner.invoke(app, ["gather", str(demo_folder), "--max-items", "3", "--quiet"])
    result = runner.invoke(app, ["status", str(demo_folder)])
    assert result.exit_code == 0
    assert "politeness per host (requests sent; failed:" in result.output
    assert "x 429" in result.output and "waited" in result.output
    assert "1 run taking" in result.output
    as_json = json.loads(runner.invoke(app, ["status", str(demo_folder), "--json"]).output)
    conn = sqlite3.connect(demo_folder / "ledger.sqlite")
    assert as_json["files"] == conn.execute("SELECT count(*) FROM files").fetchone()[0] >= 3
    conn.close()


def test_ctrl_c_finishes_in_flight_files_exits_130_and_says_how_to_resume(
        demo_folder: Path) -> None:
    """SIGINT (Ctrl-C) ends the run cleanly: exit 130 (128 + SIGINT, common practice, no
    source), a resume hint, no temp files, nothing dangling in the ledger."""
    proc = subprocess.Popen([sys.executable, "-m", "collector", "gather", str(demo_folder),
                             "--quiet"], stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                            text=True)
    started = time.monotonic()
    while files_count(demo_folder / "ledger.sqlite") < 3 and time.monotonic() - started < 60:
        time.sleep(0.05)
    proc.send_signal(signal.SIGINT)
    out, err = proc.communicate(timeout=60)
    assert proc.returncode == 130, (out, err)
    assert f"Interrupted. Resume with: collector gather {demo_folder}" in err
    assert "interrupted" in out
    assert list((demo_folder / "files" / ".incoming").iterdir()) == []
    from collector.storage.collection import open_collection

    col = open_collection(demo_folder)
    with col.ledger() as ledger:
        mended = recover(col, ledger)
    assert (mended.temp_files_removed, mended.orphan_files_removed, mended.rows_reset) == (0, 0, 0)


ONE_SOURCE = """contact = "x@example.org"
[budgets]
min_interval = 0.05
[network]
allow_addresses = ["127.0.0.1"]
[images]
min_side = 128
[[sources]]
name = "api-pages"
kind = "json_api"
url = "http://127.0.0.1:{port}/api/v1/specimens"
params = {{ per_page = "10" }}
[sources.pagination]
style = "page"
param = "page"
start = {page}
total_count = "meta.total"
max_pages = 1
[sources.fields]
items = "results"
id = "id"
licence = "rights.licence"
licence_url = "rights.url"
image_url = "image.full"
"""


def test_an_image_the_server_says_is_gone_is_not_asked_for_after_three_runs(
        fresh_demo_server: DemoServer, tmp_path: Path) -> None:
    """A 404 is retried on the next runs, but after three runs that got 404 the item is left
    alone (RFC 9110 section 15.5.5: the server found nothing at that URL). The runs list the
    one page of 10 specimens that holds the planted 404 (its first run asks for its image)."""
    from collector.run.gather import gather

    specimens = [i for i in fresh_demo_server.manifest["items"] if i["source"] == "api-pages"]
    missing = [i for i in specimens if i["reason"] == "http_404"]
    assert missing, "the demo archive plants a 404 among its specimens"
    page = specimens.index(missing[0]) // 10 + 1  # the API lists them in manifest order
    col = init_collection(tmp_path / "c", contact="x@example.org")
    col.recipe_path.write_text(ONE_SOURCE.format(port=fresh_demo_server.port, page=page))
    path = fresh_demo_server.fill(missing[0]["image_url"]).split("/", 3)[3]
    asked = []
    for _ in range(4):
        fresh_demo_server.clear_log()
        result = gather(col)
        asked.append(sum(1 for r in fresh_demo_server.log if r.path == "/" + path))
    assert asked == [1, 1, 1, 0]
    assert result.counts["given_up"] == 1
