"""collector trace over a collection built by the real gather (scans source, no network)."""

from __future__ import annotations

from pathlib import Path

from PIL import Image
from typer.testing import CliRunner

from collector.cli import app
from collector.exports.trace import Tracer
from collector.run.gather import gather
from collector.storage.collection import init_collection
from tests.test_trace import make_picture

runner = CliRunner()


def test_every_file_a_gather_stored_traces_exactly_and_crops_name_their_scan(tmp_path: Path
                                                                              ) -> None:
    """After a real gather of a scanner bed, each stored file traces to its item; crops give
    the scan and a box inside it."""
    col = init_collection(tmp_path / "c", contact="me@example.org")
    scans = col.root / "scans"
    scans.mkdir()
    bed = Image.new("RGB", (900, 520), (255, 255, 255))
    bed.paste(make_picture(1, (300, 220)), (40, 40))
    bed.paste(make_picture(2, (320, 240)), (500, 220))
    bed.save(scans / "bed-01.png")
    col.recipe_path.write_text(col.recipe_path.read_text() + (
        '\n[[sources]]\nname = "scanner"\nkind = "scans"\npath = "scans"\n'
        'include = ["*.png"]\ncreator = "Fernhollow Field Society"\nlicence = "CC-BY-4.0"\n'
        "[sources.split]\nmin_area = 2000\npadding = 0\n"))
    gather(col, fetcher_factory=lambda recipe, ledger: None)
    stored = list(col.store.iter_stored())
    assert len(stored) == 3  # the scan and its two crops
    crops = []
    with Tracer.open(col.root) as tracer:
        for _sha, path in stored:
            result = tracer.trace_file(path)
            assert result.kind == "exact" and result.item is not None
            assert result.item.source == "scanner" and result.item.spdx_id == "CC-BY-4.0"
            if result.item.parent_sha256:
                crops.append(result.item)
    assert len(crops) == 2
    for crop in crops:
        assert crop.scan is not None and crop.scan.local_path is not None
        assert Path(crop.scan.local_path).name == "bed-01.png"
        x, y, w, h = crop.crop_box or [0, 0, 0, 0]
        assert min(x, y) >= 0 and x + w <= 900 and y + h <= 520 and w * h >= 2000
    mirrored = tmp_path / "mirrored.png"
    make_picture(2, (320, 240)).transpose(Image.Transpose.FLIP_LEFT_RIGHT).save(mirrored)
    out = runner.invoke(app, ["trace", str(mirrored), "--in", str(col.root)])
    assert out.exit_code == 0 and "probably a mirrored copy of" in out.output
