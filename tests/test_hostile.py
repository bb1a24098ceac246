"""A real gather against the hostile archive: every misbehaviour in ``demo_site.hostile.CASES``
ends in its ledger reason, the normal item is still stored, memory stays bounded, nothing is
written outside the collection folder and no connection reaches an address the recipe does
not allow.

One ``collector gather`` subprocess runs the whole table (its peak RSS comes from wait4); a
second one runs only the normal item, as the memory baseline.
"""

from __future__ import annotations

import json
import os
import re
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path

import pytest

from collector.demo_site.hostile import CASES, FORBIDDEN_HOST, HostileArchive
from collector.demo_site.hostile_run import RunStats, judge, run_gather
from collector.storage.collection import Collection, init_collection

MIB = 1024  # ru_maxrss is in KiB on Linux (getrusage(2))
# A hostile run may use more memory than a plain one, but not by the size of what the servers
# offer (a 5 GB endless body, a 50 MB listing, a 400-megapixel bomb); caps are 1 MB here.
MAX_GROWTH_MIB = 150


def snapshot(folder: Path, skip: Path) -> dict[str, tuple[int, int]]:
    """Every file below ``folder`` (outside ``skip``) with its size and mtime."""
    out: dict[str, tuple[int, int]] = {}
    for path in folder.rglob("*"):
        if path.is_file() and skip not in path.parents:
            st = path.stat()
            out[str(path)] = (st.st_size, st.st_mtime_ns)
    return out


@dataclass
class HostileRun:
    """The finished hostile run and what was measured around it."""

    col: Collection
    stats: RunStats
    baseline: RunStats
    archive: HostileArchive
    base: Path
    cwd: Path
    before: dict[str, tuple[int, int]]
    after: dict[str, tuple[int, int]]
    parent_before: set[str]
    parent_after: set[str]


@pytest.fixture(scope="module")
def hostile_run(tmp_path_factory: pytest.TempPathFactory) -> Iterator[HostileRun]:
    """Gather once over every case (and once over the normal item alone)."""
    base = tmp_path_factory.mktemp("hostile")
    cwd = base / "cwd"
    cwd.mkdir()
    with HostileArchive(outside=base) as archive:
        col = init_collection(base / "col", contact="x@example.org")
        col.recipe_path.write_text(archive.recipe())
        parent_before = {p.name for p in base.parent.iterdir()}
        before = snapshot(base, col.root)
        stats = run_gather(col.root, "--quiet", cwd=cwd)
        after = snapshot(base, col.root)
        parent_after = {p.name for p in base.parent.iterdir()}
        with HostileArchive(cases=[]) as plain:
            ref = init_collection(base.parent / f"{base.name}-baseline", contact="x@example.org")
            ref.recipe_path.write_text(plain.recipe())
            baseline = run_gather(ref.root, "--quiet", cwd=cwd)
        yield HostileRun(col, stats, baseline, archive, base, cwd, before, after,
                         parent_before | {ref.root.name}, parent_after | {ref.root.name})


def test_the_hostile_run_ends_normally_without_a_traceback(hostile_run: HostileRun) -> None:
    """Exit code 0, outcome "finished", and no Python traceback on stderr."""
    assert hostile_run.stats.returncode == 0, hostile_run.stats.stderr[-2000:]
    assert "Traceback" not in hostile_run.stats.stderr
    assert "finished" in hostile_run.stats.stdout


@pytest.mark.parametrize("case", CASES, ids=[c.name for c in CASES])
def test_each_misbehaviour_ends_in_its_ledger_outcome(hostile_run: HostileRun, case) -> None:
    """The item (or source) of each case has the state/reason (or note) the table expects."""
    with hostile_run.col.ledger(readonly=True) as ledger:
        verdict = judge(ledger, case)
    assert verdict.ok, f"{case.name}: {verdict.problems}"


def test_the_normal_item_is_stored_whatever_the_other_hosts_do(hostile_run: HostileRun) -> None:
    """The lister's ordinary item is stored, with its file in the store."""
    with hostile_run.col.ledger(readonly=True) as ledger:
        row = ledger.query("SELECT state, file_sha256 FROM items WHERE source_key = 'normal'")[0]
    assert row["state"] == "stored"
    assert hostile_run.col.store.find(row["file_sha256"]) is not None


def test_peak_memory_stays_near_a_plain_run(hostile_run: HostileRun) -> None:
    """Peak RSS of the hostile run is within MAX_GROWTH_MIB of a run of the normal item."""
    growth = (hostile_run.stats.max_rss_kib - hostile_run.baseline.max_rss_kib) / MIB
    assert hostile_run.baseline.max_rss_kib > 0
    assert growth < MAX_GROWTH_MIB, f"peak RSS grew by {growth:.0f} MiB"


def test_nothing_is_written_outside_the_collection_folder(hostile_run: HostileRun) -> None:
    """Server-chosen file names (../, absolute, NUL, CON) change nothing outside the folder:
    the surrounding temp folder and the working directory are as they were."""
    assert hostile_run.after == hostile_run.before
    assert hostile_run.parent_after == hostile_run.parent_before
    assert list(hostile_run.cwd.iterdir()) == []
    assert not list(hostile_run.base.parent.rglob("escaped-*"))


def test_the_store_holds_only_files_named_by_their_sha256(hostile_run: HostileRun) -> None:
    """Inside the folder every stored file is files/ab/cd/<sha256>.<ext> and no temp file
    remains, whatever names the servers suggested."""
    root = hostile_run.col.root
    allowed = re.compile(r"^files/([0-9a-f]{2})/([0-9a-f]{2})/\1\2[0-9a-f]{60}\.[a-z]{3,4}$")
    extra = {"recipe.toml", "ledger.sqlite", "ledger.sqlite-wal", "ledger.sqlite-shm",
             ".gather.lock", "collection.id"}
    backup = re.compile(r"^ledger-backups/ledger-\d+-\d{8}T\d{6}\.\d{3}Z\.sqlite$")
    rels = [path.relative_to(root).as_posix() for path in root.rglob("*") if path.is_file()]
    assert any(allowed.match(rel) for rel in rels)  # the normal item at least was stored
    for rel in rels:
        assert rel in extra or allowed.match(rel) or backup.match(rel), rel
    assert list(hostile_run.col.store.incoming_dir.iterdir()) == []


def test_no_connection_reaches_an_address_the_recipe_does_not_allow(
        hostile_run: HostileRun) -> None:
    """The site on 127.0.0.9 (not in allow_addresses) saw no request, and every fetch
    towards it is recorded as refused before any attempt (attempt 0, unsafe_url)."""
    assert hostile_run.archive.forbidden.hits == []
    with hostile_run.col.ledger(readonly=True) as ledger:
        rows = ledger.query("SELECT attempt, error FROM fetches WHERE host LIKE ?",
                            (f"{FORBIDDEN_HOST}:%",))
    assert len(rows) >= 2
    assert all(r["attempt"] == 0 and "unsafe_url" in r["error"] for r in rows)


def test_only_http_and_https_urls_are_ever_requested(hostile_run: HostileRun) -> None:
    """Every request actually sent (attempt >= 1) was http(s); file:, ftp:, data: and
    javascript: targets were refused before any attempt."""
    with hostile_run.col.ledger(readonly=True) as ledger:
        sent = ledger.query("SELECT url FROM fetches WHERE attempt >= 1")
        refused = ledger.query("SELECT url FROM fetches WHERE attempt = 0")
    assert sent and all(r["url"].startswith(("http://", "https://")) for r in sent)
    schemes = {r["url"].split(":", 1)[0] for r in refused}
    assert {"file", "ftp", "data", "javascript"} <= schemes


def test_an_xmp_entity_bomb_is_never_expanded(hostile_run: HostileRun) -> None:
    """The billion-laughs XMP is refused by the parser (defusedxml forbids entities): the
    file is flagged xmp_unreadable and its rights hold no expanded text."""
    with hostile_run.col.ledger(readonly=True) as ledger:
        row = ledger.query(
            "SELECT f.flags, f.rights FROM items i JOIN files f ON f.sha256 = i.file_sha256 "
            "WHERE i.source_key = 'xmp-bomb'")[0]
    assert "xmp_unreadable" in json.loads(row["flags"])
    assert "lol" not in (row["rights"] or "")


def test_the_ledger_stays_small_despite_huge_metadata(hostile_run: HostileRun) -> None:
    """A 900 KB EXIF description and a 5 MB robots.txt do not bloat the ledger past a few MB."""
    size = os.path.getsize(hostile_run.col.ledger_path)
    wal = hostile_run.col.ledger_path.with_name("ledger.sqlite-wal")
    size += wal.stat().st_size if wal.exists() else 0
    assert size < 8_000_000, size


def test_a_billion_pixel_info_json_is_asked_only_for_the_target_size(
        hostile_run: HostileRun) -> None:
    """The service claiming 10^9 x 10^9 pixels got one image request, at the recipe's default
    target (2048, "!w,h" at level 2: IIIF Image API 3.0 §4.2), never "max"; the cyclic IIIF
    sites had each document requested once."""
    from collector.demo_site.hostile_iiif import requested_sizes

    vast = hostile_run.archive.sites["iiif-billion-pixels"].paths()
    assert requested_sizes(vast) == ["!2048,2048"]
    for name in ("iiif-collection-cycle", "iiif-self-manifest"):
        paths = [p for p in hostile_run.archive.sites[name].paths() if p.startswith("/iiif/")]
        assert len(paths) == len(set(paths)), (name, paths)
