"""What size negotiation saves the archive: a loopback IIIF collection of 60 images with
6000x8000 masters, gathered with target_size = 1024 and with target_size = 0 (the full image).

Half the images sit behind level-2 Image API 3.0 services (any size, "!w,h"), half behind
level-0 services that list a size pyramid (6000x8000 halved down to 375x500, the sizes a static
tile generator writes). The server renders each requested image at the requested size on the
fly (a smooth random picture with film grain, JPEG quality 85); no master is stored. Bytes and
pixels are counted on the server side, from what it sent.

Targets (issue 15): bytes and pixels with negotiation <= 0.05 of the full-image run, and no
full-size request to a level-0 service when a listed size fits. "above target" counts level-0
requests whose longest side is above target_size: with level0_sizes = "at_least" (default) a
pyramid without a 1024 entry is asked for its 1500x2000 size; "at_most" asks 750x1000.

"Zero requests above the target size on level-0 services" is read as: none above the size needed,
the smallest listed size whose longest side reaches target_size (a level-0 service cannot make
any other size); "at_most" also keeps every level-0 request at or below the target itself.

Usage: python bench/iiif_bytes.py [images]   (default 60; exit 1 when a target is missed)
"""

from __future__ import annotations

import io
import json
import re
import sys
import tempfile
import threading
from dataclasses import dataclass, field
from http.server import BaseHTTPRequestHandler
from pathlib import Path

import numpy as np
from PIL import Image

from collector.demo_site.hostile_run import run_gather
from collector.demo_site.loopback import LoopbackServer, send
from collector.storage.collection import init_collection

FULL = (6000, 8000)
TARGET = 1024
P3 = "http://iiif.io/api/presentation/3/context.json"
PYRAMID = [(FULL[0] >> k, FULL[1] >> k) for k in range(5)]  # 6000x8000 ... 375x500
# The smallest listed size whose longest side reaches the target: what a level-0 service must
# be asked for to give at least TARGET pixels (1500x2000 here).
NEEDED_L0 = min((size for size in PYRAMID if max(size) >= TARGET), key=max)
SIZE = re.compile(r"^/svc/(\d+)/full/([^/]+)/0/default\.jpg$")


@dataclass
class Served:
    """What the server sent for images: requests, bytes, pixels, and the level-0 checks."""

    requests: int = 0
    bytes: int = 0
    pixels: int = 0
    other_bytes: int = 0
    above_target_l0: int = 0
    above_needed_l0: int = 0
    full_l0: int = 0
    lock: threading.Lock = field(default_factory=threading.Lock)


def size_of(word: str) -> tuple[int, int]:
    """The pixel size an Image API 3.0 size segment (§4.2) gives for a 6000x8000 image."""
    w, h = FULL
    if word in ("max", "full"):
        return w, h
    confined = word.startswith("!")
    a, _, b = word.lstrip("!^").partition(",")
    if confined:
        scale = min(int(a) / w, int(b) / h)
        return round(w * scale), round(h * scale)
    if a and b:
        return int(a), int(b)
    if a:
        return int(a), round(h * int(a) / w)
    return round(w * int(b) / h), int(b)


def render(n: int, size: tuple[int, int]) -> bytes:
    """Image ``n`` at ``size``: a smooth random picture plus grain, as JPEG (numpy for the
    grain: Pillow's effect_noise takes seconds at 48 megapixels)."""
    w, h = size
    rng = np.random.default_rng(n)
    seed = Image.fromarray(rng.integers(0, 256, (8, 6, 3), dtype=np.uint8), "RGB")
    smooth = seed.resize((max(1, w // 8), max(1, h // 8)), Image.Resampling.BICUBIC)
    picture = np.asarray(smooth.resize(size, Image.Resampling.NEAREST))
    grain = np.frombuffer(rng.bytes(w * h * 3), np.uint8).reshape(h, w, 3)
    mixed = picture // 8 * 7 + (grain & 31)  # at most 223 + 31: no overflow
    out = io.BytesIO()
    Image.fromarray(mixed, "RGB").save(out, "JPEG", quality=85)
    return out.getvalue()


def level(n: int) -> str:
    return "level2" if n % 2 == 0 else "level0"


def documents(base: str, count: int) -> dict[str, object]:
    """The collection, its manifests and the info.json of every service."""
    docs: dict[str, object] = {"/iiif/collection.json": {
        "@context": P3, "id": f"{base}/iiif/collection.json", "type": "Collection",
        "label": {"none": ["bench"]},
        "items": [{"id": f"{base}/iiif/m/{n}.json", "type": "Manifest"} for n in range(count)]}}
    for n in range(count):
        svc, canvas = f"{base}/svc/{n}", f"{base}/iiif/m/{n}/canvas"
        docs[f"/iiif/m/{n}.json"] = {
            "@context": P3, "id": f"{base}/iiif/m/{n}.json", "type": "Manifest",
            "label": {"none": [f"sheet {n}"]},
            "rights": "https://creativecommons.org/publicdomain/zero/1.0/",
            "items": [{"id": canvas, "type": "Canvas", "width": FULL[0], "height": FULL[1],
                       "items": [{"id": f"{canvas}/p", "type": "AnnotationPage", "items": [{
                           "id": f"{canvas}/a", "type": "Annotation", "motivation": "painting",
                           "target": canvas, "body": {
                               "id": f"{svc}/full/max/0/default.jpg", "type": "Image",
                               "service": [{"id": svc, "type": "ImageService3",
                                            "profile": level(n)}]}}]}]}]}
        info: dict[str, object] = {
            "@context": "http://iiif.io/api/image/3/context.json", "id": svc,
            "type": "ImageService3", "protocol": "http://iiif.io/api/image",
            "profile": level(n), "width": FULL[0], "height": FULL[1]}
        if level(n) == "level0":
            info["sizes"] = [{"width": w, "height": h} for w, h in reversed(PYRAMID)]
            info["tiles"] = [{"width": 512, "scaleFactors": [1, 2, 4, 8, 16]}]
        docs[f"/svc/{n}/info.json"] = info
    return docs


def serve(count: int) -> tuple[LoopbackServer, Served]:
    """The loopback IIIF site and its counters."""
    server = LoopbackServer("127.0.0.1")
    served = Served()
    docs = documents(server.base, count)
    server.route("/robots.txt", (200, b"User-agent: *\nAllow: /\n", {"Content-Type": "text/plain"}))

    def answer(h: BaseHTTPRequestHandler) -> None:
        path = h.path.split("?", 1)[0]
        if path in docs:
            body = json.dumps(docs[path]).encode()
            with served.lock:
                served.other_bytes += len(body)
            send(h, 200, body, {"Content-Type": "application/ld+json"})
            return
        m = SIZE.match(path)
        if not m:
            send(h, 404, b"not here")
            return
        n, size = int(m.group(1)), size_of(m.group(2))
        body = render(n, size)
        with served.lock:
            served.requests += 1
            served.bytes += len(body)
            served.pixels += size[0] * size[1]
            if level(n) == "level0":
                served.above_target_l0 += max(size) > TARGET
                served.above_needed_l0 += max(size) > max(NEEDED_L0)
                served.full_l0 += size == FULL
        send(h, 200, body, {"Content-Type": "image/jpeg"})

    server.fallback = answer
    return server, served


def recipe(url: str, target: int, listed: str) -> str:
    return f"""contact = "bench@example.org"
[budgets]
min_interval = 0.0
[network]
allow_addresses = ["127.0.0.1"]
max_image_bytes = 200_000_000
download_deadline = 300.0
read_timeout = 120.0
[images]
max_pixels = 89_478_485
[[sources]]
name = "iiif"
kind = "iiif"
url = "{url}"
target_size = {target}
level0_sizes = "{listed}"
"""


def run(folder: Path, count: int, target: int, listed: str) -> tuple[Served, float, int]:
    """One gather over a fresh site; what the server sent, seconds, items with a stored file."""
    server, served = serve(count)
    try:
        col = init_collection(folder, contact="bench@example.org")
        col.recipe_path.write_text(recipe(server.url("/iiif/collection.json"), target, listed))
        stats = run_gather(col.root, "--quiet", timeout=1800, cwd=folder.parent)
        with col.ledger(readonly=True) as ledger:
            stored = ledger.query("SELECT count(*) AS n FROM items "
                                  "WHERE file_sha256 IS NOT NULL")[0]["n"]
    finally:
        server.close()
    return served, stats.seconds, stored


def main(count: int) -> int:
    rows = []
    with tempfile.TemporaryDirectory() as tmp:
        for name, target, listed in (("negotiated (at_least)", TARGET, "at_least"),
                                     ("negotiated (at_most)", TARGET, "at_most"),
                                     ("full image (target_size = 0)", 0, "at_least")):
            served, secs, stored = run(Path(tmp) / name.split()[0] / listed, count, target,
                                       listed)
            rows.append((name, served, secs, stored))
    full = rows[-1][1]
    head = (f"{'variant':<30} | {'stored':>6} | {'images':>6} | {'image MB':>9} | "
            f"{'megapixels':>10} | {'bytes ratio':>11} | {'pixel ratio':>11} | "
            f"{'L0 > target':>11} | {'L0 > needed':>11} | {'L0 full':>7} | "
            f"{'docs KB':>7} | {'s':>5}")
    print(f"{count} images, {FULL[0]}x{FULL[1]} masters, target_size {TARGET}\n")
    print(head)
    print("-" * len(head))
    bad = 0
    for name, s, secs, stored in rows:
        b_ratio, p_ratio = s.bytes / max(full.bytes, 1), s.pixels / max(full.pixels, 1)
        if s is not full:
            bad += (b_ratio > 0.05 or p_ratio > 0.05 or s.full_l0 > 0
                    or s.above_needed_l0 > 0)
        print(f"{name:<30} | {stored:6d} | {s.requests:6d} | {s.bytes / 1e6:9.1f} | "
              f"{s.pixels / 1e6:10.1f} | {b_ratio:11.4f} | {p_ratio:11.4f} | "
              f"{s.above_target_l0:11d} | {s.above_needed_l0:11d} | {s.full_l0:7d} | "
              f"{s.other_bytes / 1e3:7.1f} | "
              f"{secs:5.1f}")
    print("\ntargets: bytes and pixel ratio <= 0.05; no full-size request to a level-0 service"
          f" (L0 full = 0); no level-0 request above the size needed (L0 > needed = 0: a "
          f"level-0 service serves only its listed sizes, and the smallest one reaching "
          f"{TARGET} px is {NEEDED_L0[0]}x{NEEDED_L0[1]}); 'L0 > target' counts level-0 "
          f"requests above {TARGET} px (0 with level0_sizes = \"at_most\")")
    return 1 if bad else 0


if __name__ == "__main__":
    sys.exit(main(int(sys.argv[1]) if len(sys.argv) > 1 else 60))
