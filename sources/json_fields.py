"""Field mapping for the json_api kind: compiled JMESPath mappings, image candidate choice and
the next-page link (pure functions, no requests).

A helper of sources/json_api.py; it defines no ``KIND``, so the registry of kinds
(sources/__init__.py) does not take it for one.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

import jmespath
from jmespath.parser import ParsedResult

from collector.sources.base import as_text, resolve_url

__all__ = [
    "CANDIDATE_FIELDS",
    "ITEM_FIELDS",
    "FieldMap",
    "link_target",
    "map_fields",
    "number",
    "pick_candidate",
]

# Mapped item fields (JMESPath). candidate_* apply to each element of image_candidates.
ITEM_FIELDS = ("title", "creator", "licence", "licence_url", "page_url", "date", "image_url")
CANDIDATE_FIELDS = ("candidate_url", "candidate_width", "candidate_height", "candidate_label")


@dataclass
class FieldMap:
    """Compiled JMESPath expressions for one mapping (listing or detail)."""

    exprs: dict[str, ParsedResult]
    pick: str = "largest"

    @classmethod
    def from_table(cls, table: Mapping[str, Any], fallback: FieldMap | None = None) -> FieldMap:
        """Compile every expression once; candidate_* fall back to the listing's."""
        exprs = {k: jmespath.compile(v) for k, v in table.items() if k != "pick" and v}
        if fallback is not None:
            for key in CANDIDATE_FIELDS:
                if key not in exprs and key in fallback.exprs:
                    exprs[key] = fallback.exprs[key]
        pick = table.get("pick") or (fallback.pick if fallback else "largest")
        return cls(exprs=exprs, pick=pick)

    def get(self, name: str, data: Any) -> Any:
        """The value of one field in data, or None when unmapped or absent."""
        expr = self.exprs.get(name)
        return expr.search(data) if expr is not None else None

    def maps_image(self) -> bool:
        """Whether this mapping can produce an image URL."""
        return "image_url" in self.exprs or "image_candidates" in self.exprs


def number(value: Any) -> float | None:
    """A size or count as a float: numbers as they are, text such as "1200", "1200px" or "1200w";
    None for booleans and anything else."""
    if isinstance(value, bool):
        return None
    if isinstance(value, int | float):
        return float(value)
    if isinstance(value, str):
        try:
            return float(value.strip().rstrip("wpxWPX"))
        except ValueError:
            return None
    return None


def pick_candidate(cands: list[dict[str, Any]], pick: str) -> dict[str, Any] | None:
    """Choose one image candidate: "label:<name>" if present, else the largest by area/width.

    Candidates without a size rank below sized ones; ties keep the first listed.
    """
    usable = [c for c in cands if c.get("url")]
    if not usable:
        return None
    if pick.startswith("label:"):
        wanted = pick[len("label:"):].strip().lower()
        for cand in usable:
            if str(cand.get("label") or "").strip().lower() == wanted:
                return cand

    def size(c: dict[str, Any]) -> float:
        w, h = c.get("width"), c.get("height")
        if w is None:
            return -1.0
        return w * h if h is not None else w

    best = usable[0]
    for cand in usable[1:]:
        if size(cand) > size(best):
            best = cand
    return best


def map_fields(data: Any, fm: FieldMap, base_url: str) -> dict[str, Any]:
    """Mapped values of one item (or detail answer): text fields, resolved URLs, picked image."""
    out: dict[str, Any] = {}
    for name in ("title", "creator", "licence", "date"):
        out[name] = as_text(fm.get(name, data))
    for name in ("licence_url", "page_url", "image_url"):
        out[name] = resolve_url(base_url, as_text(fm.get(name, data)))
    if out["image_url"] is None and "image_candidates" in fm.exprs:
        raw = fm.get("image_candidates", data)
        if isinstance(raw, dict | str):
            raw = [raw]
        cands: list[dict[str, Any]] = []
        for entry in raw if isinstance(raw, list) else []:
            url = entry if isinstance(entry, str) else as_text(fm.get("candidate_url", entry))
            cands.append({
                "url": resolve_url(base_url, url),
                "width": number(fm.get("candidate_width", entry)),
                "height": number(fm.get("candidate_height", entry)),
                "label": as_text(fm.get("candidate_label", entry)),
            })
        chosen = pick_candidate(cands, fm.pick)
        if chosen is not None:
            out["image_url"] = chosen["url"]
            out["image_choice"] = {k: v for k, v in chosen.items() if k != "url" and v is not None}
    return out


def link_target(links: Mapping[str, Any] | None, rel: str) -> str | None:
    """The target of one relation in page.links, as {rel: url} or {rel: {"url": url, ...}}."""
    value = (links or {}).get(rel)
    if isinstance(value, Mapping):
        value = value.get("url")
    return value if isinstance(value, str) and value.strip() else None
