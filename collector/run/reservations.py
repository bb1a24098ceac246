"""Honouring machine-readable reservations against text-and-data mining and AI training: the
run's policy over the signals of :mod:`collector.checks.reservations`.

Where each signal is read and what it does (every signal seen becomes a
``reservation_signals`` row: where, the field, the raw value, what it means, our decision):

1. before any image byte is requested (:meth:`ReservationGate.admission` in the listing
   thread, :meth:`ReservationGate.before_image` in the host's worker): the tdmrep.json rule for
   the listing page, the detail page and the image URL, and the ``tdm-reservation`` /
   ``X-Robots-Tag`` header fields and ``<meta>`` elements of the listing and detail pages the
   source fetched (:class:`WatchingFetcher`). A reservation -> the item is ``skipped``;
2. in the image response (:meth:`ReservationGate.after_download`): its header fields. A
   reservation -> the temp file is removed and the item ``rejected``;
3. inside the file (:meth:`ReservationGate.in_file`): IPTC "Data Mining" in XMP. Likewise
   ``rejected``. C2PA content credentials are not read (c2pa-python 0.38.1 is not a
   dependency: a 15-16 MB wheel with a 55 MB native library, Linux glibc 2.28+ and macOS
   only); every item's checks say so.

TDMRep precedence (final report §4) holds per resource: the file's rule, then the header, then
the meta element, each later value superseding. One deliberate reading: an image the file
reserves is not requested at all, so a header that might lift the reservation is never seen.

A source with a recorded permission (``[reservations] permission``) is gathered anyway; its
signals are still recorded, with the permission's reference as the decision: never silent.
Honouring these signals is a good-faith practice, not legal advice; local law decides what a
reservation means.
"""

from __future__ import annotations

import threading
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass
from typing import Any

from collector.checks.reservations import (
    C2PA,
    FILE_CHECKS,
    HEADER,
    NOAI_REASON,
    NOT_RESERVED,
    PAGE_CHECKS,
    RESERVED,
    TDMREP_FILE,
    TDMREP_REASON,
    UNKNOWN,
    UNKNOWN_REASON,
    UNSET,
    XMP,
    XMP_REASON,
    Signal,
    file_signal,
    header_signals,
    meta_signals,
    tdm_state,
    xmp_signals,
)
from collector.config.recipe import Recipe
from collector.fetching.tdmrep import NO_FILE, RULES, TdmFile, TdmRepFiles
from collector.fetching.tdmrep import UNKNOWN as FILE_UNKNOWN

NOAI_NAMES = ("X-Robots-Tag", "robots")


@dataclass(frozen=True)
class Refusal:
    """What happens to an item a signal stops: its state, reason and detail."""

    state: str  # skipped | rejected | deferred
    reason: str
    detail: str


def _describe(signal: Signal) -> str:
    where = "tdmrep.json" if signal.place == TDMREP_FILE else signal.place
    policy = f"; policy {signal.policy}" if signal.policy else ""
    return f"{signal.name} {signal.shown_value!r} in {where} of {signal.url}{policy}"


def verdict(resources: Sequence[Sequence[Signal]]) -> tuple[str, Signal | None]:
    """(RESERVED | UNKNOWN | NOT_RESERVED, the deciding signal) over an item's resources, each
    given as its signals in TDMRep processing order. A noai/noimageai directive (common
    practice) and a prohibiting IPTC Data Mining value reserve on their own; a reservation
    anywhere wins over an unknown anywhere."""
    unknown: Signal | None = None
    for signals in resources:
        alone = [s for s in signals if s.meaning == RESERVED
                 and (s.name in NOAI_NAMES or s.place in (XMP, C2PA))]
        if alone:
            return RESERVED, alone[0]
        state = tdm_state(signals)
        if state is not None and state.meaning == RESERVED:
            return RESERVED, state
        if state is not None and state.meaning == UNKNOWN and unknown is None:
            unknown = state
    return (UNKNOWN, unknown) if unknown is not None else (NOT_RESERVED, None)


class WatchingFetcher:
    """The page fetcher a source gets: the run's fetcher, plus the reservation signals of
    every page it fetches (tdmrep.json of the page's origin asked for first, TDMRep §4)."""

    def __init__(self, fetcher: Any, gate: ReservationGate, source_id: int) -> None:
        self._fetcher, self._gate, self._source_id = fetcher, gate, source_id

    def get_page(self, url: str, *, purpose: str = "listing", **kwargs: Any) -> Any:
        """GET a page through the run's fetcher and note its signals."""
        self._gate.file_for(url)
        page = self._fetcher.get_page(url, purpose=purpose, **kwargs)
        self._gate.note_page(self._source_id, url, page, purpose)
        return page

    def __getattr__(self, name: str) -> Any:
        return getattr(self._fetcher, name)


class ReservationGate:
    """The run's reservation policy; thread-safe (listing threads and host workers)."""

    def __init__(self, recipe: Recipe, ledger: Any, fetcher: Any | None, record: Any,
                 source_ids: Sequence[int]) -> None:
        self.ledger, self.record = ledger, record
        self.files = TdmRepFiles(fetcher, ledger) if fetcher is not None else None
        settings = recipe.reservations
        self.tokens = (recipe.product_token, *settings.robots_tokens)
        self.defer_unknown = settings.when_unknown == "defer"
        names = {sid: src["name"] for src, sid in zip(recipe.sources, source_ids, strict=True)}
        self.permission = {sid: settings.permission[name] for sid, name in names.items()
                           if name in settings.permission}
        robots = (f"robots.txt groups of {', '.join(settings.robots_tokens)}",
                  ) if settings.robots_tokens else ()
        self.page_checks = "; ".join((*PAGE_CHECKS, *robots, *FILE_CHECKS))
        self._lock = threading.Lock()
        self._listing: dict[int, tuple[str, list[Signal]]] = {}
        self._details: dict[str, list[Signal]] = {}
        self._item_source: dict[int, int] = {}
        self._findings: dict[int, str] = {}

    # -- what the source's pages say ---------------------------------------------------------
    def watching(self, fetcher: Any, source_id: int) -> Any:
        """The fetcher to hand to a source (None stays None)."""
        return None if fetcher is None else WatchingFetcher(fetcher, self, source_id)

    def file_for(self, url: str) -> TdmFile | None:
        """The tdmrep.json answer of ``url``'s origin (None without a fetcher or off the web)."""
        if self.files is None or not url.lower().startswith(("http://", "https://")):
            return None
        return self.files.for_url(url)

    def note_page(self, source_id: int, url: str, page: Any, purpose: str) -> None:
        """Keep the header and meta signals of a fetched page for the items it lists."""
        signals = header_signals(page.url, page.headers, self.tokens)
        ctype = (page.headers.get("Content-Type") or "").lower()
        if ctype.startswith(("text/html", "application/xhtml+xml")):
            signals += meta_signals(page.url, page.text, self.tokens)
        with self._lock:
            if purpose == "listing":
                self._listing[source_id] = (page.url, signals)
            else:
                self._details[url] = signals
                self._details[page.url] = signals

    def _file_signals(self, url: str) -> list[Signal]:
        found = self.file_for(url)
        if found is None or found.state == NO_FILE:
            return []
        if found.state == RULES and found.rules is not None:
            return [file_signal(url, found.url, found.rules)]
        meaning = UNKNOWN if found.state == FILE_UNKNOWN else UNSET
        return [Signal(TDMREP_FILE, found.url, "file", found.detail, meaning)]

    # -- decisions -----------------------------------------------------------------------------
    def register(self, item_id: int, source_id: int) -> None:
        """Remember an item's source (its permission, its signal rows), local items too."""
        self._item_source[item_id] = source_id

    def admission(self, source_id: int, item_id: int, page_url: str | None) -> Refusal | None:
        """Before the image request: the listing and detail pages' signals (skipped or
        deferred), or None to go on."""
        self.register(item_id, source_id)
        resources: list[list[Signal]] = []
        with self._lock:
            listing = self._listing.get(source_id)
            detail = self._details.pop(page_url, None) if page_url else None
        if listing is not None:
            resources.append(self._file_signals(listing[0]) + listing[1])
        if detail is not None and page_url is not None and (
                listing is None or page_url != listing[0]):
            resources.append(self._file_signals(page_url) + detail)
        return self._decide(item_id, resources, "skipped")

    def before_image(self, item_id: int, image_url: str) -> Refusal | None:
        """The tdmrep.json rule for the image URL, before it is requested."""
        return self._decide(item_id, [self._file_signals(image_url)], "skipped")

    def after_download(self, item_id: int, url: str,
                       headers: Mapping[str, str]) -> Refusal | None:
        """The image response's header fields, over the file's rule for it (TDMRep §4)."""
        signals = self._file_signals(url) + header_signals(url, headers, self.tokens)
        fresh = [s for s in signals if s.place == HEADER]
        return self._decide(item_id, [signals], "rejected", record=fresh)

    def in_file(self, item_id: int, url: str | None,
                rights: Mapping[str, object]) -> Refusal | None:
        """IPTC Data Mining in the file's XMP."""
        return self._decide(item_id, [xmp_signals(url or "(local file)", rights)], "rejected")

    def _decide(self, item_id: int, resources: list[list[Signal]], state: str, *,
                record: Iterable[Signal] | None = None) -> Refusal | None:
        found, deciding = verdict(resources)
        permission = self.permission.get(self._item_source.get(item_id, -1))
        refusal: Refusal | None = None
        if found == RESERVED and deciding is not None:
            reason = (NOAI_REASON if deciding.name in NOAI_NAMES else
                      XMP_REASON if deciding.place == XMP else TDMREP_REASON)
            refusal = Refusal(state, reason, f"reserved against text-and-data mining: "
                              f"{_describe(deciding)}")
        elif found == UNKNOWN and deciding is not None and self.defer_unknown:
            refusal = Refusal("deferred", UNKNOWN_REASON, f"{_describe(deciding)}; asked "
                              "again in the next run ([reservations] when_unknown)")
        overridden = permission if refusal is not None else None
        if overridden is not None:
            refusal = None  # the source's recorded permission lets the item through
        self._remember(item_id, found, deciding, refusal, overridden)
        signals = list(record) if record is not None else [s for r in resources for s in r]
        for signal in signals:
            if signal.place == TDMREP_FILE and signal.name == "location" \
                    and signal.meaning == UNSET:
                continue  # no rule matched: nothing was said about this URL
            self._record(item_id, signal, deciding, refusal, overridden)
        return refusal

    def _record(self, item_id: int, signal: Signal, deciding: Signal | None,
                refusal: Refusal | None, overridden: str | None) -> None:
        if signal is deciding and overridden is not None:
            decision = f"gathered under permission: {overridden}"
        elif signal is deciding and refusal is not None:
            decision = f"item {refusal.state} ({refusal.reason})"
        elif signal is deciding and signal.meaning == UNKNOWN:
            decision = "unknown: gathered, [reservations] when_unknown = \"gather\""
        elif signal.meaning == RESERVED:
            decision = "reserved, superseded" if deciding is None or \
                deciding.meaning != RESERVED else "reserved"
        elif signal.place == TDMREP_FILE and signal.name == "file":
            decision = "treated as no file" if signal.meaning == UNSET else "unknown"
        else:
            decision = "no reservation"
        scrub = self.record.scrubbed
        self.ledger.record_signal(
            run_id=self.record.run_id, item_id=item_id,
            source_id=self._item_source.get(item_id), place=signal.place,
            url=scrub(signal.url), name=signal.name, value=scrub(signal.shown_value),
            meaning=signal.meaning, decision=decision)

    def _remember(self, item_id: int, found: str, deciding: Signal | None,
                  refusal: Refusal | None, permission: str | None) -> None:
        """Keep the first finding about an item that is not "nothing found" for checks()."""
        if deciding is None or found == NOT_RESERVED:
            return
        if refusal is not None:
            text = f"{refusal.reason} ({refusal.state})"
        elif permission is not None:
            text = (f"{'reserved' if found == RESERVED else 'unknown'} "
                    f"({_describe(deciding)}), gathered under permission: {permission}")
        else:
            text = (f"unknown ({_describe(deciding)}), gathered as [reservations] "
                    "when_unknown = \"gather\" says")
        with self._lock:
            self._findings.setdefault(item_id, text)

    def checks(self, item_id: int, *, local: bool = False) -> str:
        """What trace says about an item's reservations: what was found at fetch time (or
        that nothing was) and the mechanisms checked."""
        with self._lock:
            finding = self._findings.get(item_id)
        checked = "; ".join(FILE_CHECKS) if local else self.page_checks
        return f"{finding or 'no reservation found at fetch time'}; signals checked: {checked}"

