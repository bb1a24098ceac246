"""collector remeasure: the facts of files gathered by an older collector brought up to date
from the store, offline, equal to what a fresh gather records.

An "old collection" is made honestly: a real gather (the facts a fresh ingest records are the
reference), then its ledger is set back to what the first hash pipeline and the ledgers before
schemas 8 and 10 held: ``hash_algo`` "dct-phash-64/draft-v1" with the hashes that pipeline
made (greyscale by Pillow's ``convert("L")``, which clips 16-bit values instead of scaling
them, issue 14, and drops transparency), and NULL transparency share, native size and colour
facts.
"""

from __future__ import annotations

import json
import shutil
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from PIL import Image
from support.collections import Gathered, scan_image
from typer.testing import CliRunner

from collector.checks.colour_facts import COLOUR_ALGO
from collector.checks.phash import (
    HASH_ALGO,
    hamming,
    phash_from_image,
    to_signed64,
    to_unsigned64,
)
from collector.cli import app
from collector.errors import CollectionError
from collector.run.gather import gather
from collector.run.remeasure import (
    ALL_DONE_UPTO,
    MEASUREMENTS,
    Measurement,
    RemeasureResult,
    note_text,
    remeasure,
    report_lines,
)
from collector.storage import hashindex
from collector.storage.collection import Collection, init_collection
from collector.storage.withdrawals import withdraw

runner = CliRunner()
OLD_ALGO = "dct-phash-64/draft-v1"  # the first pipeline's name (collector.checks.phash, v2 note)
FACTS = ("phash", "phash_mirror", "hash_algo", "flags", "transparent_share", "native_width",
         "native_height", "greyscale", "brightness", "contrast", "colourfulness", "sharpness",
         "background_share", "colours", "window_hashes", "window_algo", "colour_algo")
NULLED = FACTS[4:]  # the columns of schemas 8, 10, 12, 14: NULL in a ledger from before them
SOURCE = ('\n[[sources]]\nname = "desk"\nkind = "scans"\npath = "in"\n'
          'include = ["*.png", "*.tif", "*.jpg"]\nlicence = "CC0-1.0"\n')


def sixteen_bit(seed: int) -> Image.Image:
    """A structured picture as 16-bit grey (I;16, values 1000..64750): every value is above
    255, so the clipping convert("L") of the first pipeline makes it a white page."""
    grey = np.asarray(colour_picture(seed, (128, 96)).convert("L")).astype(np.uint32)
    return Image.fromarray((1000 + grey * 250).astype(np.uint16))


def colour_picture(seed: int, size: tuple[int, int]) -> Image.Image:
    """A colourful picture with structure: a seeded random 6x8 colour grid, enlarged smoothly."""
    grid = np.random.default_rng(seed).integers(0, 256, (6, 8, 3), dtype=np.uint8)
    return Image.fromarray(grid).resize(size, Image.Resampling.BICUBIC)


def cutout(seed: int) -> Image.Image:
    """A picture on a transparent background (RGBA, the outer ring fully transparent)."""
    im = colour_picture(seed, (128, 96)).convert("RGBA")
    alpha = Image.new("L", im.size, 0)
    alpha.paste(255, (24, 16, 104, 80))
    im.putalpha(alpha)
    return im


def write_inputs(folder: Path) -> None:
    """16-bit PNG and TIFF scans, transparent RGBA and palette PNGs, colour JPEGs, and two
    PNGs that will be withdrawn with their bytes deleted and lost from the store."""
    folder.mkdir()
    sixteen_bit(1).save(folder / "deep.png")
    sixteen_bit(2).save(folder / "deep.tif")
    cutout(3).save(folder / "cutout.png")
    pal = cutout(4).convert("RGB").quantize(16)
    pal.info["transparency"] = 0
    pal.save(folder / "palette.png", transparency=0)
    colour_picture(5, (200, 150)).save(folder / "photo.jpg", quality=90)
    scan_image(6, (160, 120)).convert("L").save(folder / "greyphoto.jpg", quality=90)
    scan_image(7, (128, 96)).save(folder / "gone.png")
    scan_image(8, (128, 96)).save(folder / "lost.png")


@pytest.fixture(scope="module")
def gathered(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, dict[str, dict]]:
    """A collection gathered from local files (no network), enlarged = "flag" so a JPEG's
    native size is estimated too, and the facts its fresh ingest recorded, by source key."""
    col = init_collection(tmp_path_factory.mktemp("remeasure") / "c", contact="me@example.org")
    write_inputs(col.root / "in")
    text = col.recipe_path.read_text().replace('enlarged = "keep" ', 'enlarged = "flag" ')
    col.recipe_path.write_text(text + SOURCE)
    assert gather(col, fetcher_factory=lambda recipe, ledger: None).outcome == "finished"
    return col.root, facts_by_key(col)


def facts_by_key(col: Collection) -> dict[str, dict[str, Any]]:
    """The measured facts of every stored file, by the source key of its first item."""
    with col.ledger(readonly=True) as ledger:
        rows = ledger.query(f"SELECT i.source_key, f.sha256, {', '.join('f.' + c for c in FACTS)}"
                            " FROM files f JOIN items i ON i.id = f.first_item_id")
    return {r.pop("source_key"): {**r, "flags": json.loads(r["flags"] or "[]")} for r in rows}


def first_pipeline_hash(path: Path) -> tuple[int, int]:
    """(pHash, mirror) as the first pipeline made them: a JPEG's luma draft, then Pillow's
    convert("L") (16-bit values clipped, transparency dropped), then the DCT hash."""
    with Image.open(path) as im:
        if im.format == "JPEG":
            im.draft("L", (64, 64))
        return phash_from_image(im.convert("L"))


def make_old(root: Path) -> Collection:
    """A copy of the gathered collection, its ledger set back to an old collector's."""
    copy = root.parent / f"old-{len(list(root.parent.iterdir()))}"
    shutil.copytree(root, copy)
    col = Collection(copy)
    with col.ledger() as ledger:
        for sha, flags in ledger.rows("SELECT sha256, flags FROM files"):
            old, mirror = first_pipeline_hash(col.store.find(sha))  # type: ignore[arg-type]
            kept = [f for f in json.loads(flags or "[]") if f != "blank"]
            ledger.db.execute(
                "UPDATE files SET hash_algo = ?, phash = ?, phash_mirror = ?, flags = ?, "
                + ", ".join(f"{c} = NULL" for c in NULLED) + " WHERE sha256 = ?",
                [OLD_ALGO, to_signed64(old), to_signed64(mirror), json.dumps(kept), sha])
        ledger.db.conn.commit()
    return col


def item_id(col: Collection, key: str) -> int:
    with col.ledger(readonly=True) as ledger:
        return int(ledger.scalar("SELECT id FROM items WHERE source_key = ?", (key,)))


@pytest.fixture(scope="module")
def remeasured(gathered) -> tuple[Collection, dict, RemeasureResult, dict]:
    """The old copy, with one file withdrawn (bytes deleted), one file's bytes lost, the second
    16-bit scan judged a near duplicate of the first (as the clipped hashes made it: distance 0);
    then remeasured. Also returns the hash file's answer for a white page before."""
    root, fresh = gathered
    col = make_old(root)
    with col.ledger() as ledger:
        withdraw(col, ledger, "key:desk:gone.png", reason="other", delete_bytes=True)
        ledger.db.execute("UPDATE items SET state = 'near_duplicate', reason = 'near_duplicate',"
                          " duplicate_of = ?, near_distance = 0 WHERE source_key = 'deep.tif'",
                          [item_id(col, "deep.png")])
        ledger.db.conn.commit()
        before = indexed(hashindex.HashFile.open(ledger, col.hash_index_path))
    col.store.find(fresh["lost.png"]["sha256"]).unlink()  # type: ignore[union-attr]
    result = remeasure(col)
    return col, fresh, result, before


def indexed(hash_file: hashindex.HashFile) -> dict[str, int]:
    """sha256 -> unsigned pHash, as the hash file behind trace holds them."""
    return {hash_file.keys[i].tobytes().hex(): int(hash_file.hashes[i])
            for i in range(len(hash_file))}


def test_the_old_16bit_hashes_were_a_blank_page(gathered) -> None:
    """The premise, on the real files: the first pipeline hashed both 16-bit scans exactly
    like a white page (issue 14: 0x8000000000000000), the current one does not."""
    root, fresh = gathered
    white = phash_from_image(Image.new("L", (128, 96), 255))[0]
    assert white == 0x8000000000000000  # issue 14's value for a flat white page
    for key in ("deep.png", "deep.tif"):
        path = Collection(root).store.find(fresh[key]["sha256"])
        assert first_pipeline_hash(path)[0] == white  # type: ignore[arg-type]
        assert fresh[key]["phash"] != to_signed64(white) and "blank" not in fresh[key]["flags"]


def test_remeasured_facts_equal_a_fresh_gather(remeasured) -> None:
    """Every fact of every file still in the store equals what its fresh ingest recorded:
    hashes (current HASH_ALGO), blank flag, transparency share, native size, colour facts."""
    col, fresh, result, _ = remeasured
    now = facts_by_key(col)
    measured = set(fresh) - {"gone.png", "lost.png"}
    assert len(measured) == 6
    for key in measured:
        assert now[key] == fresh[key], key
        assert now[key]["hash_algo"] == HASH_ALGO
    assert now["cutout.png"]["transparent_share"] > 0.3  # the transparent ring, measured
    assert now["palette.png"]["transparent_share"] > 0
    assert now["photo.jpg"]["native_width"] is not None  # the JPEG path with enlarged = flag
    assert now["greyphoto.jpg"]["greyscale"] == 1 and now["photo.jpg"]["greyscale"] == 0
    assert now["photo.jpg"]["window_hashes"] is not None  # crops findable again
    assert result.outcome == "finished" and result.measured == 6
    with col.ledger(readonly=True) as ledger:
        notes = ledger.rows("SELECT message FROM notes WHERE kind = 'remeasured'")
    assert [n[0] for n in notes] == [note_text(result)]
    assert notes[0][0].startswith("6 of 8 stored files measured again offline")


def test_withdrawn_and_lost_files_are_skipped_and_reported(remeasured) -> None:
    """The withdrawn file whose bytes were deleted is skipped and counted; the file whose bytes
    are missing is reported as missing and keeps its old facts; the others were measured."""
    col, fresh, result, _ = remeasured
    assert result.removed == 1
    assert [(p.sha256, p.kind) for p in result.problems] == [
        (fresh["lost.png"]["sha256"], "missing")]
    now = facts_by_key(col)
    assert now["lost.png"]["hash_algo"] == OLD_ALGO and now["lost.png"]["greyscale"] is None
    assert now["gone.png"]["hash_algo"] == OLD_ALGO
    counts = {name: (c.due, c.measured) for name, c in result.counts.items()}
    assert counts == {"perceptual hashes": (7, 6), "transparency and native size": (7, 6),
                      "colour and tone facts": (7, 6), "crop window hashes": (7, 6)}


def test_moved_hashes_are_listed_with_their_near_verdicts(remeasured) -> None:
    """Both 16-bit scans moved far from the blank-page hash; the near-duplicate verdict the
    clipped hashes made (deep.tif a copy of deep.png) is listed with both, not changed."""
    col, fresh, result, _ = remeasured
    moved = {m.sha256: m for m in result.moved}
    tif = item_id(col, "deep.tif")
    png = item_id(col, "deep.png")
    for key in ("deep.png", "deep.tif"):
        found = moved[fresh[key]["sha256"]]
        assert found.distance > result.near_distance == 8
        (check,) = found.near
        assert (check.item_id, check.original_id) == (tif, png)
        assert check.distance is not None and check.distance > 8  # not copies of each other
    lines = report_lines(result)
    judged = f"item #{tif} was judged a near duplicate of item #{png}: "
    assert sum(judged in line and "probably not a copy" in line for line in lines) == 2
    with col.ledger(readonly=True) as ledger:
        assert ledger.scalar("SELECT state FROM items WHERE id = ?", (tif,)) == "near_duplicate"


def test_the_hash_file_holds_the_new_hashes(remeasured) -> None:
    """Before: the hash file behind trace held a white page's hash for both 16-bit scans;
    after remeasuring it is rebuilt from the ledger (in step with it) and holds the hashes a
    fresh gather made, far from the white page's."""
    col, fresh, _, before = remeasured
    white = phash_from_image(Image.new("L", (128, 96), 255))[0]
    with col.ledger(readonly=True) as ledger:
        after = hashindex.HashFile.open(ledger, col.hash_index_path)
        assert after.mark == hashindex.ledger_mark(ledger) and after.mark.generation >= 1
    now = indexed(after)
    for key in ("deep.png", "deep.tif"):
        sha = fresh[key]["sha256"]
        assert before[sha] == white
        assert now[sha] == to_unsigned64(fresh[key]["phash"])
        assert hamming(now[sha], white) > 8


def test_trace_finds_the_16bit_scan_only_after_remeasuring(gathered, remeasured,
                                                          tmp_path: Path) -> None:
    """An 8-bit copy of a 16-bit scan traces to nothing in the old collection (its stored
    hash is a blank page's) and to the scan once remeasured; a white page traces to neither."""
    root, fresh = gathered
    col = remeasured[0]
    sixteen_bit(1).point(lambda v: v / 256).convert("L").save(tmp_path / "copy.png")
    Image.new("L", (128, 96), 255).save(tmp_path / "white.png")
    old = make_old(root)

    def traced(where: Path, name: str) -> dict[str, Any]:
        out = runner.invoke(app, ["trace", str(tmp_path / name), "--in", str(where), "--json"])
        return json.loads(out.stdout)["results"][0]

    assert traced(old.root, "copy.png")["kind"] == "none"
    found = traced(col.root, "copy.png")
    assert found["kind"] == "near"
    assert found["near"][0]["file"]["sha256"] == fresh["deep.png"]["sha256"]
    assert traced(col.root, "white.png")["kind"] == "none"


def test_a_second_run_finds_nothing_due_and_all_changes_nothing(gathered) -> None:
    """Once up to date nothing is due; --all measures every kept file again and changes no
    value (the same functions as ingest, so the same facts)."""
    col = make_old(gathered[0])
    remeasure(col)
    again = remeasure(col)
    assert again.measured == 0 and all(c.due == 0 for c in again.counts.values())
    every = remeasure(col, everything=True)
    assert every.measured == 8 and all(c.changed == 0 for c in every.counts.values())
    with col.ledger(readonly=True) as ledger:
        assert not ledger.fact(ALL_DONE_UPTO)


def test_status_tells_of_files_measured_before_until_remeasured(gathered) -> None:
    """collector status names the stored files an older collector measured (old hash
    pipeline, no transparency share or crop windows) and the command that updates them; the
    line is gone once remeasure ran."""
    col = make_old(gathered[0])
    before = runner.invoke(app, ["status", str(col.root), "--json"])
    assert json.loads(before.output)["measured_before"] == 8  # every stored file
    assert "collector remeasure" in runner.invoke(app, ["status", str(col.root)]).output
    remeasure(col)
    after = runner.invoke(app, ["status", str(col.root)])
    assert "measured by an older collector" not in after.output
    assert json.loads(runner.invoke(app, ["status", str(col.root), "--json"]).output)[
        "measured_before"] == 0


def test_dry_run_counts_and_changes_nothing(gathered) -> None:
    """--dry-run counts the files due per fact and leaves the ledger as it was."""
    col = make_old(gathered[0])
    before = facts_by_key(col)
    result = remeasure(col, dry_run=True)
    assert result.due == 8 and result.measured == 0
    assert {c.due for c in result.counts.values()} == {8}
    assert facts_by_key(col) == before


def test_an_interrupted_run_keeps_whole_batches_and_resumes(gathered) -> None:
    """Ctrl-C after the first batch of 3: those 3 files have all their new facts, the rest
    all their old ones (one transaction per batch); the next run measures only the rest."""
    col = make_old(gathered[0])

    def stop(result: RemeasureResult) -> None:
        raise KeyboardInterrupt

    first = remeasure(col, progress=stop, batch=3)
    assert first.outcome == "interrupted" and first.measured == 3
    algos = [f["hash_algo"] for f in facts_by_key(col).values()]
    colours = [f["greyscale"] is not None for f in facts_by_key(col).values()]
    assert sorted(algos) == sorted([HASH_ALGO] * 3 + [OLD_ALGO] * 5)
    assert sum(colours) == 3
    rest = remeasure(col, batch=3)
    assert rest.outcome == "finished" and rest.measured == 5


def test_colour_facts_computed_the_first_way_are_computed_again(gathered) -> None:
    """Facts an older collector computed (``colour_algo`` NULL: the first way, before schema
    14) are due for the colour facts alone, made again as a fresh gather makes them (with
    the current COLOUR_ALGO); facts of the current way are not due. collector status counts
    the file among those measured by an older collector until then."""
    root, fresh = gathered
    copy = root.parent / f"old-{len(list(root.parent.iterdir()))}"
    shutil.copytree(root, copy)
    col = Collection(copy)
    photo = fresh["photo.jpg"]["sha256"]
    with col.ledger() as ledger:
        ledger.db.execute("UPDATE files SET colour_algo = NULL, colourfulness = 0, colours = "
                          "'[]' WHERE sha256 = ?", [photo])
        ledger.db.conn.commit()
    status = runner.invoke(app, ["status", str(col.root), "--json"])
    assert json.loads(status.output)["measured_before"] == 1  # its colour facts alone
    result = remeasure(col)
    counts = {name: (c.due, c.measured, c.changed) for name, c in result.counts.items()}
    assert counts["colour and tone facts"] == (1, 1, 1)
    assert all(c == (0, 0, 0) for name, c in counts.items() if name != "colour and tone facts")
    now = facts_by_key(col)
    assert now == fresh and now["photo.jpg"]["colour_algo"] == COLOUR_ALGO
    assert remeasure(col).due == 0  # measured the current way: nothing more to do
    status = runner.invoke(app, ["status", str(col.root), "--json"])
    assert json.loads(status.output)["measured_before"] == 0


def test_an_interrupted_all_run_resumes_where_it_stopped(gathered) -> None:
    """--all remembers the last batch it finished; the next --all starts after it."""
    col = make_old(gathered[0])

    def stop(result: RemeasureResult) -> None:
        raise KeyboardInterrupt

    assert remeasure(col, everything=True, progress=stop, batch=5).measured == 5
    rest = remeasure(col, everything=True, batch=5)
    assert rest.resumed_after > 0 and rest.measured == 3 and rest.looked == 3


def test_it_refuses_to_run_during_a_gather_and_holds_the_lock(gathered) -> None:
    """The collection's gather lock is held: a remeasure refuses with the lock's message;
    while a remeasure runs, it holds the lock a gather needs."""
    col = make_old(gathered[0])
    with col.gather_lock(), pytest.raises(CollectionError,
                                          match="another gather is already running"):
        remeasure(col, dry_run=True)
    refused = []

    def try_to_gather(result: RemeasureResult) -> None:
        with pytest.raises(CollectionError,
                           match="'collector remeasure' is already running"), col.gather_lock():
            pass
        refused.append(result.looked)

    remeasure(col, progress=try_to_gather, batch=4)
    assert refused == [4, 8]


def test_the_command_reports_and_exits_1_for_a_missing_file(gathered) -> None:
    """collector remeasure prints what changed per fact and names the missing file (exit 1);
    --dry-run first says what would be measured and names the missing file too."""
    root, fresh = gathered
    col = make_old(root)
    col.store.find(fresh["lost.png"]["sha256"]).unlink()  # type: ignore[union-attr]
    dry = runner.invoke(app, ["remeasure", str(col.root), "--dry-run"])
    assert dry.exit_code == 1, dry.output
    assert "would measure 8" in dry.output and "perceptual hashes: 8 due" in dry.output
    assert f"missing: {fresh['lost.png']['sha256'][:16]}" in dry.output
    out = runner.invoke(app, ["remeasure", str(col.root)])
    assert out.exit_code == 1, out.output
    assert "measured 7" in out.output
    assert f"missing: {fresh['lost.png']['sha256'][:16]}" in out.output
    assert "moved by more than near_distance = 8 bits" in out.output


def test_nothing_is_requested(page_gathered: Gathered, fresh_demo_server,
                              tmp_path: Path) -> None:
    """A collection gathered from the demo archive (a copy of the session's one-page gather,
    conftest.py) is remeasured (--all) with the archive's server watching: its request log
    stays empty, and the facts are back."""
    assert page_gathered.result.outcome == "finished"
    col = page_gathered.copy_to(tmp_path / "web")
    fresh = facts_by_key(col)
    old = make_old(col.root)
    fresh_demo_server.clear_log()
    result = remeasure(old, everything=True)
    assert fresh_demo_server.log == []
    assert result.measured == len(fresh) > 0 and facts_by_key(old) == fresh


def test_hash_file_is_rebuilt_after_hashes_rewritten_in_place(gathered) -> None:
    """A hash rewritten in place does not change the files table's row count or last row, so
    only the hash generation (raised in the same transaction) tells the hash file is stale."""
    col = make_old(gathered[0])
    with col.ledger() as ledger:
        path = col.hash_index_path
        hashindex.HashFile.open(ledger, path)
        sha = ledger.rows("SELECT sha256 FROM files LIMIT 1")[0][0]
        with ledger.transaction():
            ledger.update_file(sha, {"phash": to_signed64(0x0123456789ABCDEF)})
        stale = hashindex.HashFile.open(ledger, path)
        assert not stale.nearest(0x0123456789ABCDEF, None, 0)  # the mark did not move
        with ledger.transaction():
            hashindex.note_hashes_rewritten(ledger)
        fresh = hashindex.HashFile.open(ledger, path)
        assert [m.sha256 for m in fresh.nearest(0x0123456789ABCDEF, None, 0)] == [sha]


def test_a_damaged_stored_file_is_reported_and_the_rest_measured(gathered) -> None:
    """A stored file cut short (its bytes damaged on disk) is reported unreadable with the
    image check's reason; every other file is measured."""
    root, fresh = gathered
    col = make_old(root)
    stored = col.store.find(fresh["photo.jpg"]["sha256"])
    assert stored is not None
    stored.write_bytes(stored.read_bytes()[:400])
    result = remeasure(col)
    assert [(p.kind, p.detail.split(":")[0]) for p in result.problems] == [
        ("unreadable", "broken_image")]
    assert result.measured == 7


def test_a_new_fact_is_one_measurement(gathered) -> None:
    """A measurement given as one entry (which files are due, compute, the default write to
    the files row) is run like the built-in ones: here the stored size, zeroed first."""
    col = make_old(gathered[0])
    with col.ledger() as ledger:
        ledger.db.execute("UPDATE files SET size = 0")
        ledger.db.conn.commit()

    def due(ledger: Any, after: int, last: int, settings: Any) -> set[str]:
        return {r[0] for r in ledger.rows("SELECT sha256 FROM files WHERE rowid > ? AND "
                                          "rowid <= ? AND size = 0", (after, last))}

    size = Measurement("stored size", due, lambda r: {"size": r.path.stat().st_size})
    result = remeasure(col, measurements=(size,))
    assert result.counts["stored size"].changed == 8
    with col.ledger(readonly=True) as ledger:
        for sha, stored_size in ledger.rows("SELECT sha256, size FROM files"):
            assert stored_size == col.store.find(sha).stat().st_size  # type: ignore[union-attr]


def test_ctrl_c_inside_a_batch_loses_only_that_batch(gathered) -> None:
    """Ctrl-C while the second batch is being measured: the first batch is written and
    counted, nothing of the second is (its transaction never began)."""
    col = make_old(gathered[0])
    calls = []

    def compute(reading: Any) -> dict[str, Any]:
        calls.append(reading.sha256)
        if len(calls) == 5:  # the second file of the second batch of 3
            raise KeyboardInterrupt
        return {}

    def every(ledger: Any, after: int, last: int, settings: Any) -> set[str]:
        return {r[0] for r in ledger.rows("SELECT sha256 FROM files WHERE rowid > ? AND "
                                          "rowid <= ?", (after, last))}

    interrupting = Measurement("interrupting", every, compute)
    result = remeasure(col, measurements=(*MEASUREMENTS, interrupting), batch=3)
    assert result.outcome == "interrupted" and result.measured == 3
    assert result.counts["perceptual hashes"].measured == 3
    algos = sorted(f["hash_algo"] for f in facts_by_key(col).values())
    assert algos == sorted([HASH_ALGO] * 3 + [OLD_ALGO] * 5)


def test_the_new_facts_are_judged_by_the_pixel_rules(page_gathered: Gathered,
                                                     fresh_demo_server, tmp_path: Path) -> None:
    """A web collection from before the colour facts, its recipe given a rule since
    (min_colourfulness at the median of the fresh facts) and one file set aside by a stale
    verdict: `collector remeasure` sets aside exactly the files whose new colourfulness is
    under the rule's minimum (a rule is failed below its min_*, README "Setting pictures
    aside"), brings the stale one back, records each move in rule_changes as apply-rules
    does, prints the moves, and asks the archive nothing."""
    col = page_gathered.copy_to(tmp_path / "web")
    fresh = facts_by_key(col)
    old = make_old(col.root)
    values = sorted(f["colourfulness"] for f in fresh.values())
    floor = (values[len(values) // 2 - 1] + values[len(values) // 2]) / 2
    dull = {f["sha256"] for f in fresh.values() if f["colourfulness"] < floor}
    stale = max(fresh.values(), key=lambda f: f["colourfulness"])["sha256"]
    assert 0 < len(dull) < len(fresh) and stale not in dull
    old.recipe_path.write_text(old.recipe_path.read_text()
                               + f'\n[[pixel_rules]]\nname = "dull"\nmin_colourfulness = {floor}\n')
    with old.ledger() as ledger:
        ledger.update_file(stale, {"set_aside": "dull", "set_aside_detail": "an old verdict"})
    fresh_demo_server.clear_log()
    out = runner.invoke(app, ["remeasure", str(old.root)])
    assert fresh_demo_server.log == []
    assert out.exit_code == 0, out.output
    with old.ledger(readonly=True) as ledger:
        aside = {r["sha256"] for r in ledger.query(
            "SELECT sha256 FROM files WHERE set_aside = 'dull'")}
        changes = ledger.query("SELECT sha256, rule_before, rule_after, recipe_sha256 "
                               "FROM rule_changes")
    assert aside == dull
    assert sorted((c["sha256"], c["rule_before"], c["rule_after"]) for c in changes) == sorted(
        [(sha, None, "dull") for sha in dull] + [(stale, "dull", None)])
    assert {c["recipe_sha256"] for c in changes} == {old.recipe(check_source_kinds=False).sha256}
    assert f"  {len(dull)} were set aside, 1 brought back" in out.output
    assert out.output.count("set aside: ") == len(dull)
    assert "brought back: " in out.output and stale[:12] in out.output
    # The state apply-rules would leave: it finds nothing more to move.
    again = runner.invoke(app, ["apply-rules", str(old.root), "--dry-run"])
    assert "0 would be set aside, 0 brought back, 0 with a new reason" in again.output


def test_without_pixel_rules_nothing_moves(gathered) -> None:
    """A recipe without pixel rules: remeasure applies none, moves nothing and says so in
    one line."""
    result = remeasure(make_old(gathered[0]))
    assert result.rules is not None and result.rules.moves == []
    assert "The recipe has no pixel rules: no file was set aside or brought back." in (
        report_lines(result))
