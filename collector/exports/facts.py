"""The facts of a datasheet export: what :mod:`collector.exports.datasheet` computes and
hands to the renderers (:mod:`~collector.exports.datasheet_render`,
:mod:`~collector.exports.croissant`, :mod:`~collector.exports.plots`).

The parts read from the ledger are the typed results of :mod:`collector.storage.queries`;
the rest comes from the recipe and from writing the release.
"""

from __future__ import annotations

from typing import Any, NotRequired, TypedDict

from collector.exports.diversity import DiversityFacts
from collector.storage.datasheet_queries import (
    AcceptedFacts,
    FlaggedFacts,
    HostFacts,
    ItemFacts,
    MissingFacts,
    NotUnicodeFacts,
    RequestFacts,
    RunFacts,
    Timeframe,
)


class CollectionFacts(TypedDict):
    """The recipe's [collection] table and the contact the requests carried."""

    name: str
    description: str
    curator: str
    contact: str
    product_token: str


class DuplicateFacts(TypedDict):
    """Exact and near duplicates, and the near-duplicate policy in force."""

    exact: int
    near_kept: int
    near_dropped: int
    policy: str
    near_distance: int


class LicenceFacts(TypedDict):
    """One licence of the accepted files: its conditions and its deed."""

    spdx_id: str
    files: int
    conditions: list[str]
    deed_url: str | None


class PictureDates(TypedDict):
    """Declared dates of accepted files: earliest and latest (of those that start with a
    year), and how many accepted files carry any date."""

    earliest: str | None
    latest: str | None
    dated: int


class ResolutionBins(TypedDict):
    """Accepted files on a grid of ``step`` x ``step`` pixel cells: [width, height, files]."""

    step: int
    cells: list[list[int]]


class Timeline(TypedDict):
    """Requests and stored files per ``unit`` (second, minute, hour or day); ``by_host``:
    requests per host and unit (politeness budgets are per host)."""

    unit: str
    requests: dict[str, int]
    stored: dict[str, int]
    by_host: dict[str, dict[str, int]]


class SourceFacts(TypedDict):
    """One source: kind, items, accepted files, how it obtains items, its RAI type, and
    where its archive is (the URLs of its recipe table, secrets hidden, or its folder)."""

    name: str
    kind: str
    items: int
    accepted: int
    mechanism: str
    collection_type: str
    where: list[str]


class ReleaseFacts(TypedDict):
    """What went into the release folder (and what was left out)."""

    files: int
    bytes: int
    with_images: bool
    exclude_flagged: bool
    excluded_licence: int
    excluded_flagged: int
    missing_files: int
    linked: int
    copied: int
    by_ext: dict[str, dict[str, Any]]
    by_licence: dict[str, int]
    provenance_sha256: str


class ReservationSummary(TypedDict):
    """Reservations against text-and-data mining: the mechanisms checked, the signals seen
    (place, name, meaning, items), the items each reason excluded, the permissions."""

    checked: list[str]
    signals: list[dict[str, Any]]
    excluded: dict[str, int]  # "state/reason" -> items
    tdmrep_files: dict[str, int]  # tdmrep.json outcome -> hosts
    permissions: dict[str, str]  # source -> the permission's reference (recipe)
    permissions_used: dict[str, str]  # source -> reference, where a signal was overridden
    when_unknown: str


class ChangeEvent(TypedDict):
    """One dated line of the change log (:mod:`collector.exports.changelog`)."""

    date: str
    event: str
    detail: str


class LedgerState(TypedDict):
    """The ledger state a release was made from: the newest run and its last time."""

    run_id: int | None
    time: str | None


class SelectionFacts(TypedDict):
    """What a partial release selected and what it left out, by reason."""

    conditions: list[str]
    excluded: dict[str, int]
    ledger_state: LedgerState


class DatasheetFacts(TypedDict):
    """Everything the datasheet says, as plain data; ``release`` and ``croissant_problems``
    are added once the release is written and the Croissant document checked."""

    generated_at: str
    tool_version: str
    distribution: str  # the name it is installed by (pip install ...)
    collection: CollectionFacts
    items: ItemFacts
    accepted: AcceptedFacts
    missing: MissingFacts
    not_unicode: NotUnicodeFacts  # items whose listing held text that is not Unicode
    flags: dict[str, int]
    flagged: FlaggedFacts
    duplicates: DuplicateFacts
    licences: list[LicenceFacts]
    timeframe: Timeframe
    picture_dates: PictureDates
    requests: RequestFacts
    hosts: list[HostFacts]
    host_sources: dict[str, list[str]]
    resolution_bins: ResolutionBins
    timeline: Timeline
    sources: list[SourceFacts]
    runs: RunFacts
    notes: dict[str, int]
    policy: dict[str, Any]
    diversity: DiversityFacts  # the diversity panel (collector.exports.diversity)
    reservations: NotRequired[ReservationSummary]
    release: NotRequired[ReleaseFacts]
    changelog: NotRequired[list[ChangeEvent]]
    selection: NotRequired[SelectionFacts]
    croissant_problems: NotRequired[list[str]]
