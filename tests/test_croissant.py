"""croissant.json: validated and loaded by mlcroissant (the reference library), offline."""

from __future__ import annotations

import hashlib
import json
import re
import sqlite3
from pathlib import Path

import pytest
from support.datasheet_fixture import build_collection

from collector.exports.croissant import precheck, spdx_url
from collector.exports.datasheet import ExportResult, export_datasheet

mlc = pytest.importorskip("mlcroissant", reason="mlcroissant is a test dependency ([test])")

ANSWERS = """
[dataset]
url = "https://fernhollow.example/leaves"
version = "1.0.0"
cite_as = "Fernhollow Field Society (2026). Fernhollow leaves."
date_published = "2026-12-02"
"""
# Properties the Croissant 1.0 spec lists as required (datasheet_croissant.md section 2.1).
REQUIRED = ("license", "datePublished", "name", "description", "url", "creator",
            "conformsTo", "distribution")


@pytest.fixture(scope="module")
def coll(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """The fixture collection, built once for this module."""
    return build_collection(tmp_path_factory.mktemp("cr") / "leaves")


@pytest.fixture(scope="module")
def export(coll: Path, tmp_path_factory: pytest.TempPathFactory) -> ExportResult:
    """An export with images and complete dataset answers."""
    answers = tmp_path_factory.mktemp("a") / "answers.toml"
    answers.write_text(ANSWERS)
    return export_datasheet(coll, answers_path=answers, with_images=True)


def accepted(coll: Path) -> dict[str, tuple[int, int]]:
    """sha256 -> (width, height) of accepted files, by our own query."""
    with sqlite3.connect(coll / "ledger.sqlite") as conn:
        return {sha: (w, h) for sha, w, h in conn.execute(
            "SELECT DISTINCT i.file_sha256, f.width, f.height FROM items i JOIN files f "
            "ON f.sha256 = i.file_sha256 WHERE i.state IN ('stored', 'near_duplicate')")}


def test_mlcroissant_validates_without_any_warning(export: ExportResult) -> None:
    """With the dataset answers given, mlcroissant builds the dataset with no error or warning."""
    ds = mlc.Dataset(jsonld=export.out / "croissant.json")
    assert ds.metadata.ctx.issues.errors == set()
    assert ds.metadata.ctx.issues.warnings == set()
    assert export.croissant_problems == []


def test_without_answers_only_recommended_properties_are_warned(coll: Path,
                                                                tmp_path: Path) -> None:
    """Without answers, mlcroissant warns only about recommended properties; our pre-check
    names the required url that mlcroissant lets pass silently."""
    result = export_datasheet(coll, out=tmp_path / "o")
    ds = mlc.Dataset(jsonld=tmp_path / "o" / "croissant.json")
    assert ds.metadata.ctx.issues.warnings  # recommended properties are left unset here
    for warning in ds.metadata.ctx.issues.warnings:
        assert "is recommended" in warning
        assert not any(f"/{p}\"" in warning for p in REQUIRED)
    assert result.croissant_problems == [
        "required property 'url' is empty: set dataset.url in the answers file"]
    md = (tmp_path / "o" / "datasheet.md").read_text()
    assert "set dataset.url in the answers file" in md


def test_provenance_records_load_and_match_the_ledger(coll: Path, export: ExportResult) -> None:
    """Iterating the provenance record set yields one record per accepted file, same sha256."""
    ds = mlc.Dataset(jsonld=export.out / "croissant.json")
    records = list(ds.records("provenance"))
    shas = {r["provenance/sha256"].decode() for r in records}
    ledger = accepted(coll)
    assert shas == set(ledger) and len(records) == len(ledger) == 10
    for r in records:
        sha = r["provenance/sha256"].decode()
        assert (r["provenance/width"], r["provenance/height"]) == ledger[sha]


def test_image_records_load_and_join_to_provenance(coll: Path, export: ExportResult) -> None:
    """Every image record set loads; together they hold each accepted file once, with the
    pixel size the ledger recorded, and each file name joins to a provenance row."""
    ds = mlc.Dataset(jsonld=export.out / "croissant.json")
    ledger = accepted(coll)
    by_name = {sha[:12]: sha for sha in ledger}  # readable names end in 12 hex digits
    seen = []
    image_sets = [rs.uuid for rs in ds.metadata.record_sets if rs.uuid.startswith("images-")]
    assert sorted(image_sets) == ["images-jpg", "images-png"]
    for rs in image_sets:
        for r in ds.records(rs):
            name = r[f"{rs}/file_name"].decode()
            sha = by_name[name.split(".")[0][-12:]]
            assert r[f"{rs}/image"].size == ledger[sha]
            data = (export.out / "images" / name).read_bytes()
            assert hashlib.sha256(data).hexdigest() == sha  # FIPS 180-4
            seen.append(sha)
    assert sorted(seen) == sorted(ledger)


def test_dataset_properties_and_rai_timeframe(coll: Path, export: ExportResult) -> None:
    """conformsTo names Croissant 1.0 and RAI 1.0; licences are SPDX URLs; the RAI timeframe
    (vocabulary spelling) is [first, last] gathering time and survives mlcroissant's to_json."""
    doc = json.loads((export.out / "croissant.json").read_text())
    assert doc["conformsTo"] == ["http://mlcommons.org/croissant/1.0",
                                 "http://mlcommons.org/croissant/RAI/1.0"]
    # SPDX License List page URLs (standards.md section 7 ids).
    assert sorted(doc["license"]) == sorted(spdx_url(x) for x in
                                            ("CC-BY-4.0", "CC-BY-SA-4.0", "CC0-1.0"))
    assert all(re.fullmatch(r"https://spdx\.org/licenses/[A-Za-z0-9.+-]+\.html", u)
               for u in doc["license"])
    with sqlite3.connect(coll / "ledger.sqlite") as conn:
        start, end = conn.execute("SELECT min(t), max(t) FROM (SELECT started_at t FROM "
                                  "fetches UNION ALL SELECT stored_at FROM files)").fetchone()
    assert doc["rai:dataCollectionTimeframe"] == [start, end]
    assert doc["rai:dataCollectionType"] == ["Manual Human Curator", "Web API"]
    assert "rai:dataCollectionTimeFrame" not in doc
    kept = mlc.Dataset(jsonld=export.out / "croissant.json").metadata.to_json()
    assert kept.get("rai:dataCollectionTimeframe") == [start, end]
    assert kept["rai:dataCollection"] == doc["rai:dataCollection"]


def test_provenance_file_object_hash_is_the_files_sha256(export: ExportResult) -> None:
    """The FileObject's sha256 is the SHA-256 of provenance.csv as written (FIPS 180-4)."""
    doc = json.loads((export.out / "croissant.json").read_text())
    node = next(n for n in doc["distribution"] if n["@id"] == "provenance.csv")
    digest = hashlib.sha256((export.out / "provenance.csv").read_bytes()).hexdigest()
    assert node["sha256"] == digest


def test_precheck_catches_what_mlcroissant_lets_pass(export: ExportResult) -> None:
    """Free-text licences, a missing creator and the spec's bare reference shorthand are
    reported by our pre-check (mlcroissant accepts the first two silently)."""
    doc = json.loads((export.out / "croissant.json").read_text())
    assert precheck(doc) == []
    doc["license"] = ["CC BY 4.0 (see page)"]
    del doc["creator"]
    rs = next(r for r in doc["recordSet"] if r["@id"] == "images-png")
    rs["field"][0]["references"] = {"@id": "provenance/file_name"}
    doc["rai:dataCollectionTimeframe"] = "2026-01-01/2026-02-01"
    problems = precheck(doc)
    assert "license 'CC BY 4.0 (see page)' is not an SPDX licence URL" in problems
    assert any(p.startswith("required property 'creator' is empty") for p in problems)
    assert any("images-png/file_name" in p and "references" in p for p in problems)
    assert any("dataCollectionTimeframe" in p for p in problems)
