"""A IIIF image service's info.json is kept in the ledger and not asked again by a later run
(issue: "read info.json through the fetcher, cached in the ledger"), judged from a real
loopback server's request log; a kept answer older than its age limit is asked again."""

from __future__ import annotations

import json
import time
from pathlib import Path

from support.server import LoopbackServer, json_answer

from collector.fetching.fetcher import Fetcher, FetchSettings
from collector.fetching.kept_pages import kept_answer
from collector.storage.ledger import Ledger


def settings() -> FetchSettings:
    return FetchSettings.from_recipe({
        "contact": "me@example.org", "budgets": {"min_interval": 0.0},
        "network": {"allow_addresses": ["127.0.0.1"]}})


def test_a_kept_page_is_not_asked_again_until_it_is_old(tmp_path: Path) -> None:
    info = {"@context": "http://iiif.io/api/image/3/context.json", "id": "x", "width": 10}
    with LoopbackServer() as srv, Ledger.create(tmp_path / "ledger.sqlite") as ledger:
        srv.route("/robots.txt", (404, b""))
        srv.route("/svc/1/info.json", json_answer(info))
        url = srv.url("/svc/1/info.json")
        for _ in range(2):  # two runs, each with its own fetcher on the same ledger
            fetcher = Fetcher(settings(), ledger)
            page = fetcher.get_page(url, purpose="info", keep_for=3600.0)
            assert json.loads(page.body) == info
            fetcher.close()
        assert srv.targets().count("/svc/1/info.json") == 1
        kept = kept_answer(ledger, url, 3600.0, now=time.time())
        assert kept is not None and kept.headers["content-type"].startswith("application/json")
        assert kept_answer(ledger, url, 3600.0, now=time.time() + 7200) is None
        time.sleep(0.02)  # the kept answer is now older than the 10 ms asked for below
        fetcher = Fetcher(settings(), ledger)
        fetcher.get_page(url, purpose="info", keep_for=0.01)  # older than that: asked again
        fetcher.close()
        assert srv.targets().count("/svc/1/info.json") == 2


def test_a_page_not_asked_to_be_kept_is_always_asked(tmp_path: Path) -> None:
    with LoopbackServer() as srv, Ledger.create(tmp_path / "ledger.sqlite") as ledger:
        srv.route("/robots.txt", (404, b""))
        srv.route("/list", json_answer({"results": []}))
        fetcher = Fetcher(settings(), ledger)
        for _ in range(2):
            fetcher.get_page(srv.url("/list"))
        fetcher.close()
        assert srv.targets().count("/list") == 2
