"""``collector status`` per host: a request refused before it had a host is no host row.

The fetcher records every refusal in ``fetches`` (attempt 0), also one refused before a host
could be read from its URL (a redirect to ``file:///...``: not http or https and no host,
RFC 3986 §3.2.2 / RFC 8089 §2, from memory), whose ``host`` is NULL. Such rows were shown as a
host named ``?``; they are counted on a line of their own.
"""

from __future__ import annotations

from collections.abc import Iterator

import pytest
from support.collections import gather_listing, serve_leaves
from support.server import LoopbackServer
from typer.testing import CliRunner

from collector.cli import app
from collector.exports.summary import (
    estimate,
    format_estimate,
    format_summary,
    summarise,
    summary_as_dict,
)
from collector.storage.collection import Collection
from collector.storage.datasheet_queries import requests_per_host


@pytest.fixture(scope="module")
def refused(tmp_path_factory: pytest.TempPathFactory) -> Iterator[tuple[Collection, str, list]]:
    """Three leaves; the second's image answers 302 to ``file:///leaf.png``, which the fetcher
    refuses before any request (the collection, the server's host key, its hits)."""
    with LoopbackServer("127.0.0.1") as server:
        leaves = serve_leaves(server, 3)
        server.route("/img/1.png", (302, b"", {"Location": "file:///leaf.png"}))
        col, result = gather_listing(server, leaves, tmp_path_factory.mktemp("status") / "col")
        assert result.outcome == "finished"
        yield col, f"127.0.0.1:{server.port}", [h.path for h in server.hits]


def test_the_ledger_holds_one_refusal_without_a_host(refused) -> None:
    """The fixture does what the test below needs: one fetches row without a host, never sent
    (attempt 0), and the item failed; nothing left loopback (file:/// is never opened)."""
    col, host, hits = refused
    with col.ledger(readonly=True) as ledger:
        rows = ledger.query("SELECT attempt, error, url FROM fetches WHERE host IS NULL")
        hosts = {r["host"] for r in ledger.query("SELECT DISTINCT host FROM fetches")}
        failed = ledger.query("SELECT state FROM items WHERE source_key = '1'")[0]["state"]
    assert [(r["attempt"], r["url"]) for r in rows] == [(0, "file:///leaf.png")]
    assert hosts == {host, None} and failed == "failed"
    assert "/img/1.png" in hits


def test_status_counts_refusals_before_any_host_apart_from_the_host_rows(refused) -> None:
    """summarise / format_summary (what ``collector status`` prints) and summary_as_dict
    (``--json``): the server's host is the only host row; no host called ``?`` or None; the
    refusal is on its own line and in its own key, its count equal to the ledger's rows."""
    col, host, _ = refused
    with col.ledger(readonly=True) as ledger:
        summary = summarise(ledger)
        (n,) = ledger.rows("SELECT count(*) FROM fetches WHERE host IS NULL")[0]
    assert n == 1
    assert [h.host for h in summary.hosts] == [host]
    lines = format_summary(summary)
    rows = lines[lines.index(next(ln for ln in lines if ln.startswith("politeness per host"))) + 1:]
    host_rows = [ln for ln in rows if ln.startswith("  ")]
    assert len(host_rows) == 1 and host_rows[0].split()[0] == host
    assert not any(ln.split()[:1] == ["?"] for ln in lines)
    (line,) = [ln for ln in lines if ln.startswith("refused before any host:")]
    assert line.startswith(f"refused before any host: {n} request whose URL ")
    assert "fetches table" in line
    data = summary_as_dict(summary)
    assert [h["host"] for h in data["hosts"]] == [host]
    assert data["refused_before_host"] == n


def test_the_status_command_prints_the_same_lines(refused) -> None:
    """``collector status`` prints format_summary's lines: the refusal line, no ``?`` row."""
    col, host, _ = refused
    shown = CliRunner().invoke(app, ["status", str(col.root)])
    assert shown.exit_code == 0, shown.output
    assert "refused before any host: 1 request whose URL" in shown.output
    assert f"  {host} " in shown.output
    assert not [ln for ln in shown.output.splitlines() if ln.strip().startswith("? ")]


def test_the_datasheet_timeline_has_no_host_for_a_refusal_before_any_host(refused) -> None:
    """The datasheet's requests-per-host timeline counts requests sent to a host: the refusal
    (never sent) is in no host's line, and the server's line holds every request it logged."""
    col, host, hits = refused
    with col.ledger(readonly=True) as ledger:
        timeline = requests_per_host(ledger, 16)
    assert list(timeline) == [host]
    assert sum(timeline[host].values()) == len(hits)


@pytest.fixture(scope="module")
def unreadable_listed(tmp_path_factory: pytest.TempPathFactory) -> Collection:
    """Two leaves listed with http URLs, the second answering 404, and one listed as
    ``file:///leaf.png`` (refused by the run without a request); both failed, so a next run
    would try them again."""
    with LoopbackServer("127.0.0.1") as server:
        leaves = serve_leaves(server, 2)
        server.route("/img/1.png", (404, b""))
        leaves.append({**leaves[0], "id": "file", "image": "file:///leaf.png"})
        col, result = gather_listing(server, leaves,
                                     tmp_path_factory.mktemp("estimate") / "col")
        assert result.outcome == "finished"
        return col


def test_the_dry_run_counts_listed_urls_without_a_host_apart(unreadable_listed) -> None:
    """``gather --dry-run``'s estimate: the URL no host can be read from is no host named
    ``?`` with a time of its own, but a line of its own; the hosts' time is unchanged."""
    col = unreadable_listed
    with col.ledger(readonly=True) as ledger:
        (state, reason), = ledger.rows("SELECT state, reason FROM items WHERE source_key = "
                                       "'file'")
        est = estimate(col.recipe(), ledger)
    assert (state, reason) == ("failed", "unsafe_url")
    assert list(est.per_host.values()) == [1] and "?" not in est.per_host
    assert est.unreadable == 1
    lines = format_estimate(col.recipe(), est)
    (line,) = [ln for ln in lines if ln.startswith("no host:")]
    assert line.startswith("no host: 1 listed image URL from which no host can be read")
    assert not any(ln.split()[:1] == ["?"] for ln in lines)
