"""The coordinator's fetcher in a cluster run: its requests (listing pages, robots.txt,
tdmrep.json) take turns with the cluster's tasks of the same host (see
:meth:`collector.run.cluster.ClusterDispatch.listing`), and tell the dispatch when they end
(the host's next task may space its first request exactly from that end)."""

from __future__ import annotations

import time
from pathlib import Path
from typing import TYPE_CHECKING, Any

from collector.errors import CollectorError
from collector.urls import host_key

if TYPE_CHECKING:
    from collector.run.cluster import ClusterDispatch


class GatedFetcher:
    """The coordinator's fetcher for listing pages, taking turns with the cluster's tasks
    (see :meth:`ClusterDispatch.listing`)."""

    def __init__(self, inner: Any, dispatch: ClusterDispatch) -> None:
        self.inner, self.dispatch = inner, dispatch

    @property
    def run_id(self) -> int | None:
        return getattr(self.inner, "run_id", None)

    @run_id.setter
    def run_id(self, value: int | None) -> None:
        self.inner.run_id = value

    def get_page(self, url: str, **kwargs: Any) -> Any:
        try:
            host = host_key(url)
        except CollectorError:
            return self.inner.get_page(url, **kwargs)  # it raises the proper error
        with self.dispatch.listing(host) as last_end:
            budgets = getattr(self.inner, "budgets", None)
            if last_end is not None and budgets is not None:
                budgets.contacted(host, time.time() - last_end)
            try:
                return self.inner.get_page(url, **kwargs)
            finally:
                self.dispatch.contacted(host)

    def download(self, url: str, dest_dir: Path, **kwargs: Any) -> Any:
        return self.inner.download(url, dest_dir, **kwargs)

    def close(self) -> None:
        self.inner.close()
