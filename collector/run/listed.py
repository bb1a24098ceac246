"""A listing thread's candidates admitted in groups (:meth:`Ingest.admit_group`): one ledger
transaction registers a group, committed before any of its candidates is decided, so before any
request for their images. A group is handed over before the source asks for another page (the
page fetcher the source is given is :class:`ListedGroup` itself), so no candidate waits for a
request; used by :meth:`collector.run.scheduling.Gatherer._list_source`.
"""

from __future__ import annotations

import time
from typing import TYPE_CHECKING, Any

if TYPE_CHECKING:
    from collector.run.scheduling import Gatherer

# Listed candidates admitted together (Ingest.admit_group): at most this many, and none held
# longer than LISTED_WAIT s (checked as the next one comes).
LISTED_GROUP = 64
LISTED_WAIT = 0.05


class AdmissionFailed(Exception):
    """Admission failed inside a source's page request: carried past the source's own error
    handling (which may catch a FetchError) and raised again as it was by the listing (the
    error is its only argument)."""


class ListedGroup:
    """A source's listed candidates waiting for admission, handed to
    :meth:`Ingest.admit_group` together: at most LISTED_GROUP, and always before the source
    asks for another page (its :meth:`get_page` is the page fetcher the source is given), so
    no candidate waits for a request and the reservation signals a page leaves are those of
    its own items; a repeated source key or a local file closes the group first."""

    def __init__(self, gatherer: Gatherer, source_id: int, pages: Any) -> None:
        self._g, self._source_id, self._pages = gatherer, source_id, pages
        self._group: list[Any] = []
        self._keys: set[str] = set()
        self._since = 0.0
        self._failed: Exception | None = None

    @property
    def fetcher(self) -> Any:
        """What the source lists through (None stays None: it requests nothing)."""
        return None if self._pages is None else self

    def get_page(self, url: str, **kwargs: Any) -> Any:
        try:
            self.flush()
        except Exception as exc:  # the run's problem, not the page's: past the source
            self._failed = exc  # raised again by the next flush should a source swallow it
            raise AdmissionFailed(exc) from exc
        return self._pages.get_page(url, **kwargs)

    def __getattr__(self, name: str) -> Any:
        return getattr(self._pages, name)

    def add(self, c: Any) -> None:
        if c.source_key in self._keys:
            self.flush()
        if not self._group:
            self._since = time.monotonic()
        self._group.append(c)
        self._keys.add(c.source_key)
        if (len(self._group) >= LISTED_GROUP or c.content is not None
                or c.local_path is not None or time.monotonic() - self._since > LISTED_WAIT):
            self.flush()

    def flush(self) -> None:
        """Admit the candidates held; each image to fetch goes to its host."""
        if self._failed is not None:
            raise self._failed
        group, self._group, self._keys = self._group, [], set()
        if group:
            for job in self._g.ingest.admit_group(self._source_id, group):
                if job is not None:
                    self._g._enqueue(job)
