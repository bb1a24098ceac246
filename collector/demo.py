"""``collector demo``: the whole job against the embedded fictional archive.

Starts the Fernhollow Field Society archive (invented; see ``demo_site``) on loopback, gathers
it with the demo recipe at brisk but polite budgets, then traces two files (one exact, one
resized copy) and writes the datasheet. Running it again resumes the same folder.
"""

from __future__ import annotations

import io
import shutil
from dataclasses import dataclass
from pathlib import Path

from PIL import Image

from collector.errors import CollectionError, CollectorError
from collector.run.gather import gather
from collector.run.record import Progress
from collector.run.scheduling import RunResult
from collector.storage import queries
from collector.storage.collection import Collection, init_collection, open_collection
from collector.storage.safe_paths import own_folder, replace_file

DEMO_PORT = 8642
COPIES_DIR = "demo-copies"


@dataclass
class DemoResult:
    """What the demo did and where it left things."""

    collection: Collection
    resumed: bool
    run: RunResult
    port: int
    exact_file: Path | None
    near_copy: Path | None
    datasheet_dir: Path | None


def _is_collection(folder: Path) -> bool:
    return (folder / "recipe.toml").is_file() and (folder / "ledger.sqlite").is_file()


def prepare_folder(folder: Path, *, fresh: bool) -> bool:
    """Make ``folder`` ready; returns True when an earlier demo run is being resumed."""
    if folder.exists() and not folder.is_dir():
        raise CollectionError(f"{folder} exists and is not a folder; choose another path")
    if folder.is_dir() and any(folder.iterdir()) and not _is_collection(folder):
        raise CollectionError(f"{folder} is not empty and is not a collection; nothing was "
                              "changed. Choose a new folder for the demo")
    if _is_collection(folder):
        open_collection(folder)  # a ledger that cannot describe the store stops here
    if fresh and _is_collection(folder):
        shutil.rmtree(folder)
    return _is_collection(folder)


def make_resized_copy(source: Path, target: Path) -> Path:
    """A half-size JPEG re-encode of ``source``: what a reviewer might hold months later.
    Written inside the demo folder, never through a link planted there."""
    own_folder(target.parent.parent, target.parent, create=True)
    with Image.open(source) as im:
        small = im.convert("RGB").resize((max(1, im.width // 2), max(1, im.height // 2)))
        buf = io.BytesIO()
        small.save(buf, "JPEG", quality=80)
    replace_file(target, buf.getvalue())
    return target


def pick_photo(collection: Collection) -> Path | None:
    """A stored JPEG photo from the web sources, to trace and to copy."""
    with collection.ledger(readonly=True) as ledger:
        sha256 = queries.stored_jpeg_photo(ledger)
    return collection.store.find(sha256) if sha256 else None


def run_demo(folder: Path, *, fresh: bool = False, port: int = DEMO_PORT,
             progress: Progress | None = None, datasheet: bool = True,
             content: Path | None = None) -> DemoResult:
    """Serve the demo archive, gather it into ``folder``, make a resized copy of a stored
    photo to trace, and write the datasheet. The archive content is generated once into the
    user's cache folder unless ``content`` names a generated archive."""
    from collector import demo_site
    from collector.demo_site.recipes import render

    resumed = prepare_folder(folder, fresh=fresh)
    content = content or demo_site.ensure_content()
    try:
        server = demo_site.DemoServer(content, port=port, **demo_site.DEMO_OPTIONS).start()
    except OSError as exc:
        raise CollectorError(f"cannot serve the demo archive on port {port} ({exc}); pass "
                             "another port with --port") from exc
    try:
        collection = (open_collection(folder) if resumed
                      else init_collection(folder, name="Fernhollow field records (demo)"))
        # Rewritten every time: the recipe names the port the archive is served on.
        replace_file(collection.recipe_path, render("demo", server.port, content / "scans"))
        run = gather(collection, progress=progress, options={"demo": True, "fresh": fresh})
    finally:
        server.stop()
    exact = pick_photo(collection)
    near = make_resized_copy(exact, folder / COPIES_DIR / "resized-copy.jpg") if exact else None
    sheet = None
    if datasheet:
        from collector.exports.datasheet import export_datasheet

        sheet = export_datasheet(folder, out=folder / "datasheet", overwrite=True).out
    return DemoResult(collection, resumed, run, server.port, exact, near, sheet)
