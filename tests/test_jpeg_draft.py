"""One draft decode of a JPEG serves its hash and its colour facts (collector.checks.images).

Ingest asks libjpeg for the hash's draft (1/2..1/8 scale, Pillow's ``JpegImageFile.draft``)
as YCbCr instead of luma: the Y band is the same luma, so the hash must be exactly the one of
the luma-only pipeline (``hash_image_file``: ``draft("L")``, libjpeg decoding Y alone), and the
colour facts must be those of the colour draft they used to come from (Pillow's and libjpeg's
YCbCr-to-RGB conversions, both JFIF / ITU-R BT.601 full range, differ by at most one level).
"""

from __future__ import annotations

from collections.abc import Iterator
from pathlib import Path

import numpy as np
import pytest
from PIL import Image, ImageDraw

from collector.checks.colour_facts import WORK_SIDE, colour_facts
from collector.checks.images import inspect_image
from collector.checks.phash import hash_image_file
from collector.checks.pixels import colour_ready
from collector.errors import ImageRejected


def picture(size: tuple[int, int], seed: int = 0) -> Image.Image:
    """Smooth colour fields, shapes and a little grain."""
    rng = np.random.default_rng(seed)
    w, h = size
    field = Image.fromarray(rng.integers(0, 256, (6, 8, 3), dtype=np.uint8)).resize(
        size, Image.Resampling.BICUBIC)
    draw = ImageDraw.Draw(field)
    for _ in range(6):
        x0, x1 = sorted(int(v) for v in rng.integers(0, w, 2))
        y0, y1 = sorted(int(v) for v in rng.integers(0, h, 2))
        draw.ellipse((x0, y0, x1 + 4, y1 + 4), fill=tuple(int(c) for c in rng.integers(0, 256, 3)))
    grain = rng.normal(0, 3, (h, w, 3))
    return Image.fromarray(np.clip(np.asarray(field) + grain, 0, 255).astype(np.uint8))


def _without_adobe_marker(data: bytes) -> bytes:
    """The JPEG without its APP14 "Adobe" segment (marker 0xFFEE, ITU-T T.81 B.2.4.6 layout:
    the two length bytes count themselves)."""
    at = data.index(b"\xff\xee")
    length = int.from_bytes(data[at + 2:at + 4], "big")
    return data[:at] + data[at + 2 + length:]


def write_variant(kind: str, folder: Path) -> Path:
    """One JPEG of a kind ingest meets: chroma subsampling 4:2:0 / 4:2:2 / 4:4:4 (Pillow's
    ``subsampling`` 2 / 1 / 0), progressive (ITU-T T.81 Annex G), greyscale, CMYK (Adobe,
    inverted), RGB-coded with and without the Adobe marker that says so (``keep_rgb``), a
    draft smaller than the colour facts' picture, and an EXIF orientation (standards.md
    section 6.1)."""
    path = folder / f"{kind}.jpg"
    base = picture((1224, 816), seed=len(kind))
    if kind in ("420", "422", "444"):
        base.save(path, quality=90, subsampling={"420": 2, "422": 1, "444": 0}[kind])
    elif kind == "progressive":
        base.save(path, quality=90, progressive=True)
    elif kind == "grey":
        base.convert("L").save(path, quality=90)
    elif kind == "cmyk":
        base.convert("CMYK").save(path, quality=90)
    elif kind == "rgb_adobe":
        base.save(path, quality=90, keep_rgb=True)
    elif kind == "rgb_unmarked":
        base.save(path, quality=90, keep_rgb=True)
        path.write_bytes(_without_adobe_marker(path.read_bytes()))
    elif kind == "small_draft":  # 520 // 64 = 8: a 1/8 draft of 65 px, about WORK_SIDE
        base.resize((520, 520)).save(path, quality=90)
    elif kind == "turned":
        exif = Image.Exif()
        exif[0x0112] = 6  # Orientation: rotate 90 degrees clockwise to display
        base.save(path, quality=90, exif=exif)
    return path


KINDS = ("420", "422", "444", "progressive", "grey", "cmyk", "rgb_adobe", "rgb_unmarked",
         "small_draft", "turned")


def colour_draft_facts(path: Path):  # type: ignore[no-untyped-def]
    """The colour facts from a colour draft of their own (the former second decode)."""
    with Image.open(path) as im:
        im.draft("RGB", (WORK_SIDE, WORK_SIDE))
        return colour_facts(colour_ready(im, WORK_SIDE))


@pytest.mark.parametrize("kind", KINDS)
def test_the_draft_gives_the_luma_pipelines_hash_and_the_colour_drafts_facts(
        kind: str, tmp_path: Path) -> None:
    """Hash bit for bit as the luma-only draft; facts as from a colour draft of their own."""
    path = write_variant(kind, tmp_path)
    facts = inspect_image(path, full_decode=False)
    assert (facts.phash, facts.phash_mirror) == hash_image_file(path), kind
    assert facts.colour is not None
    alone = colour_draft_facts(path)
    assert facts.colour.greyscale is alone.greyscale is (kind == "grey"), kind
    assert facts.colour.brightness == pytest.approx(alone.brightness, abs=0.5), kind
    assert facts.colour.contrast == pytest.approx(alone.contrast, abs=0.5), kind
    assert facts.colour.colourfulness == pytest.approx(alone.colourfulness, abs=1.0), kind
    assert facts.colour.background_share == pytest.approx(alone.background_share, abs=0.05)


@pytest.fixture
def jpeg_decodes(monkeypatch: pytest.MonkeyPatch) -> Iterator[list[str]]:
    """The modes of every JPEG decoder Pillow starts (Image._getdecoder, called by
    ImageFile.load for each decode)."""
    started: list[str] = []
    real = Image._getdecoder

    def counting(mode, decoder_name, args, extra=()):  # type: ignore[no-untyped-def]
        if decoder_name == "jpeg":
            started.append(mode)
        return real(mode, decoder_name, args, extra)

    monkeypatch.setattr(Image, "_getdecoder", counting)
    yield started


def test_a_jpeg_on_the_draft_path_is_decoded_once(tmp_path: Path,
                                                  jpeg_decodes: list[str]) -> None:
    """One YCbCr draft for hash and colour; the native-size estimate adds one luma decode."""
    path = write_variant("420", tmp_path)
    inspect_image(path, full_decode=False)
    assert jpeg_decodes == ["YCbCr"]
    jpeg_decodes.clear()
    inspect_image(path, full_decode=False, colours=0)
    assert jpeg_decodes == ["L"]  # no colour facts asked: the luma draft alone
    jpeg_decodes.clear()
    inspect_image(path, full_decode=False, enlarged="flag")
    assert sorted(jpeg_decodes) == ["L", "YCbCr"]


def test_a_cut_jpeg_is_still_a_broken_image(tmp_path: Path) -> None:
    """A JPEG cut short fails the YCbCr draft and the luma draft tried after it alike
    (libraries.md section 7: load() raises on truncated files)."""
    path = write_variant("420", tmp_path)
    data = path.read_bytes()
    path.write_bytes(data[: len(data) // 2])
    with pytest.raises(ImageRejected) as info:
        inspect_image(path, full_decode=False)
    assert info.value.reason == "broken_image"


@pytest.mark.parametrize("kind", ("420", "422", "444", "small_draft"))
def test_the_y_band_of_the_ycbcr_draft_is_the_luma_draft(kind: str, tmp_path: Path) -> None:
    """libjpeg decodes Y the same whatever colour space it hands over, and Pillow's YCbCr to
    L conversion copies Y: the luma of the one draft equals draft("L") pixel for pixel."""
    from collector.checks.phash import hash_draft

    path = write_variant(kind, tmp_path)
    with Image.open(path) as luma, Image.open(path) as both:
        hash_draft(luma)
        hash_draft(both, colour=True)
        assert (luma.mode, both.mode) == ("L", "YCbCr")
        assert np.array_equal(np.asarray(luma), np.asarray(both.convert("L")))
        assert np.array_equal(np.asarray(luma), np.asarray(both.getchannel("Y")))
