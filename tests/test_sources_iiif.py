"""The iiif source kind: collections, manifests (Presentation 3.0 and 2.1), fields, one item per
canvas, image requests sized through info.json, loops and limits.

Document shapes follow IIIF Presentation API 3.0 §3 (Collection -> Manifest -> Canvas ->
AnnotationPage -> Annotation "painting" -> Image body with an ImageService3/ImageService2
service), §4.1 (label/summary/metadata as language maps, "none" for values without a language,
rights as a URI, requiredStatement, homepage, navDate, partOf) and Presentation API 2.1
(sequences -> canvases -> images -> resource.service; label with @language values, license,
attribution, related, within). Size words: Image API 3.0 §4.2 and 2.1 §4.2.
"""

from __future__ import annotations

from typing import Any

from support.fetcher import FakeFetcher, collect
from support.server import json_answer

BASE = "https://iiif.example.org"
P3 = "http://iiif.io/api/presentation/3/context.json"
P2 = "http://iiif.io/api/presentation/2/context.json"
NOC_US = "http://rightsstatements.org/vocab/NoC-US/1.0/"


def canvas3(mid: str, n: int, service: dict | None) -> dict:
    """A 3.0 canvas painted with one image (Presentation 3.0 §3)."""
    body: dict[str, Any] = {"id": f"{BASE}/img/{mid}-{n}/full/max/0/default.jpg",
                            "type": "Image", "format": "image/jpeg"}
    if service is not None:
        body["service"] = [service]
    return {"id": f"{BASE}/{mid}/canvas/{n}", "type": "Canvas", "height": 8000, "width": 6000,
            "label": {"none": [f"leaf {n}"]},
            "items": [{"id": f"{BASE}/{mid}/page/{n}", "type": "AnnotationPage", "items": [
                {"id": f"{BASE}/{mid}/anno/{n}", "type": "Annotation",
                 "motivation": "painting", "body": body, "target": f"{BASE}/{mid}/canvas/{n}"}]}]}


def svc3(mid: str, n: int, level: str = "level2") -> dict:
    """An ImageService3 reference (Presentation 3.0 §3, Image API 3.0 §5)."""
    return {"id": f"{BASE}/img/{mid}-{n}", "type": "ImageService3", "profile": level}


def manifest3(mid: str, canvases: int = 2, **over: Any) -> dict:
    """A 3.0 manifest with English and German labels and the fields §4.1 names."""
    doc = {"@context": P3, "id": f"{BASE}/{mid}/manifest.json", "type": "Manifest",
           "label": {"en": [f"Fern sheet {mid}"], "de": [f"Farnblatt {mid}"]},
           "summary": {"en": ["A pressed fern."]},
           "metadata": [{"label": {"en": ["Creator"]}, "value": {"none": ["Ada Quill"]}},
                        {"label": {"en": ["Date"]}, "value": {"none": ["1911-05-02"]}}],
           "rights": "https://creativecommons.org/licenses/by/4.0/",
           "requiredStatement": {"label": {"en": ["Attribution"]},
                                 "value": {"en": ["Fernhollow Field Society"]}},
           "homepage": [{"id": f"{BASE}/web/{mid}", "type": "Text"}],
           "navDate": "1911-05-02T00:00:00Z",
           "partOf": [{"id": f"{BASE}/collection.json", "type": "Collection"}],
           "items": [canvas3(mid, n, svc3(mid, n)) for n in range(1, canvases + 1)]}
    doc.update(over)
    return doc


def info(mid: str, n: int, **over: Any) -> dict:
    """Image API 3.0 info.json for one image (§5)."""
    doc = {"@context": "http://iiif.io/api/image/3/context.json", "id": f"{BASE}/img/{mid}-{n}",
           "type": "ImageService3", "protocol": "http://iiif.io/api/image",
           "profile": "level2", "width": 6000, "height": 8000}
    doc.update(over)
    return doc


def collection3(cid: str, refs: list[tuple[str, str]]) -> dict:
    """A 3.0 collection whose items are (type, url) references."""
    return {"@context": P3, "id": f"{BASE}/{cid}", "type": "Collection",
            "label": {"en": [cid]}, "items": [{"id": u, "type": t, "label": {"en": ["x"]}}
                                               for t, u in refs]}


def source(**over: Any) -> dict:
    """A iiif source table."""
    table = {"name": "iiif", "kind": "iiif", "url": f"{BASE}/collection.json",
             "target_size": 1024}
    table.update(over)
    return table


def pages_for(*docs: dict, infos: list[dict] = ()) -> dict:
    """In-memory answers: each document at its id (2.1: @id), each info.json under its id."""
    pages = {d.get("id") or d["@id"]: json_answer(d) for d in docs}
    pages.update({f"{i.get('id') or i['@id']}/info.json": json_answer(i) for i in infos})
    return pages


def test_nested_collection_gives_one_item_per_canvas_with_fields():
    """collection -> sub-collection -> manifest; each canvas is an item with its fields."""
    top = collection3("collection.json", [("Collection", f"{BASE}/sub.json")])
    sub = collection3("sub.json", [("Manifest", f"{BASE}/a/manifest.json")])
    fetcher = FakeFetcher(pages_for(top, sub, manifest3("a"), infos=[info("a", 1),
                                                                      info("a", 2)]))
    cands, notes = collect(source(), fetcher)
    assert notes == []
    assert [c.source_key for c in cands] == [f"{BASE}/a/canvas/1", f"{BASE}/a/canvas/2"]
    first = cands[0]
    assert first.title == "Fern sheet a (leaf 1)"
    assert first.creator == "Ada Quill" and first.date == "1911-05-02"
    assert first.licence_url == "https://creativecommons.org/licenses/by/4.0/"
    assert first.page_url == f"{BASE}/web/a"
    assert first.image_url == f"{BASE}/img/a-1/full/!768,1024/0/default.jpg"
    facts = first.metadata["iiif"]
    assert facts["required_statement"] == "Fernhollow Field Society"
    assert facts["summary"] == "A pressed fern." and facts["nav_date"].startswith("1911")
    assert facts["part_of"] == f"{BASE}/collection.json"
    assert first.size_request == {
        "service": f"{BASE}/img/a-1", "image_api": "3.0", "level": 2,
        "full_size": [6000, 8000], "size": "!768,1024", "asked_size": [768, 1024],
        "why": "level 2: scaled to fit target_size 1024"}


def test_language_choice_with_fallback():
    """language = "de" takes the German label; a language the map lacks falls back (§4.1)."""
    fetcher = FakeFetcher(pages_for(manifest3("a", 1), infos=[info("a", 1)]))
    cands, _ = collect(source(url=f"{BASE}/a/manifest.json", language="de"), fetcher)
    assert cands[0].title == "Farnblatt a"
    cands, _ = collect(source(url=f"{BASE}/a/manifest.json", language="fr"), fetcher)
    assert cands[0].title == "Fern sheet a"  # no "fr", no "none": English


def test_first_canvas_only():
    """first_canvas_only takes one item per manifest."""
    fetcher = FakeFetcher(pages_for(manifest3("a", 3), infos=[info("a", 1)]))
    cands, _ = collect(source(url=f"{BASE}/a/manifest.json", first_canvas_only=True), fetcher)
    assert [c.source_key for c in cands] == [f"{BASE}/a/canvas/1"]


def test_info_json_is_read_once_per_service():
    """Two canvases on one image service: one info.json request (the per-run cache)."""
    doc = manifest3("a", 2)
    doc["items"][1]["items"][0]["items"][0]["body"]["service"] = [svc3("a", 1)]
    fetcher = FakeFetcher(pages_for(doc, infos=[info("a", 1)]))
    cands, _ = collect(source(url=f"{BASE}/a/manifest.json"), fetcher)
    assert len(cands) == 2
    assert [c.purpose for c in fetcher.calls].count("info") == 1


def test_presentation_2_1_manifest():
    """A 2.1 manifest: sequences/canvases/images/resource.service, license, attribution."""
    doc = {"@context": P2, "@id": f"{BASE}/old/manifest.json", "@type": "sc:Manifest",
           "label": [{"@value": "Moosblatt", "@language": "de"},
                     {"@value": "Moss sheet", "@language": "en"}],
           "metadata": [{"label": "Author", "value": "B. Lichen"}],
           "license": NOC_US, "attribution": "Fernhollow Field Society",
           "related": f"{BASE}/web/old",
           "sequences": [{"@type": "sc:Sequence", "canvases": [{
               "@id": f"{BASE}/old/canvas/1", "@type": "sc:Canvas", "label": "p. 1",
               "images": [{"@type": "oa:Annotation", "motivation": "sc:painting",
                           "resource": {"@id": f"{BASE}/img2/old-1/full/full/0/default.jpg",
                                        "@type": "dctypes:Image", "service": {
                                            "@context": "http://iiif.io/api/image/2/context.json",
                                            "@id": f"{BASE}/img2/old-1",
                                            "profile": "http://iiif.io/api/image/2/level1.json"}},
                           "on": f"{BASE}/old/canvas/1"}]}]}]}
    info2 = {"@context": "http://iiif.io/api/image/2/context.json", "@id": f"{BASE}/img2/old-1",
             "protocol": "http://iiif.io/api/image", "width": 3000, "height": 2000,
             "profile": ["http://iiif.io/api/image/2/level1.json", {"maxWidth": 800}]}
    fetcher = FakeFetcher(pages_for(doc, infos=[info2]))
    cands, notes = collect(source(url=f"{BASE}/old/manifest.json"), fetcher)
    assert notes == []
    (cand,) = cands
    assert cand.title == "Moss sheet" and cand.creator == "B. Lichen"
    assert cand.licence_url == NOC_US and cand.page_url == f"{BASE}/web/old"
    assert cand.metadata["iiif"]["required_statement"] == "Fernhollow Field Society"
    # level 1 asks by width (w,); maxWidth 800 caps it (2.1 §5 profile object)
    assert cand.image_url == f"{BASE}/img2/old-1/full/800,/0/default.jpg"


def test_collection_cycle_and_self_listing_are_read_once():
    """A collection listing itself and a cycle A -> B -> A end with a loop note."""
    a = collection3("collection.json", [("Collection", f"{BASE}/b.json"),
                                        ("Collection", f"{BASE}/collection.json")])
    b = collection3("b.json", [("Collection", f"{BASE}/collection.json"),
                               ("Manifest", f"{BASE}/a/manifest.json"),
                               ("Manifest", f"{BASE}/a/manifest.json#again")])
    fetcher = FakeFetcher(pages_for(a, b, manifest3("a", 1), infos=[info("a", 1)]))
    cands, notes = collect(source(), fetcher)
    assert len(cands) == 1
    assert {n.kind for n in notes} == {"loop"}
    assert [c.purpose for c in fetcher.calls].count("listing") == 3


def test_max_depth_and_max_manifests_are_enforced_with_notes():
    """Nesting beyond max_depth is not read; reading stops at max_manifests."""
    top = collection3("collection.json", [("Collection", f"{BASE}/sub.json")]
                      + [("Manifest", f"{BASE}/{m}/manifest.json") for m in "bc"])
    sub = collection3("sub.json", [("Manifest", f"{BASE}/a/manifest.json")])
    docs = [top, sub, *(manifest3(m, 1) for m in "abc")]
    infos = [info(m, 1) for m in "abc"]
    cands, notes = collect(source(max_depth=0), FakeFetcher(pages_for(*docs, infos=infos)))
    assert {c.source_key for c in cands} == {f"{BASE}/b/canvas/1", f"{BASE}/c/canvas/1"}
    assert [n.kind for n in notes] == ["max_depth"]
    cands, notes = collect(source(max_manifests=1), FakeFetcher(pages_for(*docs, infos=infos)))
    assert len(cands) == 1 and "max_manifests" in {n.kind for n in notes}


def test_tiles_only_service_gives_a_note_and_no_item():
    """A level-0 service with only tiles and a large full size: a note, no request."""
    doc = manifest3("a", 1)
    doc["items"][0]["items"][0]["items"][0]["body"]["service"] = [svc3("a", 1, "level0")]
    tiles = info("a", 1, profile="level0", tiles=[{"width": 512, "scaleFactors": [1, 2, 4]}])
    cands, notes = collect(source(url=f"{BASE}/a/manifest.json"),
                           FakeFetcher(pages_for(doc, infos=[tiles])))
    assert cands == []
    assert [n.kind for n in notes] == ["iiif_size"] and "only tiles" in notes[0].message


def test_a_manifest_that_lists_itself_is_not_walked_again():
    """A manifest whose items hold a reference to itself yields its canvases once."""
    doc = manifest3("a", 1)
    doc["items"].append({"id": f"{BASE}/a/manifest.json", "type": "Manifest"})
    cands, notes = collect(source(url=f"{BASE}/a/manifest.json"),
                           FakeFetcher(pages_for(doc, infos=[info("a", 1)])))
    assert len(cands) == 1 and notes == []


def test_image_without_a_service_is_used_as_given_and_unreadable_info_is_noted():
    """No service: the painted resource's URL; an info.json that fails: a note, no item."""
    doc = manifest3("a", 2)
    doc["items"][0]["items"][0]["items"][0]["body"].pop("service")
    cands, notes = collect(source(url=f"{BASE}/a/manifest.json"),
                           FakeFetcher(pages_for(doc)))  # no info.json answers: 404
    assert [c.image_url for c in cands] == [f"{BASE}/img/a-1/full/max/0/default.jpg"]
    assert {n.kind for n in notes} == {"fetch_failed", "iiif_size"}


def test_rights_as_text_and_a_canvas_with_its_own_rights():
    """A rights value that is no URI goes to licence_raw; a canvas's own rights win (3.0 §4.1
    allows rights on a Canvas)."""
    doc = manifest3("a", 2, rights="CC BY 4.0")
    doc["items"][1]["rights"] = "http://rightsstatements.org/vocab/InC/1.0/"
    cands, _ = collect(source(url=f"{BASE}/a/manifest.json"),
                       FakeFetcher(pages_for(doc, infos=[info("a", 1), info("a", 2)])))
    assert (cands[0].licence_raw, cands[0].licence_url) == ("CC BY 4.0", None)
    assert (cands[1].licence_raw, cands[1].licence_url) == (
        None, "http://rightsstatements.org/vocab/InC/1.0/")
