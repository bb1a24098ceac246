"""Rejection details say what was wrong in the recipe's own terms: no temp-file names, no raw
library messages, no reason code repeated in its own detail."""

from __future__ import annotations

import io
from pathlib import Path

import pytest
from PIL import Image

from collector.checks.images import inspect_image
from collector.checks.licences import licence_detail
from collector.demo_site.metadata import bomb_png
from collector.errors import FetchError, ImageRejected, RobotsDenied, TooLarge

# Pillow's Image.MAX_IMAGE_PIXELS default and the recipe's max_pixels default
# (shared/reference/libraries.md section 7).
PILLOW_LIMIT = 89_478_485
TEMP_NAME = ".part-k3x9q2ab"  # how a download in files/.incoming/ is named


def rejected(tmp_path: Path, data: bytes, **limits: object) -> ImageRejected:
    """The rejection of ``data`` written under a temp-file name."""
    path = tmp_path / TEMP_NAME
    path.write_bytes(data)
    with pytest.raises(ImageRejected) as caught:
        inspect_image(path, **limits)  # type: ignore[arg-type]
    assert TEMP_NAME not in caught.value.detail and "part-" not in caught.value.detail
    return caught.value


def picture(size: tuple[int, int], fmt: str = "PNG") -> bytes:
    """A small picture with some detail in it."""
    im = Image.linear_gradient("L").resize(size).convert("RGB")
    out = io.BytesIO()
    im.save(out, format=fmt)
    return out.getvalue()


def test_a_bomb_refused_at_open_names_the_recipe_limit(tmp_path: Path) -> None:
    """A 30000 x 30000 PNG header (900,000,000 pixels) is said against max_pixels, not in
    Pillow's words ("could be decompression bomb DOS attack")."""
    err = rejected(tmp_path, bomb_png(30000))
    assert err.reason == "decompression_bomb"
    assert err.detail == f"900,000,000 pixels, above max_pixels = {PILLOW_LIMIT:,}"


def test_an_image_over_a_lower_max_pixels_names_its_size(tmp_path: Path) -> None:
    """Our own pixel limit: width x height = pixels, above max_pixels = N."""
    err = rejected(tmp_path, picture((320, 240)), max_pixels=1000)
    assert err.reason == "decompression_bomb"
    assert err.detail.startswith("320 x 240 = 76,800 pixels, above max_pixels = 1,000")


def test_a_truncated_file_is_described_not_quoted(tmp_path: Path) -> None:
    """A JPEG cut short says so in words; Pillow's "image file is truncated" is not shown."""
    data = picture((320, 240), "JPEG")
    err = rejected(tmp_path, data[: len(data) // 2])
    assert err.reason == "broken_image"
    assert "truncated" not in err.detail and "bytes not processed" not in err.detail
    assert err.detail == "the file ends before the picture does (cut short in transfer?)"


def test_too_small_and_not_an_image_use_the_recipe_key(tmp_path: Path) -> None:
    """too_small names min_side with its value; not_an_image says what the bytes are."""
    assert rejected(tmp_path, picture((96, 96)), min_side=128).detail == \
        "shortest side 96 px, under min_side = 128"
    assert rejected(tmp_path, b"<!DOCTYPE html><html></html>").detail == \
        "the bytes are an HTML page"


def test_licence_details_read_as_sentences() -> None:
    """No licence at all is "no licence given", never licence '(none)'."""
    assert licence_detail(None, None, None).startswith("no licence given")
    assert "(none)" not in licence_detail("", "", None)
    assert licence_detail("CC BY-NC 4.0", None, "CC-BY-NC-4.0") == \
        "licence 'CC BY-NC 4.0' is CC-BY-NC-4.0, not in the allowlist ([licences] allow)"
    assert licence_detail(None, "https://example.org/terms", None).startswith(
        "licence 'https://example.org/terms' could not be recognised")


def test_fetch_details_do_not_repeat_the_reason() -> None:
    """robots_unreachable, robots_disallowed, http_404 and too_large details say what happened
    without their reason code and without "rule 'unreachable'"."""
    url = "http://127.0.0.9/media/a.jpg"
    unreachable = RobotsDenied(url, "unreachable", "robots_unreachable").item_detail()
    assert "robots_unreachable" not in unreachable and "rule" not in unreachable
    assert unreachable.startswith("the host's robots.txt could not be read")
    assert unreachable.endswith(url)
    assert RobotsDenied(url, "Disallow: /media/").item_detail() == \
        f"robots.txt disallows it (Disallow: /media/): {url}"
    assert FetchError(url, "http_404", 404).item_detail() == f"HTTP 404: {url}"
    big = TooLarge(url, 3_000_000, "Content-Length 4,322,703 bytes")
    assert big.size_text == "Content-Length 4,322,703 bytes"
    assert "too_large" not in big.item_detail()
