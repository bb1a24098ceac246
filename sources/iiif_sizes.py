"""IIIF Image API size negotiation (2.1 and 3.0): which image request asks for no more pixels
than a recipe needs. Pure functions; the iiif kind fetches ``info.json`` and calls these.

Standards (cited beside each rule below):
- Image API 3.0 §4.2 (size syntax: ``max``, ``w,``, ``w,h``, ``!w,h``; ``^`` is needed to ask
  for more than the full size), §5 (image information: ``width``, ``height``, ``sizes``,
  ``tiles``, ``maxWidth``/``maxHeight``/``maxArea``, ``profile`` level0/1/2,
  ``extraFeatures``), the compliance document (level 1 supports ``w,``; level 2 adds ``!w,h``;
  level 0 needs only ``max`` and the listed ``sizes``);
- Image API 2.1 §4.2 (size syntax: ``full``, ``w,``, ``!w,h``; no ``^``: 2.1 never needs it,
  so we never ask above the full size), §5 (``@id``, ``profile`` as a list whose first entry
  names the level, later objects may carry ``maxWidth``/``maxHeight``/``maxArea``, ``sizes``,
  ``tiles``).

Never upscale: the size asked for is never larger than the full size; ``^`` is sent only when
the recipe asks for it and the 3.0 service lists ``sizeUpscaling``.
"""

from __future__ import annotations

import math
import re
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

__all__ = ["ServiceInfo", "SizeChoice", "choose_size", "parse_info", "service_version"]

# A sizes list longer than this is not read further (common practice, no source: real level-0
# services list a handful of sizes; an info.json with millions is hostile).
MAX_SIZES = 256
# Widths and heights above this are not believed (a 10^9 x 10^9 claim is read as "too large to
# ask for in full", never multiplied into a request; common practice, no source).
MAX_SIDE = 10**7

_LEVEL = re.compile(r"level\s*([0-2])", re.I)


@dataclass(frozen=True)
class ServiceInfo:
    """What one info.json says that matters for choosing a size."""

    id: str
    version: str  # "3.0" or "2.1"
    level: int
    width: int
    height: int
    sizes: tuple[tuple[int, int], ...] = ()
    max_width: int | None = None
    max_height: int | None = None
    max_area: int | None = None
    tiles: bool = False
    upscaling: bool = False


@dataclass(frozen=True)
class SizeChoice:
    """The image request chosen for one service, and why."""

    url: str
    size: str  # the size segment sent, e.g. "!1024,768", "768,1024", "max"
    width: int
    height: int
    why: str


def service_version(service: Mapping[str, Any]) -> str | None:
    """ "3.0" or "2.1" for an image service reference in a manifest, else None."""
    kind = str(service.get("type") or service.get("@type") or "")
    context = json_text(service.get("@context"))
    profile = json_text(service.get("profile"))
    if kind == "ImageService3" or "image/3" in context:
        return "3.0"
    if kind == "ImageService1" or "image/1" in context + profile:
        return None  # Image API 1.x has another request syntax ("native"); not negotiated
    if kind == "ImageService2" or "image/2" in context or "image/2" in profile:
        return "2.1"
    if "iiif.io/api/image" in profile + context:
        return "2.1"
    return None


def json_text(value: Any) -> str:
    """Any JSON value as one string, for looking for a marker in it."""
    if isinstance(value, str):
        return value
    if isinstance(value, list):
        return " ".join(json_text(v) for v in value)
    if isinstance(value, dict):
        return " ".join(json_text(v) for v in value.values())
    return ""


def _positive(value: Any, limit: int = MAX_SIDE) -> int | None:
    if isinstance(value, bool) or not isinstance(value, int | float):
        return None
    if not 0 < value < math.inf:
        return None
    return min(int(value), limit)


def _level(profile: Any) -> int:
    """Compliance level from profile ("level2", ".../level1.json", a 2.1 list); 0 if unknown
    (level 0 asks the least of a server)."""
    first = profile[0] if isinstance(profile, list) and profile else profile
    m = _LEVEL.search(first) if isinstance(first, str) else None
    return int(m.group(1)) if m else 0


def _limits(info: Mapping[str, Any], version: str) -> dict[str, int | None]:
    """maxWidth/maxHeight/maxArea: top level in 3.0 (§5), in the profile objects in 2.1 (§5)."""
    places: list[Mapping[str, Any]] = [info]
    profile = info.get("profile")
    if version == "2.1" and isinstance(profile, list):
        places += [p for p in profile[1:] if isinstance(p, dict)]
    out: dict[str, int | None] = {"maxWidth": None, "maxHeight": None, "maxArea": None}
    for place in places:
        for key in out:
            got = _positive(place.get(key), limit=MAX_SIDE**2)
            if got is not None and out[key] is None:
                out[key] = got
    # 3.0 §5 and 2.1 §5: maxHeight defaults to maxWidth when only maxWidth is given.
    if out["maxWidth"] is not None and out["maxHeight"] is None:
        out["maxHeight"] = out["maxWidth"]
    return out


def _sizes(value: Any) -> tuple[tuple[int, int], ...]:
    if not isinstance(value, list):
        return ()
    out = []
    for entry in value[:MAX_SIZES]:
        if isinstance(entry, dict):
            w, h = _positive(entry.get("width")), _positive(entry.get("height"))
            if w and h:
                out.append((w, h))
    return tuple(sorted(set(out), key=lambda s: s[0] * s[1]))


def _features(info: Mapping[str, Any]) -> str:
    profile = info.get("profile")
    extra = [info.get("extraFeatures")]
    if isinstance(profile, list):
        extra += [p.get("supports") for p in profile[1:] if isinstance(p, dict)]
    return json_text(extra)


def parse_info(info: Any, service_id: str, version: str) -> ServiceInfo | str:
    """The ServiceInfo of an info.json document, or a sentence saying why it cannot be used."""
    if not isinstance(info, dict):
        return "the info.json is not a JSON object"
    width, height = _positive(info.get("width")), _positive(info.get("height"))
    if width is None or height is None:
        return "the info.json has no usable width and height (Image API §5 requires both)"
    limits = _limits(info, version)
    return ServiceInfo(
        id=service_id, version=version, level=_level(info.get("profile")),
        width=width, height=height, sizes=_sizes(info.get("sizes")),
        max_width=limits["maxWidth"], max_height=limits["maxHeight"],
        max_area=limits["maxArea"], tiles=bool(info.get("tiles")),
        upscaling="sizeUpscaling" in _features(info))


def _scale(w: int, h: int, info: ServiceInfo, target: int) -> tuple[float, list[str]]:
    """The largest scale (<= 1, never upscaled) that fits the target and the service's limits,
    and which of them decided it."""
    bounds: list[tuple[float, str]] = [(1.0, "the full size")]
    if target:
        bounds.append((target / max(w, h), f"target_size {target}"))
    if info.max_width:
        bounds.append((info.max_width / w, f"maxWidth {info.max_width}"))
    if info.max_height:
        bounds.append((info.max_height / h, f"maxHeight {info.max_height}"))
    if info.max_area:
        bounds.append((math.sqrt(info.max_area / (w * h)), f"maxArea {info.max_area}"))
    scale = min(b for b, _ in bounds)
    return scale, [why for b, why in bounds if b == scale]


def _fitted(info: ServiceInfo, scale: float) -> tuple[int, int]:
    w = max(1, math.floor(info.width * scale))
    h = max(1, math.floor(info.height * scale))
    if info.max_area:  # rounding must not push w*h over maxArea (3.0 §5)
        while w * h > info.max_area and w > 1 and h > 1:
            w, h = w - 1, max(1, math.floor((w - 1) * info.height / info.width))
    return w, h


def _url(info: ServiceInfo, size: str) -> str:
    # {id}/{region}/{size}/{rotation}/{quality}.{format}: Image API 3.0 §4 and 2.1 §4.
    return f"{info.id.rstrip('/')}/full/{size}/0/default.jpg"


def _full_size_word(info: ServiceInfo) -> str:
    # 3.0 §4.2 "max"; 2.1 §4.2 "full" (2.1 also has "max", but every 2.x server knows "full").
    return "max" if info.version == "3.0" else "full"


def choose_size(info: ServiceInfo, target: int, *, upscale: bool = False,
                listed: str = "at_least") -> SizeChoice | str:
    """The request that asks for no more pixels than ``target`` (longest side; 0 = the largest
    the service allows), or a sentence saying why no size can be asked for (tiles only).

    ``listed`` is the level-0 choice among listed sizes: "at_least" takes the smallest at or
    above the target (the image is never smaller than asked), "at_most" the largest at or below
    it (never more pixels than the target); either falls back to the other side when its own
    side has no size."""
    if info.level == 0:
        return _choose_listed(info, target, listed)
    scale, deciders = _scale(info.width, info.height, info, target)
    if scale >= 1.0:
        if upscale and target and info.version == "3.0" and info.upscaling:
            side = target
            return SizeChoice(_url(info, f"^!{side},{side}"), f"^!{side},{side}",
                              *_fitted(info, target / max(info.width, info.height)),
                              why="upscaled to target_size (upscale = true, sizeUpscaling)")
        word = _full_size_word(info)
        return SizeChoice(_url(info, word), word, info.width, info.height,
                          why=f"level {info.level}: the full size is within the target and limits")
    w, h = _fitted(info, scale)
    # Level 2 confines to a box (!w,h: 3.0 §4.2, 2.1 §4.2); level 1 knows only w, (compliance).
    size = f"!{w},{h}" if info.level >= 2 else f"{w},"
    return SizeChoice(_url(info, size), size, w, h,
                      why=f"level {info.level}: scaled to fit {' and '.join(deciders)}")


def _choose_listed(info: ServiceInfo, target: int, listed: str) -> SizeChoice | str:
    """Level 0: only the listed sizes and the full size can be asked for (3.0 §5, 2.1 §5)."""
    scale, deciders = _scale(info.width, info.height, info, target)
    if scale >= 1.0:
        word = _full_size_word(info)
        return SizeChoice(_url(info, word), word, info.width, info.height,
                          why="level 0: the full size is within the target and limits")
    want_w, want_h = _fitted(info, scale)
    usable = [s for s in info.sizes if s[0] <= info.width and s[1] <= info.height
              and (not info.max_area or s[0] * s[1] <= info.max_area)
              and (not info.max_width or s[0] <= info.max_width)
              and (not info.max_height or s[1] <= info.max_height)]
    if not usable:
        what = "only tiles" if info.tiles else "no listed sizes"
        return (f"level 0 service with {what} and a full size of {info.width}x{info.height} "
                f"(more than {' and '.join(deciders)}); stitching tiles is not supported, so "
                "the image is not requested")
    want = max(want_w, want_h)
    above = [s for s in usable if max(s) >= want]
    below = [s for s in usable if max(s) <= want]
    if listed == "at_most" and below:
        (w, h), why = below[-1], "level 0: the largest listed size at or below the target"
    elif above:
        (w, h), why = above[0], "level 0: the smallest listed size at or above the target"
    else:
        (w, h), why = usable[-1], "level 0: the largest listed size (all are below the target)"
    # 3.0 §5: listed sizes are asked for as w,h; 2.1 §5: as w, (its canonical form, §4.7).
    size = f"{w},{h}" if info.version == "3.0" else f"{w},"
    return SizeChoice(_url(info, size), size, w, h, why=why)
