"""Reading IIIF Presentation documents (3.0 and 2.1): language maps, metadata pairs, the
painted image of each canvas, the members of a collection. Pure functions over parsed JSON;
the iiif kind walks the documents and fetches.

Standards: Presentation API 3.0 §3 (resource structure: Collection -> Manifest -> Canvas ->
AnnotationPage -> Annotation with ``motivation`` "painting" -> Image body with ``service``;
§4.1 ``label``/``metadata``/``summary``/``requiredStatement``/``rights``; language maps,
"none" for values without a language), Presentation API 2.1 (§5 ``sc:Collection`` with
``collections``/``manifests``/``members``; ``sequences`` -> ``canvases`` -> ``images``
(``sc:painting``) -> ``resource`` with ``service``; ``label``, ``metadata``, ``license``,
``attribution``; values as strings, lists or ``{"@value", "@language"}`` objects).
"""

from __future__ import annotations

from collections.abc import Iterator, Mapping
from dataclasses import dataclass
from typing import Any

__all__ = [
    "Painted",
    "canvases",
    "doc_type",
    "document_version",
    "first_id",
    "lang_text",
    "members",
    "metadata_pairs",
]

# A document with more entries than this in one list is not read further (common practice, no
# source): a hostile manifest could list millions of canvases or members.
MAX_ENTRIES = 10_000


def document_version(doc: Mapping[str, Any]) -> str:
    """ "3.0" when the @context names Presentation 3 or the document uses "type"; else "2.1"."""
    context = doc.get("@context")
    contexts = context if isinstance(context, list) else [context]
    if any(isinstance(c, str) and "presentation/3" in c for c in contexts):
        return "3.0"
    if any(isinstance(c, str) and "presentation/2" in c for c in contexts):
        return "2.1"
    return "3.0" if "type" in doc and "@type" not in doc else "2.1"


def doc_type(doc: Mapping[str, Any]) -> str:
    """ "Collection", "Manifest" or another type, without the 2.1 "sc:" prefix."""
    kind = doc.get("type") or doc.get("@type") or ""
    kind = kind[0] if isinstance(kind, list) and kind else kind
    return str(kind).removeprefix("sc:") if isinstance(kind, str) else ""


def first_id(value: Any) -> str | None:
    """The id ("id" in 3.0, "@id" in 2.1) of a reference, or of the first of a list; a string
    is its own id."""
    if isinstance(value, list):
        value = value[0] if value else None
    if isinstance(value, str):
        return value or None
    if isinstance(value, dict):
        got = value.get("id") or value.get("@id")
        return got if isinstance(got, str) and got else None
    return None


def _strings(value: Any) -> list[str]:
    if isinstance(value, str):
        return [value.strip()] if value.strip() else []
    if isinstance(value, list):
        return [s for v in value[:MAX_ENTRIES] for s in _strings(v)]
    if isinstance(value, int | float) and not isinstance(value, bool):
        return [str(value)]
    return []


def lang_text(value: Any, language: str) -> str | None:
    """Display text of a 3.0 language map or a 2.1 value, in ``language`` if given, else the
    values without a language ("none", 3.0 §4.1; plain strings in 2.1), else English, else the
    first language there is. Several values are joined with "; "."""
    if value is None:
        return None
    if isinstance(value, dict) and "@value" not in value:
        keys = [language, "none", "@none", "en", *sorted(value)]
        for key in keys:
            got = _strings(value.get(key))
            if got:
                return "; ".join(got)
        return None
    entries = value if isinstance(value, list) else [value]
    tagged: dict[str, list[str]] = {}
    for entry in entries[:MAX_ENTRIES]:
        if isinstance(entry, dict):  # 2.1 {"@value": ..., "@language": ...}
            lang = entry.get("@language")
            tagged.setdefault(lang if isinstance(lang, str) else "none", []).extend(
                _strings(entry.get("@value")))
        else:
            tagged.setdefault("none", []).extend(_strings(entry))
    return lang_text(tagged, language) if tagged else None


def metadata_pairs(doc: Mapping[str, Any], language: str) -> dict[str, str]:
    """The ``metadata`` label/value pairs as text (3.0 §4.1 and 2.1: same shape)."""
    out: dict[str, str] = {}
    entries = doc.get("metadata")
    if not isinstance(entries, list):
        return out
    for entry in entries[:MAX_ENTRIES]:
        if not isinstance(entry, dict):
            continue
        label = lang_text(entry.get("label"), language)
        value = lang_text(entry.get("value"), language)
        if label and value and label not in out:
            out[label] = value
    return out


def members(doc: Mapping[str, Any]) -> Iterator[tuple[str, str]]:
    """(type, id) of a collection's members: 3.0 ``items``; 2.1 ``collections``, ``manifests``
    and ``members``. Entries without an id are skipped."""
    lists = ("items",) if document_version(doc) == "3.0" else (
        "collections", "manifests", "members")
    for key in lists:
        entries = doc.get(key)
        if not isinstance(entries, list):
            continue
        for entry in entries[:MAX_ENTRIES]:
            ref = first_id(entry)
            if ref and isinstance(entry, dict):
                kind = doc_type(entry) or ("Collection" if key == "collections" else "Manifest")
                yield kind, ref


@dataclass(frozen=True)
class Painted:
    """The image painted on one canvas."""

    canvas_id: str
    canvas: Mapping[str, Any]
    image_id: str | None
    services: tuple[Mapping[str, Any], ...]


def _services(body: Mapping[str, Any]) -> list[Mapping[str, Any]]:
    raw = body.get("service")
    entries = raw if isinstance(raw, list) else [raw]
    return [s for s in entries if isinstance(s, dict) and first_id(s)]


def _image_body(body: Any) -> Mapping[str, Any] | None:
    """An Image body; a Choice gives its first item (3.0 §3, "Choice")."""
    if isinstance(body, list):
        body = body[0] if body else None
    if not isinstance(body, dict):
        return None
    if doc_type(body) in ("Choice", "oa:Choice"):
        return _image_body(body.get("items") or body.get("default"))
    return body


def _painted_3(canvas: Mapping[str, Any]) -> Mapping[str, Any] | None:
    pages = canvas.get("items")
    for page in pages[:MAX_ENTRIES] if isinstance(pages, list) else []:
        annos = page.get("items") if isinstance(page, dict) else None
        for anno in annos[:MAX_ENTRIES] if isinstance(annos, list) else []:
            if isinstance(anno, dict) and anno.get("motivation") in ("painting", ["painting"]):
                body = _image_body(anno.get("body"))
                if body is not None:
                    return body
    return None


def _painted_2(canvas: Mapping[str, Any]) -> Mapping[str, Any] | None:
    images = canvas.get("images")
    for anno in images[:MAX_ENTRIES] if isinstance(images, list) else []:
        if isinstance(anno, dict) and anno.get("motivation", "sc:painting") == "sc:painting":
            body = _image_body(anno.get("resource"))
            if body is not None:
                return body
    return None


def canvases(manifest: Mapping[str, Any]) -> Iterator[Painted]:
    """Each canvas of a manifest with its painted image (3.0 ``items``; 2.1 the first
    sequence's ``canvases``). A canvas without an id is skipped."""
    if document_version(manifest) == "3.0":
        listed = manifest.get("items")
        painted = _painted_3
    else:
        seqs = manifest.get("sequences")
        first = seqs[0] if isinstance(seqs, list) and seqs and isinstance(seqs[0], dict) else {}
        listed = first.get("canvases")
        painted = _painted_2
    for canvas in listed[:MAX_ENTRIES] if isinstance(listed, list) else []:
        if not isinstance(canvas, dict) or doc_type(canvas) not in ("Canvas", ""):
            continue
        cid = first_id(canvas)
        if cid is None:
            continue
        body = painted(canvas)
        services = _services(body) if body else []
        yield Painted(cid, canvas, first_id(body) if body else None, tuple(services))
