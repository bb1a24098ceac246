"""`collector demo` (what `make demo` runs): the whole job on the embedded archive."""

from __future__ import annotations

from pathlib import Path

import pytest
from support.browser import assert_opens_without_console_errors, needs_chromium
from typer.testing import CliRunner

from collector.cli import app
from collector.demo import prepare_folder, run_demo
from collector.errors import CollectionError
from collector.exports.trace import Tracer


@pytest.fixture(scope="module")
def demo_result(demo_content: Path, tmp_path_factory: pytest.TempPathFactory):
    """One demo run on an ephemeral port into a new folder."""
    folder = tmp_path_factory.mktemp("demo") / "demo-collection"
    return run_demo(folder, port=0, content=demo_content)


def test_demo_gathers_traces_and_writes_the_datasheet(demo_result) -> None:
    """The demo finishes, stores files, and writes datasheet.html and croissant.json."""
    assert demo_result.run.outcome == "finished"
    assert not demo_result.resumed
    assert len(list(demo_result.collection.store.iter_stored())) > 50
    assert (demo_result.datasheet_dir / "datasheet.html").is_file()
    assert (demo_result.datasheet_dir / "croissant.json").is_file()


def test_demo_copy_traces_as_a_near_match_of_the_exact_file(demo_result) -> None:
    """The resized copy the demo makes traces as 'near' to the stored file it came from."""
    with Tracer.open(demo_result.collection.root) as tracer:
        exact = tracer.trace_file(demo_result.exact_file)
        near = tracer.trace_file(demo_result.near_copy)
    assert exact.kind == "exact" and near.kind == "near"
    assert near.near[0].file.sha256 == exact.file.sha256 == exact.sha256


def test_demo_rerun_resumes_and_says_so(demo_result, demo_content: Path) -> None:
    """Running the demo again on the same folder resumes it (no image fetched twice is
    checked in test_gather_demo)."""
    again = run_demo(demo_result.collection.root, port=0, content=demo_content,
                     datasheet=False)
    assert again.resumed and again.run.outcome == "finished"
    assert again.run.counts["already_done"] > 50


def test_demo_refuses_a_folder_that_is_not_a_collection(tmp_path: Path) -> None:
    """A non-empty folder that is not a collection is never deleted or written to."""
    (tmp_path / "mine.txt").write_text("keep")
    with pytest.raises(CollectionError, match="not a collection; nothing was changed"):
        prepare_folder(tmp_path, fresh=True)
    assert (tmp_path / "mine.txt").read_text() == "keep"


def test_demo_help_has_an_example() -> None:
    """`collector demo --help` explains the demo and shows an example."""
    result = CliRunner().invoke(app, ["demo", "--help"])
    assert result.exit_code == 0 and "Example: collector demo --fresh" in result.output


def test_demo_datasheet_has_the_diversity_panel(demo_result) -> None:
    """The demo's datasheet shows the diversity panel: in the HTML with its plots (the hue
    wheel among them) and tables, in the Markdown as tables, with the effective numbers
    named after their source (Hill 1973)."""
    html = (demo_result.datasheet_dir / "datasheet.html").read_text(encoding="utf-8")
    md = (demo_result.datasheet_dir / "datasheet.md").read_text(encoding="utf-8")
    for plot in ("div-shares", "div-hues", "div-tones", "div-sizes"):
        assert f'<figure class="panel" id="plot-{plot}">' in html, plot
    for table in ("t-div-sources", "t-div-creators", "t-div-licences", "t-div-decades",
                  "t-div-effective", "t-div-hues", "t-div-tones", "t-div-sizes", "t-div-near"):
        assert f'<table id="{table}">' in html and f'<a id="{table}"></a>' in md, table
    for page in (html, md):
        assert "composition.diversity" in page and "Hill numbers (M. O. Hill" in page
    assert "<svg" not in md and "| 0° red (345–15°) |" in md


@needs_chromium
def test_demo_datasheet_opens_in_headless_chromium(demo_result, tmp_path: Path) -> None:
    """The demo's datasheet, diversity panel included, renders in headless Chromium with no
    console error."""
    assert_opens_without_console_errors(demo_result.datasheet_dir / "datasheet.html",
                                        tmp_path / "demo.png")
