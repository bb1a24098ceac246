"""``croissant.json``: MLCommons Croissant 1.0 JSON-LD with the RAI 1.0 extension.

Built with the standard library from the datasheet facts (:func:`collector.exports.datasheet
._facts` plus the release counts); mlcroissant is used only by the tests.

Choices, with the reason for each:

- ``@context`` is the Croissant 1.0 recommended context (croissant-spec.md, appendix) with
  ``https://schema.org/``: mlcroissant 1.1.1 rejects an ``http`` schema.org namespace.
- ``conformsTo`` is ``[".../croissant/1.0", ".../croissant/RAI/1.0"]`` (the RAI spec says a
  dataset using it declares that conformance).
- ``license`` lists one SPDX URL per licence present in the release,
  ``https://spdx.org/licenses/<id>.html`` (the spec recommends SPDX URLs).
- ``rai:dataCollectionTimeframe`` uses the vocabulary's spelling (croissant_rai.ttl and the RAI
  property table) as ``[start, end]`` ISO 8601 DateTimes. mlcroissant 1.1.1 parses only
  ``dataCollectionTimeFrame`` (capital F); it keeps our key unparsed and does not warn. We
  follow the vocabulary, not the parser, and never use the ``start/end`` interval form (which
  mlcroissant's parser rejects).
- Field references use ``{"field": {"@id": ...}}``: mlcroissant crashes on the bare
  ``{"@id": ...}`` shorthand.
- Images are one FileSet per file extension (``images/*.png``), since a FileSet has a single
  ``encodingFormat``; each has its own RecordSet joined to the provenance rows by file name.

:func:`precheck` tests what the spec requires but mlcroissant does not enforce (name,
description, url, creator, datePublished, SPDX licence URLs, a non-empty recordSet, resolvable
references, hashes on FileObjects).
"""

from __future__ import annotations

import re
from datetime import datetime
from typing import TYPE_CHECKING, Any

from collector.exports.datasheet_reservations import rai_reservations

if TYPE_CHECKING:
    from collector.exports.facts import DatasheetFacts

CROISSANT_1_0 = "http://mlcommons.org/croissant/1.0"
RAI_1_0 = "http://mlcommons.org/croissant/RAI/1.0"
CONFORMS_TO = [CROISSANT_1_0, RAI_1_0]

# Croissant 1.0 recommended context (croissant-spec.md, "Appendix 1: JSON-LD context"), with
# schema.org over https as mlcroissant requires (and the keys mlcroissant 1.1.1 lists as
# standard, so it does not warn about a non-standard context).
CONTEXT: dict[str, Any] = {
    "@language": "en",
    "@vocab": "https://schema.org/",
    "citeAs": "cr:citeAs",
    "column": "cr:column",
    "conformsTo": "dct:conformsTo",
    "cr": "http://mlcommons.org/croissant/",
    "rai": "http://mlcommons.org/croissant/RAI/",
    "data": {"@id": "cr:data", "@type": "@json"},
    "dataType": {"@id": "cr:dataType", "@type": "@vocab"},
    "dct": "http://purl.org/dc/terms/",
    "equivalentProperty": "cr:equivalentProperty",
    "examples": {"@id": "cr:examples", "@type": "@json"},
    "extract": "cr:extract",
    "field": "cr:field",
    "fileProperty": "cr:fileProperty",
    "fileObject": "cr:fileObject",
    "fileSet": "cr:fileSet",
    "format": "cr:format",
    "includes": "cr:includes",
    "isLiveDataset": "cr:isLiveDataset",
    "jsonPath": "cr:jsonPath",
    "key": "cr:key",
    "md5": "cr:md5",
    "parentField": "cr:parentField",
    "path": "cr:path",
    "recordSet": "cr:recordSet",
    "references": "cr:references",
    "regex": "cr:regex",
    "repeated": "cr:repeated",
    "replace": "cr:replace",
    "samplingRate": "cr:samplingRate",
    "sc": "https://schema.org/",
    "separator": "cr:separator",
    "source": "cr:source",
    "subField": "cr:subField",
    "transform": "cr:transform",
}

PROVENANCE_FILE = "provenance.csv"
# provenance.csv columns -> (Croissant dataType, description). Order = the CSV's columns.
PROVENANCE_FIELDS: dict[str, tuple[str, str]] = {
    "file_name": ("sc:Text", "file name in images/: source, source key, 12 hex digits of sha256"),
    "sha256": ("sc:Text", "SHA-256 of the file bytes (FIPS 180-4), hex"),
    "source": ("sc:Text", "name of the recipe source the item came from"),
    "source_key": ("sc:Text", "the source's own id for the item"),
    "page_url": ("sc:URL", "the item's page, as declared by the source"),
    "image_url": ("sc:URL", "the URL the image was downloaded from (empty for local scans)"),
    "title": ("sc:Text", "title as declared by the source"),
    "creator": ("sc:Text", "creator as declared by the source"),
    "licence_raw": ("sc:Text", "licence text as declared by the source"),
    "spdx_id": ("sc:Text", "SPDX id the licence was normalised to (empty if unknown)"),
    "licence_url": ("sc:URL", "licence URL as declared, else the licence deed URL"),
    "fetched_at": ("sc:DateTime", "when the file was received (UTC)"),
    "width": ("sc:Integer", "width in pixels"),
    "height": ("sc:Integer", "height in pixels"),
    "format": ("sc:Text", "image format (PNG, JPEG, ...)"),
    "mime": ("sc:Text", "media type"),
    "size": ("sc:Integer", "file size in bytes"),
    "flags": ("sc:Text", "review flags separated by ';' (gps, camera_serial, owner_name, "
                         "licence_conflict, ...)"),
    "derived_from": ("sc:Text", "SHA-256 of the stored original when the released file is "
                                "derived from it (flattened onto a background colour), else "
                                "empty"),
}
# Per-row licence and creator also mean schema.org's license/creator (Croissant 1.1's
# equivalentProperty; mlcroissant 1.1.1 accepts it under 1.0).
EQUIVALENT = {"licence_url": "sc:license", "creator": "sc:creator"}

SPDX_URL_RE = re.compile(r"^https://spdx\.org/licenses/[A-Za-z0-9][A-Za-z0-9.+-]*\.html$")


def spdx_url(spdx_id: str) -> str:
    """The SPDX License List page of an id, e.g. https://spdx.org/licenses/CC-BY-4.0.html."""
    return f"https://spdx.org/licenses/{spdx_id}.html"


def _field(record: str, column: str, data_type: str, description: str) -> dict[str, Any]:
    out: dict[str, Any] = {
        "@type": "cr:Field", "@id": f"{record}/{column}", "name": column,
        "description": description, "dataType": data_type,
        "source": {"fileObject": {"@id": PROVENANCE_FILE}, "extract": {"column": column}},
    }
    if column in EQUIVALENT:
        out["equivalentProperty"] = EQUIVALENT[column]
    return out


def _counts_text(pairs: dict[str, int]) -> str:
    return ", ".join(f"{k} {v}" for k, v in pairs.items()) or "none"


def build_croissant(facts: DatasheetFacts, answers: dict[str, str]) -> dict[str, Any]:
    """The Croissant JSON-LD document for one export."""
    coll = facts["collection"]
    release = facts["release"]
    creator = answers.get("dataset.creator") or coll.get("curator")
    doc: dict[str, Any] = {
        "@context": CONTEXT,
        "@type": "sc:Dataset",
        "conformsTo": CONFORMS_TO,
        "name": answers.get("dataset.name") or coll.get("name") or "",
        "description": answers.get("dataset.description") or coll.get("description") or "",
        "datePublished": answers.get("dataset.date_published") or facts["generated_at"][:10],
        # RightsStatements.org keys ("rs:NoC-US") are no SPDX licences: not listed here.
        "license": [spdx_url(k) for k in release["by_licence"]
                    if k != "unknown" and not k.startswith("rs:")],
    }
    if answers.get("dataset.url"):
        doc["url"] = answers["dataset.url"]
    if creator:
        doc["creator"] = {"@type": "sc:Person", "name": creator}
    if answers.get("dataset.version"):
        doc["version"] = answers["dataset.version"]
    if answers.get("dataset.cite_as"):
        doc["citeAs"] = answers["dataset.cite_as"]
    doc.update(_rai(facts, answers))

    distribution: list[dict[str, Any]] = [{
        "@type": "cr:FileObject", "@id": PROVENANCE_FILE, "name": PROVENANCE_FILE,
        "description": "one row per file: where it came from, its licence and image facts",
        "contentUrl": PROVENANCE_FILE, "encodingFormat": "text/csv",
        "sha256": release["provenance_sha256"],
    }]
    records: list[dict[str, Any]] = [{
        "@type": "cr:RecordSet", "@id": "provenance", "name": "provenance",
        "description": "provenance of every file in this release",
        "field": [_field("provenance", col, dt, desc)
                  for col, (dt, desc) in PROVENANCE_FIELDS.items()],
    }]
    if release["with_images"]:
        for ext, info in sorted(release["by_ext"].items()):
            if info["files"]:
                file_set, record_set = _image_nodes(ext, info)
                distribution.append(file_set)
                records.append(record_set)
    doc["distribution"] = distribution
    doc["recordSet"] = records
    return doc


def _image_nodes(ext: str, info: dict[str, Any]) -> tuple[dict[str, Any], dict[str, Any]]:
    """The FileSet of a release's images with one extension, and its RecordSet (file name,
    joined to provenance, and the image content)."""
    fs_id, rs_id = f"files-{ext}", f"images-{ext}"
    file_set = {
        "@type": "cr:FileSet", "@id": fs_id, "name": fs_id,
        "description": f"the {info['files']} .{ext} images of this release",
        "encodingFormat": info["mime"] or f"image/{ext}",
        "includes": f"images/*.{ext}",
    }
    record_set = {
        "@type": "cr:RecordSet", "@id": rs_id, "name": rs_id,
        "description": f".{ext} images; file_name joins them to provenance",
        "field": [
            {"@type": "cr:Field", "@id": f"{rs_id}/file_name", "name": "file_name",
             "dataType": "sc:Text",
             "source": {"fileSet": {"@id": fs_id},
                        "extract": {"fileProperty": "filename"}},
             "references": {"field": {"@id": "provenance/file_name"}}},
            {"@type": "cr:Field", "@id": f"{rs_id}/image", "name": "image",
             "dataType": "sc:ImageObject",
             "source": {"fileSet": {"@id": fs_id},
                        "extract": {"fileProperty": "content"}}},
        ],
    }
    return file_set, record_set


def _rai(facts: DatasheetFacts, answers: dict[str, str]) -> dict[str, Any]:
    """The RAI 1.0 data-collection properties, drafted from the ledger facts."""
    items, acc, req = facts["items"], facts["accepted"], facts["requests"]
    release, dup, flagged = facts["release"], facts["duplicates"], facts["flagged"]
    sources = "; ".join(f"{s['name']} ({s['mechanism']}; {s['items']} items listed, "
                        f"{s['accepted']} accepted)" for s in facts["sources"]) or "none"
    out: dict[str, Any] = {
        "rai:dataCollection": (
            f"Gathered with collector {facts['tool_version']} from these sources: {sources}. "
            f"{items['total']} candidate items were recorded; {acc['files']} files were "
            f"accepted and {release['files']} are in this release. {req['total']} HTTP "
            f"requests were answered ({req['status_429']} with 429 Too Many Requests); "
            "robots.txt was obeyed and per-host budgets were applied."),
        "rai:dataCollectionType": sorted({s["collection_type"] for s in facts["sources"]}),
        "rai:dataCollectionRawData": (
            "Hosts: " + (_counts_text(acc["by_host"])) + ". Files are kept byte for byte as "
            "received and identified by their SHA-256; titles, creators and licences are as "
            "declared by the sources and were not verified."),
        "rai:dataCollectionMissingData": (
            "Items not in the collection, by state/reason: "
            + _counts_text({k: v for k, v in items["by_reason"].items()
                            if not k.startswith(("stored/", "near_duplicate/"))})
            + f". Accepted files without a creator: {facts['missing']['no_creator']}, "
            f"without a title: {facts['missing']['no_title']}, without a recognised licence: "
            f"{facts['missing']['no_licence']}."),
        "rai:dataPreprocessingProtocol": [
            f"Licence allowlist applied before download: "
            f"{', '.join(facts['policy']['licence_allow'])}.",
            "Image checks (format from magic bytes, full decode, size limits): "
            f"{items['by_state'].get('rejected', 0)} rejected.",
            f"Exact duplicates (same SHA-256 or same image URL): {dup['exact']} not stored "
            "again.",
            f"Near duplicates (pHash distance <= {dup['near_distance']}): {dup['near_kept']} "
            f"kept and marked, {dup['near_dropped']} dropped (recipe: "
            f"{dup['policy']}).",
            f"This release left out {release['excluded_licence']} files by licence policy "
            f"and {release['excluded_flagged']} flagged files.",
            rai_reservations(facts),
        ],
        "rai:dataManipulationProtocol": (
            "No pixels or metadata were changed: files are stored as received. Crops cut "
            f"from scanner-bed scans ({acc['crops']}) are new PNG files whose parent scan is "
            "recorded."),
        "rai:personalSensitiveInformation": [
            f"Metadata flags among accepted files: {_counts_text(facts['flags'])}; "
            f"{flagged['personal']} files carry possible personal data (GPS position, camera "
            "serial, owner name) and need review before publication. Faces or names inside "
            "pictures are not detected.",
        ],
    }
    if facts["timeframe"]["start"]:
        out["rai:dataCollectionTimeframe"] = [facts["timeframe"]["start"],
                                              facts["timeframe"]["end"]]
    _add_answers(out, answers)
    return out


def _add_answers(out: dict[str, Any], answers: dict[str, str]) -> None:
    """Add the datasheet answers that have a RAI property (uses, limits, sensitive data,
    maintenance) to the drafted properties."""
    for key, prop in (("composition.sensitive", "rai:personalSensitiveInformation"),
                      ("composition.identification", "rai:personalSensitiveInformation")):
        if answers.get(key):
            out[prop].append(answers[key])
    for key, prop in (("uses.possible", "rai:dataUseCases"), ("uses.prior", "rai:dataUseCases"),
                      ("uses.avoid", "rai:dataLimitations"), ("uses.risks", "rai:dataBiases")):
        if answers.get(key):
            out.setdefault(prop, []).append(answers[key])
    if answers.get("maintenance.updates"):
        out["rai:dataReleaseMaintenancePlan"] = answers["maintenance.updates"]


def _is_datetime(value: Any) -> bool:
    try:
        datetime.fromisoformat(str(value).replace("Z", "+00:00"))
        return True
    except ValueError:
        return False


def precheck(doc: dict[str, Any]) -> list[str]:
    """What the Croissant 1.0 spec requires but mlcroissant 1.1.1 does not enforce.

    Returns one actionable message per problem (empty list: nothing missing), in the order:
    the dataset's own properties, the distribution, the record sets, the collection timeframe."""
    problems = _precheck_dataset(doc)
    ids = _precheck_distribution(doc, problems)
    _precheck_records(doc, ids, problems)
    frame = doc.get("rai:dataCollectionTimeframe")
    if frame is not None and not (isinstance(frame, list) and all(map(_is_datetime, frame))):
        problems.append("rai:dataCollectionTimeframe must be a list of ISO 8601 DateTimes")
    return problems


def _precheck_dataset(doc: dict[str, Any]) -> list[str]:
    """Problems with the context, type, conformance and required dataset properties."""
    problems: list[str] = []
    ctx = doc.get("@context")
    if not isinstance(ctx, dict) or ctx.get("sc") != "https://schema.org/":
        problems.append("@context must be an object defining sc as https://schema.org/")
    if doc.get("@type") != "sc:Dataset":
        problems.append("@type must be sc:Dataset")
    if CROISSANT_1_0 not in (doc.get("conformsTo") or []):
        problems.append(f"conformsTo must include {CROISSANT_1_0}")
    hints = {"name": "dataset.name (or [collection] name in the recipe)",
             "description": "dataset.description (or [collection] description)",
             "url": "dataset.url", "creator": "dataset.creator (or [collection] curator)"}
    for key, hint in hints.items():
        if not doc.get(key):
            problems.append(f"required property {key!r} is empty: set {hint} in the answers "
                            "file")
    if doc.get("url") and not str(doc["url"]).startswith(("http://", "https://")):
        problems.append("url must be an http(s) URL: fix dataset.url in the answers file")
    if not _is_datetime(doc.get("datePublished")):
        problems.append("datePublished must be an ISO 8601 date: fix dataset.date_published")
    licences = doc.get("license") or []
    if not licences:
        problems.append("required property 'license' is empty: no file in the release has a "
                        "recognised licence")
    problems.extend(f"license {u!r} is not an SPDX licence URL" for u in licences
                    if not SPDX_URL_RE.match(u))
    return problems


def _precheck_distribution(doc: dict[str, Any], problems: list[str]) -> set[str]:
    """Add the distribution's problems (duplicate ids, FileObjects without a checksum, FileSets
    without includes/encodingFormat); return the @ids seen."""
    ids: set[str] = set()
    for node in doc.get("distribution") or []:
        nid = node.get("@id")
        if nid in ids:
            problems.append(f"duplicate @id {nid!r}")
        ids.add(nid)
        if node.get("@type") == "cr:FileObject" and not (node.get("sha256") or node.get("md5")):
            problems.append(f"FileObject {nid!r} has no sha256")
        if node.get("@type") == "cr:FileSet" and not (node.get("includes")
                                                      and node.get("encodingFormat")):
            problems.append(f"FileSet {nid!r} needs includes and encodingFormat")
    if not doc.get("distribution"):
        problems.append("distribution is empty")
    return ids


def _precheck_records(doc: dict[str, Any], ids: set[str], problems: list[str]) -> None:
    """Add the record sets' problems: duplicate ids (ids gains theirs), fields without a
    dataType, references to no field, sources in no distribution node."""
    records = doc.get("recordSet") or []
    if not records:
        problems.append("recordSet is empty: nothing could be loaded")
    field_ids = {f.get("@id") for r in records for f in r.get("field", [])}
    for record in records:
        if record.get("@id") in ids:
            problems.append(f"duplicate @id {record.get('@id')!r}")
        ids.add(record.get("@id"))
        for fld in record.get("field", []):
            if not fld.get("dataType"):
                problems.append(f"field {fld.get('@id')!r} has no dataType")
            ref = fld.get("references")
            if ref is not None:
                target = (ref.get("field") or {}).get("@id") if isinstance(ref, dict) else None
                if target not in field_ids:
                    problems.append(f"field {fld.get('@id')!r} references {ref!r}, which is "
                                    "not a {'field': {'@id': ...}} of this document")
            src = fld.get("source") or {}
            node = src.get("fileObject") or src.get("fileSet") or {}
            if node.get("@id") not in ids:
                problems.append(f"field {fld.get('@id')!r} reads from an unknown node "
                                f"{node.get('@id')!r}")
