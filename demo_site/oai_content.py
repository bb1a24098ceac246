"""Source 6 of the demo archive: the society's OAI-PMH record feed on host 4.

Thirteen records in two sets ("herbarium", "feathers"), four to a ListRecords page (four
pages of resumption tokens), one of them deleted, one under a licence the demo policy does
not allow. The repository itself is :class:`demo_site.oai.Repository`; the demo server arms
its expired token and its 503 with Retry-After once per reset (``OAI_MISBEHAVIOURS``).
"""

from __future__ import annotations

from datetime import timedelta

from collector.demo_site.builder import Builder, Item, png, url
from collector.demo_site.catalogue import Licence
from collector.demo_site.oai import START, OaiRecord, stamp

OAI_HOST, OAI_PATH, OAI_PAGE = 4, "/oai", 4
OAI_COUNT, OAI_DELETED, OAI_NOT_ALLOWED = 13, 7, 10
# Armed on every demo server reset: one expired token (badResumptionToken, OAI-PMH 2.0
# §3.6) and one 503 with Retry-After of 1 s (§3.5.1 flow control).
OAI_MISBEHAVIOURS = {"expire_token": True, "unavailable": 1}
OAI_RIGHTS: tuple[Licence, ...] = (
    Licence("CC BY 4.0", "https://creativecommons.org/licenses/by/4.0/", "CC-BY-4.0"),
    Licence("CC0 1.0 Universal", "https://creativecommons.org/publicdomain/zero/1.0/",
            "CC0-1.0"),
    Licence(None, "https://creativecommons.org/licenses/by-sa/4.0/", "CC-BY-SA-4.0"),
    Licence("Public Domain Mark 1.0", None, "CC-PDM-1.0"),
)
NOT_ALLOWED = Licence("CC BY-NC 4.0", "https://creativecommons.org/licenses/by-nc/4.0/",
                      "CC-BY-NC-4.0")


def oai_key(n: int) -> str:
    """The OAI identifier of record ``n`` (OAI-PMH 2.0 §2.4: oai-identifier syntax)."""
    return f"oai:fernhollow.example.org:rec-{n:03d}"


def build_oai(b: Builder) -> None:
    """Add the feed's records, their images and expected outcomes to the archive."""
    records = []
    for n in range(1, OAI_COUNT + 1):
        key = oai_key(n)
        title, creator, date = b.person(key)
        lic = NOT_ALLOWED if n == OAI_NOT_ALLOWED else OAI_RIGHTS[n % len(OAI_RIGHTS)]
        record = OaiRecord(
            identifier=key, datestamp=START + timedelta(days=n),
            sets=("herbarium",) if n % 2 else ("feathers",), title=title, creator=creator,
            rights=tuple(v for v in (lic.text, lic.url) if v), date=date,
            identifiers=(url(OAI_HOST, f"/records/rec-{n:03d}"),
                         url(OAI_HOST, f"/oai-media/rec-{n:03d}.png")),
            deleted=n == OAI_DELETED)
        records.append(record.to_json())
        if record.deleted:
            continue  # never held, so nothing to withdraw: no item (manifest "oai" section)
        item = b.add(Item("oai-records", key, title, creator, date, lic, OAI_HOST,
                          f"/oai-media/rec-{n:03d}.png"))
        item.page_url = url(OAI_HOST, f"/records/rec-{n:03d}")
        b.serve_image(item, png(b.picture(key, 520, 390)), "image/png")
        if n == OAI_NOT_ALLOWED:
            item.state, item.reason = "skipped", "licence_not_allowed"
    b.apis["oai"] = {"host": OAI_HOST, "path": OAI_PATH, "records": records,
                     "page_size": OAI_PAGE,
                     "now": (START + timedelta(days=60)).isoformat()}


def oai_manifest() -> dict[str, object]:
    """The feed's facts for the manifest: what a harvest must see beyond its items."""
    return {"url": url(OAI_HOST, OAI_PATH), "sets": ["feathers", "herbarium"],
            "records": OAI_COUNT, "page_size": OAI_PAGE,
            "deleted": [oai_key(OAI_DELETED)],
            "expected_notes": ["token_expired"],
            "response_date": stamp(START + timedelta(days=60)),
            "misbehaviours": dict(OAI_MISBEHAVIOURS),
            "deleted_outcome": "no item: a deleted record never held is only counted"}
