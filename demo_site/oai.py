"""An invented OAI-PMH 2.0 repository: the Fernhollow Field Society's record feed.

Pure and in memory: :meth:`Repository.respond` turns a request's query into an answer tuple
``(status, body, headers)`` (the shape of ``demo_site.loopback`` answers), so the loopback
server, the demo server and the hostile archive can all serve it. It speaks Identify and
ListRecords (OAI-PMH 2.0 §4.2, §4.6) in ``oai_dc``, with sets, ``from``/``until``
(inclusive, §3.3.1), resumption tokens with ``completeListSize`` and ``cursor`` (§3.5),
deleted records (persistent, §2.5.1) and the error codes of §3.6. Two misbehaviours can be
armed once each: an expired token (badResumptionToken) and a 503 with Retry-After (§3.5.1
flow control). Its clock is a number of seconds the test or demo moves on by hand.
"""

from __future__ import annotations

import threading
from dataclasses import asdict, dataclass, field
from datetime import UTC, datetime, timedelta
from typing import Any
from xml.sax.saxutils import escape, quoteattr

OAI_NS = "http://www.openarchives.org/OAI/2.0/"
START = datetime(2025, 3, 1, 9, 0, 0, tzinfo=UTC)
XML = {"Content-Type": "text/xml; charset=utf-8"}


def stamp(when: datetime) -> str:
    """UTC at seconds granularity, the form of §3.3.2 (YYYY-MM-DDThh:mm:ssZ)."""
    return when.strftime("%Y-%m-%dT%H:%M:%SZ")


@dataclass
class OaiRecord:
    """One record of the repository."""

    identifier: str
    datestamp: datetime
    sets: tuple[str, ...]
    title: str
    creator: str
    rights: tuple[str, ...]
    identifiers: tuple[str, ...]  # dc:identifier values: a page URL and an image URL
    date: str = "2025-02-14"
    deleted: bool = False

    def to_json(self) -> dict[str, Any]:
        """The record as the generator writes it into ``site.json``."""
        return {**asdict(self), "datestamp": self.datestamp.isoformat()}


@dataclass
class Repository:
    """The repository's records, clock and armed misbehaviours; thread-safe."""

    base_url: str
    records: list[OaiRecord] = field(default_factory=list)
    page_size: int = 4
    granularity: str = "YYYY-MM-DDThh:mm:ssZ"
    now: datetime = START + timedelta(days=30)
    expire_token_once: bool = False
    unavailable_once: int = 0  # Retry-After seconds of one 503 on a resumption request
    requests: list[dict[str, str]] = field(default_factory=list)
    _lock: threading.Lock = field(default_factory=threading.Lock, repr=False)

    # -- content and misbehaviours ----------------------------------------------------------
    @classmethod
    def from_json(cls, api: dict[str, Any], base_url: str, port: int) -> Repository:
        """The repository the demo archive's generator described (``site.json``), its URLs'
        ``{port}`` filled in."""
        def fill(values: list[str]) -> tuple[str, ...]:
            return tuple(v.replace("{port}", str(port)) for v in values)

        records = [OaiRecord(
            identifier=r["identifier"], datestamp=datetime.fromisoformat(r["datestamp"]),
            sets=tuple(r["sets"]), title=r["title"], creator=r["creator"],
            rights=tuple(r["rights"]), identifiers=fill(r["identifiers"]), date=r["date"],
            deleted=r["deleted"]) for r in api["records"]]
        return cls(base_url, records, page_size=api["page_size"],
                   now=datetime.fromisoformat(api["now"]))

    def arm(self, *, expire_token: bool, unavailable: int) -> None:
        """Arm the one-off misbehaviours again (the demo server does on every reset)."""
        with self._lock:
            self.expire_token_once, self.unavailable_once = expire_token, unavailable
            self.requests.clear()

    # -- changing the repository ---------------------------------------------------------
    def tick(self, seconds: int = 60) -> None:
        """Move the repository's clock on."""
        self.now += timedelta(seconds=seconds)

    def add(self, record: OaiRecord) -> None:
        """Add a record, stamped with the repository's current time."""
        record.datestamp = self.now
        self.records.append(record)

    def delete(self, identifier: str) -> None:
        """Mark a record deleted (persistent deletions: the header stays, §2.5.1)."""
        for record in self.records:
            if record.identifier == identifier:
                record.deleted, record.datestamp = True, self.now

    # -- answering -----------------------------------------------------------------------
    def respond(self, query: dict[str, str]) -> tuple[int, bytes, dict[str, str]]:
        """The answer to one request (its query parameters)."""
        with self._lock:
            self.requests.append(dict(query))
            verb = query.get("verb")
            if verb == "Identify":
                return self._ok(self._identify(), query)
            if verb != "ListRecords":
                return self._error("badVerb", f"verb {verb!r} is not served here", query)
            if "resumptionToken" in query:
                return self._resume(query)
            return self._list(query, 0)

    def _identify(self) -> str:
        return ("<Identify><repositoryName>Fernhollow Field Society records</repositoryName>"
                f"<baseURL>{escape(self.base_url)}</baseURL>"
                "<protocolVersion>2.0</protocolVersion>"
                "<adminEmail>records@fernhollow.example.org</adminEmail>"
                f"<earliestDatestamp>{stamp(START)}</earliestDatestamp>"
                "<deletedRecord>persistent</deletedRecord>"
                f"<granularity>{self.granularity}</granularity></Identify>")

    def _resume(self, query: dict[str, str]) -> tuple[int, bytes, dict[str, str]]:
        if self.unavailable_once:
            seconds, self.unavailable_once = self.unavailable_once, 0
            return 503, b"busy harvesting, come back later\n", {
                "Retry-After": str(seconds), "Content-Type": "text/plain"}
        token = query["resumptionToken"]
        if len(query) != 2:  # §3.5: resumptionToken is an exclusive argument
            return self._error("badArgument", "resumptionToken is exclusive", query)
        if self.expire_token_once:
            self.expire_token_once = False
            return self._error("badResumptionToken", "the token has expired", query)
        try:
            args, offset = token.rsplit("|", 1)
            parts = dict(p.split("=", 1) for p in args.split("&") if p)
            return self._list({**parts, "verb": "ListRecords"}, int(offset), echo=query)
        except ValueError:
            return self._error("badResumptionToken", "not a token of ours", query)

    def _matching(self, query: dict[str, str]) -> list[OaiRecord]:
        since, until = query.get("from", ""), query.get("until", "")
        out = []
        for r in sorted(self.records, key=lambda r: (r.datestamp, r.identifier)):
            day_or_time = stamp(r.datestamp)[:len(since)] if since else ""
            if since and day_or_time < since:
                continue
            if until and stamp(r.datestamp)[:len(until)] > until:
                continue
            if query.get("set") and query["set"] not in r.sets:
                continue
            out.append(r)
        return out

    def _list(self, query: dict[str, str], offset: int, echo: dict[str, str] | None = None,
              ) -> tuple[int, bytes, dict[str, str]]:
        if query.get("metadataPrefix") != "oai_dc":
            return self._error("cannotDisseminateFormat", "only oai_dc is served", query)
        for name in ("from", "until"):
            if name in query and len(query[name]) > len(self.granularity):
                return self._error("badArgument", f"{name} is finer than the granularity",
                                   query)
        found = self._matching(query)
        if not found:
            return self._error("noRecordsMatch", "no records match", echo or query)
        chunk = found[offset: offset + self.page_size]
        body = "".join(self._record(r) for r in chunk)
        args = "&".join(f"{k}={query[k]}" for k in ("metadataPrefix", "set", "from", "until")
                        if k in query)
        nxt = offset + self.page_size
        value = f"{args}|{nxt}" if nxt < len(found) else ""
        if offset or value:
            body += (f'<resumptionToken completeListSize="{len(found)}" cursor="{offset}">'
                     f"{escape(value)}</resumptionToken>")
        return self._ok(f"<ListRecords>{body}</ListRecords>", echo or query)

    @staticmethod
    def _record(r: OaiRecord) -> str:
        sets = "".join(f"<setSpec>{escape(s)}</setSpec>" for s in r.sets)
        status = ' status="deleted"' if r.deleted else ""
        header = (f"<header{status}><identifier>{escape(r.identifier)}</identifier>"
                  f"<datestamp>{stamp(r.datestamp)}</datestamp>{sets}</header>")
        if r.deleted:
            return f"<record>{header}</record>"
        dc = [("title", r.title), ("creator", r.creator), ("date", r.date),
              *(("rights", x) for x in r.rights),
              *(("identifier", x) for x in r.identifiers), ("type", "Image")]
        elements = "".join(f"<dc:{n}>{escape(v)}</dc:{n}>" for n, v in dc)
        return (f"<record>{header}<metadata><oai_dc:dc "
                'xmlns:oai_dc="http://www.openarchives.org/OAI/2.0/oai_dc/" '
                'xmlns:dc="http://purl.org/dc/elements/1.1/">'
                f"{elements}</oai_dc:dc></metadata></record>")

    def _ok(self, inner: str, query: dict[str, str]) -> tuple[int, bytes, dict[str, str]]:
        attrs = "".join(f" {k}={quoteattr(v)}" for k, v in sorted(query.items())
                        if k in ("verb", "metadataPrefix", "set", "from", "until",
                                 "resumptionToken"))
        text = (f'<?xml version="1.0" encoding="UTF-8"?>\n<OAI-PMH xmlns="{OAI_NS}">'
                f"<responseDate>{stamp(self.now)}</responseDate>"
                f"<request{attrs}>{escape(self.base_url)}</request>{inner}</OAI-PMH>")
        return 200, text.encode("utf-8"), dict(XML)

    def _error(self, code: str, message: str, query: dict[str, str],
               ) -> tuple[int, bytes, dict[str, str]]:
        # §3.6: errors are answered with HTTP 200 and an <error> element
        return self._ok(f'<error code="{code}">{escape(message)}</error>', query)


def fernhollow_records(image_base: str, page_base: str, count: int = 10,
                       ) -> list[OaiRecord]:
    """``count`` invented records in two sets ("herbarium", "feathers"), each with a page URL
    and an image URL among its identifiers and a CC licence in dc:rights."""
    names = ("Pressed fern frond", "Banded wing feather", "Sedge seed head", "Barred tail feather",
             "Lobed oak leaf")
    rights = (("CC BY 4.0", "https://creativecommons.org/licenses/by/4.0/"),
              ("CC0 1.0 Universal", "https://creativecommons.org/publicdomain/zero/1.0/"))
    out = []
    for n in range(1, count + 1):
        out.append(OaiRecord(
            identifier=f"oai:fernhollow.example.org:rec-{n:03d}",
            datestamp=START + timedelta(days=n),
            sets=("herbarium",) if n % 2 else ("feathers",),
            title=f"{names[n % len(names)]} no. {n}",
            creator="R. Quillfeather" if n % 3 else "T. Mossbank",
            rights=rights[n % 2],
            identifiers=(f"{page_base}/records/rec-{n:03d}", f"{image_base}/rec-{n:03d}.png"),
        ))
    return out
