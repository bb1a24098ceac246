"""The generated Fernhollow archive: determinism, completeness and planted trouble."""

from __future__ import annotations

import hashlib
import itertools
import json
from pathlib import Path
from typing import Any

import imagehash
import numpy as np
import pytest
from PIL import Image, ImageOps, IptcImagePlugin

from collector.demo_site import generate, load_manifest, manifest_digest

# Item states and reasons: CONTRACT.md "Ledger" section (our own names).
STATES = {"stored", "duplicate", "near_duplicate", "skipped", "blocked", "rejected", "failed"}
REASONS = {
    None, "licence_not_allowed", "licence_unknown", "robots_disallowed", "robots_unreachable",
    "exact_duplicate", "near_duplicate", "not_an_image", "broken_image", "too_small",
    "bad_aspect", "decompression_bomb", "too_large", "http_404", "timeout", "connection",
    "unsafe_url", "redirect_blocked", "host_parked", "rights_statement_not_allowed",
    # reservations against text-and-data mining (collector.checks.reservations)
    "tdmrep_reserved", "noai_directive", "xmp_data_mining",
}


@pytest.fixture(scope="module")
def manifest(demo_content: Path) -> dict[str, Any]:
    return load_manifest(demo_content)


def _file_of(content: Path, item: dict[str, Any]) -> Path:
    site = json.loads((content / "site.json").read_text())
    url = item["final_image_url"] or item["image_url"]
    host = next(int(h) for h, v in site["hosts"].items() if f"//{v['address']}:" in url)
    path = url.split("{port}", 1)[1]
    return content / site["routes"][str(host)][path]["file"]


def _items(manifest: dict[str, Any], **where: Any) -> list[dict[str, Any]]:
    return [i for i in manifest["items"] if all(i.get(k) == v for k, v in where.items())]


def test_generation_is_deterministic_across_two_runs(demo_content: Path, tmp_path: Path
                                                     ) -> None:
    """Generating again into another folder gives the same manifest digest and bytes."""
    first = load_manifest(demo_content)
    second = generate(tmp_path / "again")
    assert second["digest"] == first["digest"]
    # the digest really covers the files: recompute it and every file's sha256
    assert manifest_digest(first) == first["digest"]
    site = json.loads((tmp_path / "again" / "site.json").read_text())
    files = [res for res in second["resources"] if res["kind"] == "file"]
    assert len(files) >= 100
    for res in files:
        route = site["routes"][str(res["host"])][res["path"]]
        data = (tmp_path / "again" / route["file"]).read_bytes()
        # SHA-256 (FIPS 180-4) via hashlib: the manifest's digest is of the bytes on disk
        assert hashlib.sha256(data).hexdigest() == res["sha256"]


def test_every_item_has_one_expected_outcome_with_contract_states_and_reasons(
        manifest: dict[str, Any]) -> None:
    """Each (source, key) appears once, with a contract state and a matching reason."""
    keys = [(i["source"], i["key"]) for i in manifest["items"]]
    assert len(keys) == len(set(keys))
    assert len(keys) >= 100
    for item in manifest["items"]:
        assert item["state"] in STATES, item
        assert item["reason"] in REASONS, item
        assert (item["reason"] is None) == (item["state"] == "stored"), item
        if item["state"] in ("duplicate", "near_duplicate"):
            original = _items(manifest, **item["duplicate_of"])
            assert len(original) == 1 and original[0]["state"] == "stored", item
            order = manifest["source_order"]
            orig_pos = (order.index(original[0]["source"]), manifest["items"].index(original[0]))
            assert orig_pos < (order.index(item["source"]), manifest["items"].index(item))
    expected = {"licence_not_allowed", "licence_unknown", "robots_disallowed",
                "robots_unreachable", "exact_duplicate", "near_duplicate", "not_an_image",
                "broken_image", "too_small", "decompression_bomb", "too_large", "http_404"}
    assert expected <= {i["reason"] for i in manifest["items"]}


def test_expected_licence_outcome_follows_the_policy_allowlist(manifest: dict[str, Any]
                                                               ) -> None:
    """Skipped items are exactly those whose expected SPDX id is missing or not allowed."""
    allow = set(manifest["policy"]["licence_allow"])
    for item in manifest["items"]:
        spdx = item["expected_spdx"]
        statement = item.get("rights_statement")
        if spdx is None and statement is not None:  # decided by its rs:<id> entry alone
            if f"rs:{statement}" not in allow:
                assert (item["state"], item["reason"]) == (
                    "skipped", "rights_statement_not_allowed"), item
            else:
                assert item["state"] != "skipped", item
        elif spdx is None:
            assert (item["state"], item["reason"]) == ("skipped", "licence_unknown"), item
        elif spdx not in allow:
            assert (item["state"], item["reason"]) == ("skipped", "licence_not_allowed")
        else:  # an allowed licence is skipped only for a reservation (README, "Reservations")
            assert item["state"] != "skipped" or item["reason"] == "tdmrep_reserved", item
    # licence written many ways (standards.md §7 URL forms)
    urls = {i["licence_url"] for i in manifest["items"] if i["licence_url"]}
    assert any(u.endswith("/deed.en") for u in urls)
    assert any("/legalcode" in u for u in urls)
    assert "https://creativecommons.org/publicdomain/mark/1.0/" in urls
    assert "https://creativecommons.org/publicdomain/zero/1.0/" in urls
    texts = {i["licence_text"] for i in manifest["items"]}
    assert {"CC-BY-4.0", "All rights reserved", "",
            "Creative Commons Attribution-ShareAlike 4.0 International"} <= texts


def test_format_variety_is_present_as_the_manifest_says(demo_content: Path,
                                                        manifest: dict[str, Any]) -> None:
    """JPEG, RGBA/palette/16-bit PNG, WebP, GIF (animated), TIFF and CMYK are all served."""
    seen = set()
    for item in manifest["items"]:
        if item["deliberate"] or item["sha256"] is None:
            continue
        with Image.open(_file_of(demo_content, item)) as im:
            assert (im.format, im.width, im.height, im.mode) == (
                item["format"], item["width"], item["height"], item["mode"]), item["key"]
            seen.add((im.format, im.mode, getattr(im, "n_frames", 1) > 1))
    for want in [("JPEG", "RGB", False), ("PNG", "RGBA", False), ("PNG", "P", False),
                 ("PNG", "I;16", False), ("WEBP", "RGB", False), ("GIF", "P", True),
                 ("TIFF", "RGB", False), ("JPEG", "CMYK", False)]:
        assert want in seen, want


def test_exif_orientation_gps_and_rights_fields_read_back(demo_content: Path,
                                                          manifest: dict[str, Any]) -> None:
    """Orientation 6/8, GPS, Exif Artist/Copyright, IPTC 2:80/2:116 and XMP read back."""
    by_key = {i["key"]: i for i in manifest["items"]}
    for key, value in (("FH-S-0010", 6), ("FH-S-0011", 8)):
        with Image.open(_file_of(demo_content, by_key[key])) as im:
            assert im.getexif().get(0x0112) == value  # Orientation, standards.md §6.1
            # values 5-8 swap width and height once displayed (standards.md §6.1)
            assert ImageOps.exif_transpose(im).size == (im.height, im.width)
    gps_items = [i for i in manifest["items"] if "gps" in i["flags"]]
    assert len(gps_items) == 1
    with Image.open(_file_of(demo_content, gps_items[0])) as im:
        gps = im.getexif().get_ifd(0x8825)  # GPSInfo IFD pointer, standards.md §6.1
        assert gps[1] == "N" and gps[3] == "W"
    with Image.open(_file_of(demo_content, by_key["FH-S-0013"])) as im:
        exif = im.getexif()
        emb = by_key["FH-S-0013"]["embedded"]
        assert exif.get(0x013B) == emb["exif_artist"]  # Artist
        assert exif.get(0x8298) == emb["exif_copyright"]  # Copyright
    with Image.open(_file_of(demo_content, by_key["FH-S-0014"])) as im:
        iptc = IptcImagePlugin.getiptcinfo(im)
        emb = by_key["FH-S-0014"]["embedded"]
        # By-line 2:80 and Copyright Notice 2:116, standards.md §6.2
        assert iptc[(2, 80)].decode() == emb["iptc_byline"]
        assert iptc[(2, 116)].decode() == emb["iptc_copyright_notice"]
    conflict = [i for i in manifest["items"] if i["conflict"]]
    assert len(conflict) == 1
    with Image.open(_file_of(demo_content, conflict[0])) as im:
        desc = im.getxmp()["xmpmeta"]["RDF"]["Description"]
        # xmpRights:WebStatement, standards.md §6.3
        assert desc["WebStatement"] == conflict[0]["embedded"]["xmp_web_statement"]
        assert "by-nc" in desc["WebStatement"]
        assert conflict[0]["expected_spdx"] == "CC-BY-4.0"


def test_deliberately_broken_files_fail_the_way_the_manifest_says(
        demo_content: Path, manifest: dict[str, Any]) -> None:
    """Bomb, truncated, HTML-as-JPEG, oversized and too-small files are really so."""
    policy = manifest["policy"]
    reasons = {i["reason"]: i for i in manifest["items"] if i["state"] == "rejected"}
    bomb = _file_of(demo_content, reasons["decompression_bomb"])
    # Pillow raises DecompressionBombError above 2 x MAX_IMAGE_PIXELS (libraries.md §7)
    with pytest.raises(Image.DecompressionBombError):
        Image.open(bomb)
    assert bomb.stat().st_size < 200_000
    with Image.open(_file_of(demo_content, reasons["broken_image"])) as im, \
            pytest.raises(OSError):
        im.load()  # truncated JPEG: load() raises (libraries.md §7)
    html = _file_of(demo_content, reasons["not_an_image"]).read_bytes()
    assert html.startswith(b"<!DOCTYPE html>") and not html.startswith(b"\xff\xd8")
    assert _file_of(demo_content, reasons["too_large"]).stat().st_size > \
        policy["max_image_bytes"]
    for item in manifest["items"]:
        if item["reason"] == "too_small":
            with Image.open(_file_of(demo_content, item)) as im:
                assert min(im.size) < policy["min_side"]
        elif item["state"] == "stored":
            assert min(item["width"], item["height"]) >= policy["min_side"], item["key"]
            assert item["bytes"] <= policy["max_image_bytes"]


def _hashes(im: Image.Image) -> tuple[imagehash.ImageHash, imagehash.ImageHash]:
    if im.mode.startswith("I;16"):  # 0..65535 (Pillow handbook, modes) scaled, not clipped
        im = Image.fromarray((np.asarray(im) / 257).round().astype(np.uint8))
    rgb = im.convert("RGB")
    return imagehash.phash(rgb), imagehash.phash(ImageOps.mirror(rgb))


def test_near_duplicates_are_close_and_unrelated_pictures_are_far(
        demo_content: Path, manifest: dict[str, Any]) -> None:
    """Planted near duplicates are within the threshold; every other pair is well beyond."""
    # reference implementation: imagehash.phash (libraries.md §2)
    threshold = manifest["policy"]["near_distance"]
    hashes = {}
    for item in manifest["items"]:
        if item["deliberate"] or item["sha256"] is None or "blank" in item["flags"]:
            continue  # a blank page has no shape to hash (issue 14)
        with Image.open(_file_of(demo_content, item)) as im:
            hashes[(item["source"], item["key"])] = _hashes(im)
    for scan in manifest["scans"]:
        with Image.open(demo_content / scan["file"]) as page:
            for box in scan["items"]:
                x, y, w, h = box["box"]
                hashes[(scan["file"], str(box["index"]))] = _hashes(
                    page.crop((x, y, x + w, y + h)))
    planted = {}
    for item in manifest["items"]:
        if item["state"] in ("duplicate", "near_duplicate"):
            orig = (item["duplicate_of"]["source"], item["duplicate_of"]["key"])
            planted[frozenset({orig, (item["source"], item["key"])})] = item
    for a, b in itertools.combinations(hashes, 2):
        direct = hashes[a][0] - hashes[b][0]
        mirrored = hashes[a][0] - hashes[b][1]
        item = planted.get(frozenset({a, b}))
        if item is None:
            # margin of 3 bits over the threshold: decode pipelines differ by up to
            # 2 bits (libraries.md §2, draft vs full decode)
            assert min(direct, mirrored) > threshold + 3, (a, b, direct, mirrored)
        elif item["state"] == "duplicate":
            assert direct == 0
        elif item["mirrored"]:
            assert mirrored <= threshold < direct, (a, b)
        else:
            assert direct <= threshold, (a, b)


def test_scans_have_ground_truth_boxes_a_blank_page_and_one_touching_pair(
        demo_content: Path, manifest: dict[str, Any]) -> None:
    """Scan boxes lie on the page, the blank scan is empty and the touching pair touches."""
    scans = manifest["scans"]
    assert 3 <= len([s for s in scans if not s["blank"]]) <= 4
    assert [len(s["items"]) for s in scans if s["blank"]] == [0]
    touching = [s for s in scans if s["touching_pairs"]]
    assert len(touching) == 1
    for scan in scans:
        with Image.open(demo_content / scan["file"]) as page:
            assert page.size == (scan["width"], scan["height"])
            for box in scan["items"]:
                x, y, w, h = box["box"]
                assert x >= 0 and y >= 0 and x + w <= page.width and y + h <= page.height
                assert abs(box["angle"]) <= 5
                # the box holds an object: darker than the near-white bed on average
                crop = page.crop((x, y, x + w, y + h)).convert("L")
                assert np.asarray(crop).mean() < 235
        if not scan["blank"]:
            assert 4 <= len(scan["items"]) <= 9
    i, j = touching[0]["touching_pairs"][0]
    a, b = touching[0]["items"][i]["box"], touching[0]["items"][j]["box"]
    # horizontally adjacent: the right edge of one meets the left edge of the other
    assert abs((a[0] + a[2]) - b[0]) <= 2
    with Image.open(demo_content / touching[0]["file"]) as page:
        seam = page.convert("L").crop((b[0] - 1, b[1] + b[3] // 3, b[0] + 1,
                                       b[1] + b[3] // 2))
        assert np.asarray(seam).max() < 230  # no white gap along the seam


def test_manifest_is_json_with_relative_paths_only(demo_content: Path) -> None:
    """The manifest never names the folder it was generated into."""
    text = (demo_content / "manifest.json").read_text()
    assert str(demo_content) not in text
    data = json.loads(text)
    assert data["format"] == "fernhollow-demo-manifest/1"


def test_iiif_collection_states_its_expected_sizes_and_rights(manifest: dict[str, Any]) -> None:
    """The IIIF part lists every canvas with the size a correct client asks for (IIIF Image
    API 3.0 §4.2/§5, 2.1 §4.2/§5) and the RightsStatements.org statements it uses."""
    items = [i for i in manifest["items"] if i["source"] == "iiif"]
    sizes = {i["iiif_size"] for i in items}
    assert {"!400,300", "600,450", "512,", "!512,384"} == sizes
    assert all(i["image_url"].endswith(f"/full/{i['iiif_size']}/0/default.jpg") for i in items)
    assert {i.get("rights_statement") for i in items} >= {"NoC-US", "InC"}
    source = next(s for s in manifest["sources"] if s["name"] == "iiif")
    assert source["total"] == len(items) == 6
