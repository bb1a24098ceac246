"""The second look: is a pHash candidate really the same picture, turned, or cropped?

The 64-bit pHash (:mod:`collector.checks.phash`) finds candidates fast, but 64 bits of
"brighter or darker than the median" can agree by chance. Before anything is reported as
*probably* a copy, the two pictures themselves are compared by a check of another kind: the
Pearson correlation of small greyscale thumbnails (32x32, LANCZOS), after turning the stored
picture the way the pHash said the copy was turned; and the correlation of their fine detail
(first differences along both axes), which two different pictures on similar smooth
backgrounds cannot fake (a gradient dominates a plain correlation: 4 of 100 unrelated
pictures of bench/trace.py passed 0.93 on it alone). Correlation looks at every grey level,
not at 64 signs, so the two checks fail on different pairs (bench/trace_quality.py measures
both together).

Crops: a copy that keeps each side >= 80 % of the original moves the low frequencies too much
for pHash (median distance 12 bits at 90 %, 22 at 80 %, measured with bench/trace_quality.py's
pictures), so for crops the pHash only preselects the closest few stored pictures within a
loose radius, and the second look searches the crop box: for box widths of 78..98 % of the
stored picture (the height follows from the two aspect ratios), at every position of a
32-pixel grid, the best correlation of the box with the query is taken, and its detail must
agree too.

Thresholds are our own, set on bench/trace_quality.py (common practice, no source); the bench
prints the scores of true and false pairs so they can be re-checked.
"""

from __future__ import annotations

import struct
from collections.abc import Callable, Iterable
from dataclasses import dataclass
from pathlib import Path

import numpy as np
from PIL import Image

from collector.checks.phash import ORIENTATION_TRANSPOSE, dct_block, featureless, turned_hashes
from collector.checks.pixels import hash_ready, is_blank

__all__ = [
    "CONFIRM_MIN",
    "CROP_CONFIRM_MIN",
    "CROP_DETAIL_MIN",
    "DETAIL_MIN",
    "IMAGE_ERRORS",
    "Confirmed",
    "Look",
    "confirm",
    "detail_agreement",
    "find_copies",
    "look_at",
    "look_at_file",
    "second_look",
]

# What Pillow raises on a file it cannot decode (as collector.checks.images handles them).
IMAGE_ERRORS = (OSError, SyntaxError, ValueError, EOFError, IndexError, TypeError,
                struct.error, Image.DecompressionBombError)
_SIDE = 32  # the compared thumbnail, as the pHash grid
_KEEP = 128  # the stored picture's thumbnail the crop box is searched in
# Correlation a turned/resized/re-encoded copy must reach (bench/trace_quality.py: true pairs
# 0.97 and up, the closest unrelated pairs that passed the pHash stage stay below 0.8).
CONFIRM_MIN = 0.90
# The crop search tries many boxes, so chance agreement is likelier: a higher bar.
CROP_CONFIRM_MIN = 0.93
# Correlation alone is fooled by two different pictures on similar smooth backgrounds (a
# gradient dominates the sum): the fine detail (first differences of the thumbnail, along
# both axes) must agree too. bench/trace_quality.py: true copies 0.98 and up, true crops 0.69
# and up; the unrelated pairs that passed correlation 0.15..0.45.
DETAIL_MIN = 0.90
CROP_DETAIL_MIN = 0.60
_CROP_WIDTHS = (0.78, 0.82, 0.86, 0.90, 0.94, 0.98)
# An upright copy whose whole thumbnail correlates at least this well is not searched for a
# crop box (whole, a crop to 90 % of each side scored 0.98 at most on bench/trace_quality.py's
# pictures, median 0.87; our own value, common practice, no source).
_WHOLE = 0.985
_T = Image.Transpose
# How each turn of phash.TURNS is made from the original (Pillow transposes).
_MAKE: dict[str, tuple[Image.Transpose, ...]] = {
    "same": (),
    "mirror": (_T.FLIP_LEFT_RIGHT,),
    "rotate180": (_T.ROTATE_180,),
    "rotate180+mirror": (_T.ROTATE_180, _T.FLIP_LEFT_RIGHT),
    "rotate90": (_T.ROTATE_90,),
    "rotate270": (_T.ROTATE_270,),
    "rotate90+mirror": (_T.ROTATE_90, _T.FLIP_LEFT_RIGHT),
    "rotate270+mirror": (_T.ROTATE_270, _T.FLIP_LEFT_RIGHT),
}


@dataclass(frozen=True)
class Look:
    """What the second look needs of one picture: its hashes for the 8 turns, whether it is
    blank, its size as displayed and a 128x128 float thumbnail (aspect not kept)."""

    turns: dict[str, int]
    blank: bool
    size: tuple[int, int]
    thumb: Image.Image  # mode F, 0..255

    @property
    def phash(self) -> int:
        """The pHash of the picture as it is."""
        return self.turns["same"]

    @property
    def comparable(self) -> bool:
        """False for a blank or featureless picture: it is never a copy of anything."""
        return not self.blank and not featureless(self.phash)


def look_at(im: Image.Image) -> Look:
    """The Look of an upright picture (any mode)."""
    grey = hash_ready(im)
    thumb = grey.convert("F").resize((_KEEP, _KEEP), Image.Resampling.LANCZOS)
    return Look(turned_hashes(dct_block(grey)), is_blank(grey), grey.size, thumb)


def look_at_file(path: Path | str) -> Look:
    """The Look of an image file: first frame, EXIF orientation applied, JPEG draft decode."""
    with Image.open(path) as im:
        orientation = int(im.getexif().get(0x0112, 1) or 1)
        if im.format == "JPEG":
            im.draft("L", (_KEEP * 2, _KEEP * 2))
        grey = hash_ready(im)
        method = ORIENTATION_TRANSPOSE.get(orientation)
        return look_at(grey.transpose(method) if method is not None else grey)


def _small(im: Image.Image, box: tuple[float, float, float, float] | None = None) -> np.ndarray:
    return np.asarray(im.resize((_SIDE, _SIDE), Image.Resampling.LANCZOS, box=box),
                      dtype=np.float64)


def _correlation(a: np.ndarray, b: np.ndarray) -> float:
    a = a - a.mean()
    b = b - b.mean()
    denominator = float(np.sqrt((a * a).sum() * (b * b).sum()))
    return float((a * b).sum() / denominator) if denominator > 1e-9 else 0.0


def turned(stored: Look, turn: str) -> Image.Image:
    """The stored thumbnail turned the way the copy was."""
    im = stored.thumb
    for step in _MAKE[turn]:
        im = im.transpose(step)
    return im


def same_picture(query: Look, stored: Look, turn: str) -> float:
    """Correlation of the query with the stored picture turned by ``turn``."""
    return _correlation(_small(query.thumb), _small(turned(stored, turn)))


def crop_score(query: Look, stored: Look) -> tuple[float, tuple[float, float, float, float]]:
    """The best correlation of the query with a box of the stored picture, and the box
    (fractions of the stored picture: left, top, right, bottom).

    For each box width the stored thumbnail is resized so that the box becomes 32x32, then
    every 32x32 window is compared at once (numpy sliding windows)."""
    target = _small(query.thumb)
    target = (target - target.mean()).ravel()
    t_norm = float(np.sqrt((target * target).sum()))
    qw, qh = query.size
    sw, sh = stored.size
    best, best_box = -1.0, (0.0, 0.0, 1.0, 1.0)
    if t_norm < 1e-9 or not (qw and qh and sw and sh):
        return best, best_box
    for fw in _CROP_WIDTHS:
        fh = fw * (sw / sh) / (qw / qh)
        if not 0.7 <= fh <= 1.0:
            continue
        w, h = round(_SIDE / fw), round(_SIDE / fh)
        big = np.asarray(stored.thumb.resize((w, h), Image.Resampling.LANCZOS), np.float64)
        windows = np.lib.stride_tricks.sliding_window_view(big, (_SIDE, _SIDE))
        flat = windows.reshape(*windows.shape[:2], -1)
        flat = flat - flat.mean(axis=2, keepdims=True)
        norms = np.sqrt((flat * flat).sum(axis=2)) * t_norm
        scores = np.where(norms > 1e-9, flat @ target / np.maximum(norms, 1e-9), 0.0)
        y, x = np.unravel_index(int(np.argmax(scores)), scores.shape)
        if scores[y, x] > best:
            best = float(scores[y, x])
            best_box = (x / w, y / h, (x + _SIDE) / w, (y + _SIDE) / h)
    return best, best_box


def second_look(query: Look, stored: Look, kind: str) -> float:
    """The correlation score for a candidate of this kind (a turn, or "crop")."""
    if kind == "crop":
        return crop_score(query, stored)[0]
    return same_picture(query, stored, kind)


def _detail(a: np.ndarray) -> np.ndarray:
    return np.concatenate([np.diff(a, axis=0).ravel(), np.diff(a, axis=1).ravel()])


def detail_agreement(query: Look, stored: Look, kind: str,
                     box: tuple[float, float, float, float] | None = None) -> float:
    """Correlation of the fine detail (first differences) of the query and of the stored
    picture, turned by ``kind`` or cut to ``box`` (fractions) for a crop."""
    if box is not None:
        k = _KEEP
        other = _small(stored.thumb, (box[0] * k, box[1] * k, box[2] * k, box[3] * k))
    else:
        other = _small(turned(stored, kind))
    return _correlation(_detail(_small(query.thumb)), _detail(other))


def _crop_agrees(query: Look, stored: Look) -> tuple[bool, float, bool]:
    """(agrees, score, box clearly smaller than the picture) of the crop search."""
    score, box = crop_score(query, stored)
    smaller = box[2] - box[0] < 0.97 or box[3] - box[1] < 0.97
    ok = (score >= CROP_CONFIRM_MIN
          and detail_agreement(query, stored, "crop", box) >= CROP_DETAIL_MIN)
    return ok, score, smaller


def _decide(query: Look, stored: Look, kind: str) -> tuple[str, float]:
    """(kind, score) when the second look agrees, ("", score) when it does not: the
    thumbnails must correlate and so must their fine detail. An upright candidate that
    lines up better with a box clearly smaller than the picture is a crop."""
    if kind == "crop":
        ok, score, _ = _crop_agrees(query, stored)
        return ("crop" if ok else ""), score
    score = same_picture(query, stored, kind)
    if kind == "same" and score < _WHOLE:  # lines up whole: no need to search a crop box
        ok, cropped, smaller = _crop_agrees(query, stored)
        if ok and smaller and cropped > score + 0.01:
            return "crop", cropped
    ok = score >= CONFIRM_MIN and detail_agreement(query, stored, kind) >= DETAIL_MIN
    return (kind if ok else ""), score


@dataclass(frozen=True)
class Confirmed:
    """A candidate the second look agreed with."""

    key: str
    distance: int  # pHash bits between the query (turned back) and the stored picture
    kind: str  # "same" | a turn of phash.TURNS | "crop"
    score: float  # the thumbnail correlation


def confirm(query: Look, candidates: Iterable[tuple[str, int, str]],
            load: Callable[[str], Look | None], *, limit: int = 5) -> list[Confirmed]:
    """Keep the candidates (key, distance, turn or "crop") the second look agrees with,
    best first; ``load`` gives a stored picture's Look (None: unreadable, skipped)."""
    if not query.comparable:
        return []
    found: list[Confirmed] = []
    seen: set[str] = set()
    for key, distance, kind in candidates:
        if key in seen:
            continue
        stored = load(key)
        if stored is None or not stored.comparable:
            continue
        kind, score = _decide(query, stored, kind)
        if kind:
            seen.add(key)
            found.append(Confirmed(key, distance, kind, round(score, 3)))
            if len(found) >= limit:
                break
    return found


Candidates = Callable[[dict[str, int], bool], list[tuple[str, int, str]]]


def find_copies(query: Look, candidates: Candidates, load: Callable[[str], Look | None],
                *, limit: int = 5) -> list[Confirmed]:
    """Confirmed copies of the query among stored pictures, best first, in two rounds:
    upright and mirrored first (2 scans of the hashes; most copies end here), then, only
    when none is confirmed, the six rotations and the crop candidates (7 scans).
    ``candidates(turns, crops)`` is the index's ``candidates`` with its radius bound."""
    if not query.comparable:
        return []
    upright = {turn: query.turns[turn] for turn in ("same", "mirror")}
    found = confirm(query, candidates(upright, False), load, limit=limit)
    if found:
        return found
    # Round two: "same" is scanned again only for its loose crop radius; the mirror turn and
    # the upright candidates were turned down in round one already.
    turned = {turn: h for turn, h in query.turns.items() if turn != "mirror"}
    later = [c for c in candidates(turned, True) if c[2] != "same"]
    return confirm(query, later, load, limit=limit)
