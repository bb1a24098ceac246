"""Nothing outside a collection folder is touched through a symbolic link planted inside it.

Collection folders are shared, so anyone who can write to one can plant a link where
collector keeps its own file or folder. For every such path a link into a decoy folder
outside the collection is planted in a fresh copy of a small gathered collection, and the
command that writes there is run. Each case says what must happen: ``refused`` (exit 2, the
message names the planted path) or ``done`` (the command succeeded without following the
link; ``why`` says how). In every case the decoy folder is byte for byte unchanged (every
name, kind, link target and file content hashed before and after).

Wording and behaviour: common practice, no source. That ``O_NOFOLLOW`` refuses a link at the
last component (ELOOP) and that ``O_CREAT | O_EXCL`` never follows one: open(2), Linux
man-pages; that rename(2) replaces a link at the new path rather than writing through it:
rename(2), POSIX.1-2017.
"""

from __future__ import annotations

import hashlib
import os
import shutil
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pytest
from PIL import Image
from typer.testing import CliRunner

from collector.cli import app
from collector.errors import CollectorError, PathRefused
from collector.exports.release import readable_name
from collector.run.gather import gather
from collector.storage import queries
from collector.storage.collection import Collection, init_collection
from collector.storage.store import make_temp

runner = CliRunner()
NEW_BYTES = b"bytes that are not in the store yet"
NEW_SHA = hashlib.sha256(NEW_BYTES).hexdigest()


def _picture(seed: int) -> Image.Image:
    """A small picture with real structure (distinct pHashes, not near copies)."""
    rng = np.random.default_rng(seed)
    return Image.fromarray(rng.integers(0, 255, (6, 8, 3), dtype=np.uint8)).resize(
        (160, 120), Image.BICUBIC)


@pytest.fixture(scope="module")
def template(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """A gathered collection (a scans source over three generated PNGs, a ledger backup)."""
    col = init_collection(tmp_path_factory.mktemp("template") / "c", contact="me@example.org")
    (col.root / "in").mkdir()
    for n in range(3):
        _picture(n).save(col.root / "in" / f"p{n}.png")
    col.recipe_path.write_text(col.recipe_path.read_text() + (
        '\n[[sources]]\nname = "desk"\nkind = "scans"\npath = "in"\ninclude = ["*.png"]\n'
        'licence = "CC0-1.0"\n'))
    run = gather(col, fetcher_factory=lambda recipe, ledger: None)
    assert run.exit_code == 0 and len(list(col.store.iter_stored())) == 3
    return col.root


@dataclass(frozen=True)
class Case:
    """One planted link: where (below the collection; {ab}, {ab_cd}, {stored}, {image} and
    {new_ab} are filled in), what it points to in the decoy, what runs, what must happen."""

    where: str
    target: str  # "file", "folder" or "ledger" (a copy of the real ledger SQLite would open)
    run: list[str] | Callable[[Collection], object]  # CLI words ({dir}, {img}) or a call
    outcome: str  # "refused" or "done"
    why: str = ""  # for "done": why the link was not followed
    expect: str = ""  # a text the output must hold (for "done")


CASES = [
    Case(".gather.lock", "file", ["gather", "{dir}", "--quiet"], "refused"),
    Case(".gather.lock", "file", ["rebuild-ledger", "{dir}"], "refused"),
    Case(".gather.lock", "file", ["restore-ledger", "{dir}"], "refused"),
    Case("collection.id", "file", ["gather", "{dir}", "--quiet"], "refused"),
    Case("collection.id", "file", ["init", "{dir}", "--existing-ok"], "refused"),
    Case("recipe.toml", "file", ["init", "{dir}", "--existing-ok"], "refused"),
    Case("ledger.sqlite", "ledger", ["gather", "{dir}", "--quiet"], "refused"),
    Case("ledger.sqlite", "ledger", ["status", "{dir}"], "refused"),
    Case("ledger.sqlite", "ledger", ["init", "{dir}", "--existing-ok"], "refused"),
    Case("ledger.sqlite", "ledger", ["rebuild-ledger", "{dir}"], "refused"),
    Case("ledger.sqlite", "ledger", ["restore-ledger", "{dir}"], "done",
         why="the link is renamed aside (a rename moves the link, not its target) and the "
             "backup is copied in as a new plain file",
         expect="aside as"),
    Case("ledger.sqlite-wal", "file", ["gather", "{dir}", "--quiet"], "refused"),
    Case("ledger.sqlite-shm", "file", ["trace", "{img}", "--in", "{dir}"], "refused"),
    Case("ledger.sqlite-journal", "file", ["datasheet", "{dir}"], "refused"),
    Case("files", "folder", ["gather", "{dir}", "--quiet"], "refused"),
    Case("files", "folder", ["init", "{dir}", "--existing-ok"], "refused"),
    Case("files/.incoming", "folder", ["gather", "{dir}", "--quiet"], "refused"),
    Case("files/.incoming", "folder", ["init", "{dir}", "--existing-ok"], "refused"),
    Case("files/.incoming", "folder", lambda col: make_temp(col.store.incoming_dir),
         "refused"),
    Case("files/{ab}", "folder", ["gather", "{dir}", "--quiet"], "refused"),
    Case("files/{ab_cd}", "folder", ["gather", "{dir}", "--quiet"], "refused"),
    Case("files/{stored}", "file", ["gather", "{dir}", "--quiet"], "refused"),
    Case("files/{stored}", "file", ["datasheet", "{dir}", "--with-images"], "refused"),
    Case("files/{ab_cd}", "folder", lambda col: col.store.find(_stored_sha(col)), "refused"),
    Case("files/{new_ab}", "folder", lambda col: col.store.put_bytes(NEW_BYTES, "png"),
         "refused"),
    Case("files/.phash-index", "file", ["status", "{dir}"], "done",
         why="a derived file an older collector kept in files/ is removed as a link"),
    Case("cache", "folder", ["trace", "{img}", "--in", "{dir}"], "refused"),
    Case("cache/phash-index", "file", ["trace", "{img}", "--in", "{dir}"], "refused"),
    Case("cache/phash-index.lock", "file", ["trace", "{img}", "--in", "{dir}"], "refused"),
    Case("errors.log", "file", lambda col: col.append_error_log("a bug"), "refused"),
    Case("ledger-backups", "folder", ["gather", "{dir}", "--quiet"], "done",
         why="the run's records are committed; the backup is refused and the run warns",
         expect="no ledger backup was written"),
    Case("ledger-backups", "folder", ["restore-ledger", "{dir}"], "refused"),
    Case(".ledger.sqlite.restoring", "file", ["restore-ledger", "{dir}"], "done",
         why="a leftover temp name is removed as a link before the temp is created O_EXCL",
         expect="Restored"),
    Case("datasheet", "folder", ["datasheet", "{dir}"], "refused"),
    Case("release", "folder", ["datasheet", "{dir}", "--out", "{dir}/release"], "refused"),
    Case("datasheet/datasheet.md", "file", ["datasheet", "{dir}", "--overwrite"], "done",
         why="written to a new temp file and renamed over the link (rename replaces it)"),
    Case("datasheet/provenance.csv", "file", ["datasheet", "{dir}", "--overwrite"], "done",
         why="written to a new temp file and renamed over the link (rename replaces it)"),
    Case("datasheet/images", "folder", ["datasheet", "{dir}", "--overwrite", "--with-images"],
         "refused"),
    Case("datasheet/images/{release_name}", "file",
         ["datasheet", "{dir}", "--overwrite", "--with-images"], "refused"),
]


def _stored_sha(col: Collection) -> str:
    return min(sha for sha, _ in col.store.iter_stored())


def _names(col: Collection) -> dict[str, str]:
    """The placeholders of a case's path, from the (still intact) collection."""
    sha, path = min(col.store.iter_stored())
    return {"ab": sha[:2], "ab_cd": f"{sha[:2]}/{sha[2:4]}",
            "stored": f"{sha[:2]}/{sha[2:4]}/{path.name}", "new_ab": NEW_SHA[:2],
            "release_name": _release_name(col, sha, path.suffix.lstrip("."))}


def _release_name(col: Collection, sha: str, ext: str) -> str:
    """The readable name a release gives the stored file ``sha``."""
    with col.ledger(readonly=True) as ledger:
        item = queries.items_of_file(ledger, sha, limit=1)[0]
        source = queries.source_names(ledger)[item["source_id"]][0]
    return readable_name(source, item["source_key"], sha, ext)


def _decoy(base: Path, ledger: Path) -> Path:
    """A folder outside the collection with files a followed link would change."""
    decoy = base / "decoy"
    (decoy / "folder" / "sub").mkdir(parents=True)
    (decoy / "file.txt").write_text("keep me\n")
    (decoy / "folder" / "a.txt").write_text("keep me too\n")
    (decoy / "folder" / ".phash-index").write_bytes(b"not ours")
    (decoy / "folder" / "sub" / "b.bin").write_bytes(bytes(range(256)))
    shutil.copyfile(ledger, decoy / "ledger.sqlite")
    return decoy


def fingerprint(folder: Path) -> str:
    """A hash over every name, kind, link target and file content below ``folder``."""
    digest = hashlib.sha256()
    for dirpath, dirnames, filenames in os.walk(folder):
        dirnames.sort()
        for name in sorted(dirnames + filenames):
            path = Path(dirpath) / name
            digest.update(str(path.relative_to(folder)).encode() + b"\0")
            if path.is_symlink():
                digest.update(b"L" + os.readlink(path).encode())
            elif path.is_dir():
                digest.update(b"D")
            else:
                digest.update(b"F" + path.read_bytes())
    return digest.hexdigest()


def _plant(link: Path, target: Path) -> None:
    if link.is_symlink() or link.is_file():
        link.unlink()
    elif link.is_dir():
        shutil.rmtree(link)
    link.parent.mkdir(parents=True, exist_ok=True)
    link.symlink_to(target, target_is_directory=target.is_dir())


def _run(case: Case, col: Collection, image: Path) -> tuple[int, str]:
    """Run the case's command; (exit code, output)."""
    if callable(case.run):
        try:
            case.run(col)
        except CollectorError as exc:
            assert isinstance(exc, PathRefused)
            return exc.exit_code, str(exc)
        return 0, ""
    words = [w.replace("{dir}", str(col.root)).replace("{img}", str(image)) for w in case.run]
    result = runner.invoke(app, words)
    assert result.exception is None or isinstance(result.exception, SystemExit), result.output
    return result.exit_code, result.output


def _case_id(case: Case) -> str:
    return f"{case.where}-{case.run[0] if isinstance(case.run, list) else 'call'}"


@pytest.mark.parametrize("case", CASES, ids=_case_id)
def test_a_planted_link_changes_nothing_outside(case: Case, template: Path,
                                                tmp_path: Path) -> None:
    """A link planted where collector writes is refused (exit 2, path named) or not
    followed; the decoy folder outside the collection is unchanged either way."""
    col = Collection(tmp_path / "c")
    shutil.copytree(template, col.root, symlinks=True)
    decoy = _decoy(tmp_path, col.ledger_path)
    before = fingerprint(decoy)
    where = case.where.format(**_names(col))
    planted = col.root / where
    _plant(planted, {"file": decoy / "file.txt", "folder": decoy / "folder",
                     "ledger": decoy / "ledger.sqlite"}[case.target])
    code, output = _run(case, col, col.root / "in" / "p0.png")
    if case.outcome == "refused":
        assert code == 2, output
        assert str(planted) in output and "symbolic link" in output, output
        assert "Traceback" not in output
    else:
        assert case.why and code == 0, output
        assert case.expect in output, output
    assert fingerprint(decoy) == before


def test_the_store_never_moves_a_file_into_a_linked_shard_folder(tmp_path: Path) -> None:
    """A shard folder swapped for a link after the run's start-up checks: the rename goes
    into a descriptor opened with O_NOFOLLOW, so the file never lands outside."""
    col = init_collection(tmp_path / "c", contact="me@example.org")
    decoy = tmp_path / "decoy"
    decoy.mkdir()
    (col.store.root / NEW_SHA[:2]).mkdir()
    (col.store.root / NEW_SHA[:2] / NEW_SHA[2:4]).symlink_to(decoy, target_is_directory=True)
    fd, tmp = col.store.new_temp()
    os.write(fd, NEW_BYTES)
    os.close(fd)
    with pytest.raises(PathRefused, match="symbolic link"):
        col.store.adopt(tmp, NEW_SHA, "png")
    assert list(decoy.iterdir()) == []
    assert not tmp.exists()


def test_a_folder_where_a_lock_file_belongs_is_refused_clearly(tmp_path: Path) -> None:
    """Not only links: a folder at .gather.lock is named in a clear error (exit 2)."""
    col = init_collection(tmp_path / "c", contact="me@example.org")
    (col.root / ".gather.lock").mkdir()
    with pytest.raises(PathRefused, match="is not a plain file") as info, col.gather_lock():
        pass
    assert info.value.exit_code == 2


def test_an_out_folder_outside_the_collection_may_be_a_link(template: Path,
                                                           tmp_path: Path) -> None:
    """--out outside the collection is the user's own choice: a link there is followed and
    the datasheet is written where it points."""
    col = Collection(tmp_path / "c")
    shutil.copytree(template, col.root, symlinks=True)
    (tmp_path / "elsewhere").mkdir()
    (tmp_path / "release").symlink_to(tmp_path / "elsewhere", target_is_directory=True)
    result = runner.invoke(app, ["datasheet", str(col.root), "--out",
                                 str(tmp_path / "release")])
    assert result.exit_code == 0, result.output
    assert (tmp_path / "elsewhere" / "datasheet.md").is_file()
