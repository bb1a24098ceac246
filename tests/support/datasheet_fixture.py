"""A small invented collection for the datasheet tests: a real gather over generated scans plus
one web source written into the ledger the way collector/run/ingest.py and the fetcher write it.

Everything is fictional ("Fernhollow Field Society"); images are generated with numpy/Pillow.
"""

from __future__ import annotations

import hashlib
import io
from pathlib import Path

import numpy as np
from PIL import Image

from collector.checks.images import inspect_image
from collector.run.gather import gather
from collector.storage.collection import init_collection, open_collection
from collector.storage.ledger import Ledger

WEB_HOST = "127.0.0.2:8080"
HOSTILE_TITLE = "Bracken <script>alert(1)</script> | frond & stem"

RECIPE = """
contact = "curator@fernhollow.example"
product_token = "collector"

[collection]
name = "Fernhollow leaves"
description = "Leaves pressed and scanned by the Fernhollow Field Society."
curator = "Fernhollow Field Society"

[images]
near_distance = 8
near_duplicates = "keep"

[[sources]]
name = "scanner-by"
kind = "scans"
path = "scans/by"
creator = "Fernhollow Field Society"
licence = "CC-BY-4.0"
date = "2026-03-01"

[[sources]]
name = "scanner-cc0"
kind = "scans"
path = "scans/cc0"
licence = "CC0-1.0"

[[sources]]
name = "scanner-nc"
kind = "scans"
path = "scans/nc"
licence = "CC-BY-NC-4.0"
"""


def leaf(seed: int, size: tuple[int, int] = (96, 64)) -> Image.Image:
    """A distinct generated picture: smooth random blobs (distinct perceptual hashes)."""
    rng = np.random.default_rng(seed)
    small = rng.integers(0, 256, (6, 6, 3), dtype=np.uint8)
    return Image.fromarray(small).resize(size, Image.Resampling.BICUBIC)


def png_bytes(im: Image.Image) -> bytes:
    buf = io.BytesIO()
    im.save(buf, "PNG")
    return buf.getvalue()


def jpeg_with_gps(im: Image.Image) -> bytes:
    """A JPEG whose EXIF holds a GPS position (Exif GPS IFD 0x8825, tags 1-4)."""
    exif = Image.Exif()
    exif[0x8825] = {1: "N", 2: (52.0, 10.0, 0.0), 3: "E", 4: (4.0, 30.0, 0.0)}
    buf = io.BytesIO()
    im.save(buf, "JPEG", exif=exif, quality=90)
    return buf.getvalue()


def write_scans(root: Path) -> None:
    by, cc0, nc = root / "scans/by", root / "scans/cc0", root / "scans/nc"
    for d in (by, cc0, nc):
        d.mkdir(parents=True)
    for n in range(5):
        leaf(n, (96 + 16 * n, 64 + 8 * n)).save(by / f"leaf{n}.png")
    (by / "leaf0-copy.png").write_bytes((by / "leaf0.png").read_bytes())  # exact duplicate
    leaf(1, (200, 130)).save(by / "leaf1-big.png")  # resized: near duplicate, kept
    (by / "notes.png").write_bytes(b"not a picture at all")  # rejected
    (cc0 / "gps.jpg").write_bytes(jpeg_with_gps(leaf(10, (120, 90))))
    leaf(11, (64, 64)).save(cc0 / "grey.png")
    Image.open(cc0 / "grey.png").convert("L").save(cc0 / "grey.png")
    leaf(20).save(nc / "nc0.png")  # skipped: licence not in the allowlist


def add_web_source(root: Path) -> None:
    """One JSON API source as the gatherer and fetcher would have recorded it."""
    collection = open_collection(root)
    store = collection.store
    with Ledger.open(collection.ledger_path) as ledger:
        run_id = ledger.start_run("0" * 64, {}, "0.1.0")
        sid = ledger.source_id("fernhollow-api", "json_api", {"url": "http://x/"})
        t = "2026-12-01T21:5{}:0{}.000Z"
        ledger.put_host(WEB_HOST, robots_url=f"http://{WEB_HOST}/robots.txt",
                        robots_fetched_at=t.format(0, 0), robots_status=200,
                        robots_sha256="ab" * 32, robots_body="User-agent: *\nDisallow: /private/",
                        effective_budget={"min_interval": 3.0, "requests_per_hour": 1000,
                                          "bytes_per_hour": 2_000_000_000,
                                          "max_connections": 1, "effective_interval": 5.0,
                                          "slowdown": 1.0},
                        parked_until=None, failures=0)
        ledger.record_fetch(run_id=run_id, purpose="robots", url=f"http://{WEB_HOST}/robots.txt",
                            host=WEB_HOST, status=200, bytes=40, started_at=t.format(0, 0),
                            ended_at=t.format(0, 0), waited_s=0.0, attempt=1,
                            robots_verdict=None)
        ledger.record_fetch(run_id=run_id, purpose="listing", url=f"http://{WEB_HOST}/api",
                            host=WEB_HOST, status=429, bytes=0, started_at=t.format(0, 5),
                            ended_at=t.format(0, 5), waited_s=0.0, attempt=1,
                            robots_verdict="allowed")
        ledger.record_fetch(run_id=run_id, purpose="listing", url=f"http://{WEB_HOST}/api",
                            host=WEB_HOST, status=200, bytes=900, started_at=t.format(1, 0),
                            ended_at=t.format(1, 0), waited_s=5.0, attempt=2,
                            robots_verdict="allowed")
        specs = [
            ("w1", HOSTILE_TITLE, "A. Gardener", "CC BY-SA 4.0", "CC-BY-SA-4.0", 30, None),
            ("w2", "Oak gall", None, "CC BY 4.0", "CC-BY-4.0", 31, "licence_conflict"),
        ]
        for n, (key, title, creator, raw, spdx, seed, extra_flag) in enumerate(specs):
            url = f"http://{WEB_HOST}/img/{key}.png"
            iid = ledger.add_item(sid, key, {
                "image_url": url, "page_url": f"http://{WEB_HOST}/item/{key}", "title": title,
                "creator": creator, "licence_raw": raw, "spdx_id": spdx, "run_id": run_id})
            data = png_bytes(leaf(seed, (80, 120)))
            sha, path = store.put_bytes(data, "png")
            facts = inspect_image(path)
            flags = [*facts.flags, *([extra_flag] if extra_flag else [])]
            started = t.format(2, n)
            ledger.record_fetch(run_id=run_id, item_id=iid, purpose="image", url=url,
                                host=WEB_HOST, status=200, bytes=len(data), started_at=started,
                                ended_at=started, waited_s=3.0, attempt=1,
                                robots_verdict="allowed", content_type="image/png")
            with ledger.transaction():
                # The row ingest writes (collector.run.ingest: size, facts, first item, flags).
                ledger.add_file({"sha256": sha, "size": len(data), **facts.file_columns(),
                                 "first_item_id": iid, "flags": flags})
                ledger.update_item(iid, state="stored", reason=None, file_sha256=sha)
            assert hashlib.sha256(data).hexdigest() == sha
        for key, state, reason, spdx in (("w3", "failed", "http_404", "CC-BY-4.0"),
                                         ("w4", "blocked", "robots_disallowed", "CC-BY-4.0"),
                                         ("w5", "skipped", "licence_unknown", None)):
            iid = ledger.add_item(sid, key, {"image_url": f"http://{WEB_HOST}/img/{key}.png",
                                             "spdx_id": spdx, "run_id": run_id})
            ledger.update_item(iid, state=state, reason=reason)
        ledger.record_fetch(run_id=run_id, purpose="image", url=f"http://{WEB_HOST}/img/w3.png",
                            host=WEB_HOST, status=404, bytes=0, started_at=t.format(3, 0),
                            ended_at=t.format(3, 0), waited_s=3.0, attempt=1,
                            robots_verdict="allowed", error="HTTP 404")
        ledger.record_fetch(run_id=run_id, purpose="image", url=f"http://{WEB_HOST}/private/w4",
                            host=WEB_HOST, status=None, bytes=0, started_at=None,
                            robots_verdict="disallowed", robots_rule="Disallow: /private/")
        ledger.end_run(run_id, "finished")


def build_collection(root: Path) -> Path:
    """Create the fixture collection at ``root`` and return it."""
    init_collection(root, contact="curator@fernhollow.example", name="Fernhollow leaves")
    (root / "recipe.toml").write_text(RECIPE, "utf-8")
    write_scans(root)
    result = gather(open_collection(root), fetcher_factory=lambda recipe, ledger: None)
    assert result.outcome == "finished", result.outcome
    add_web_source(root)
    return root
