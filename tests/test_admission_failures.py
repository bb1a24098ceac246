"""One listed candidate whose admission fails (collector.run.ingest.Ingest.admit_group) gets
its own state and reason; the other candidates of its group (collector.run.listed) are
admitted as usual, and the next run tries the failed one again.

Real things only: a loopback JSON listing, a real SQLite ledger, real PNGs. The rule checked:
bad input gets a clear error and loses nothing (the project's rules; DEVELOPERS.md "Data flows
one way": each candidate is recorded before any request for its image).
"""

from __future__ import annotations

import sqlite3
from pathlib import Path
from typing import Any

import pytest
from support.collections import one_listing_recipe, serve_leaves
from support.server import LoopbackServer, json_answer

from collector.run.gather import gather
from collector.storage.collection import Collection, init_collection
from collector.storage.ledger import Ledger

# SQLite refuses a string longer than SQLITE_LIMIT_LENGTH with "string or blob too big"
# (sqlite.org/limits.html, "Maximum length of a string or BLOB"); the limit of a connection can
# be lowered (sqlite3_limit, Python's Connection.setlimit). Here it makes one listed title a
# value the ledger cannot take, as a real archive's runaway field would at the full limit.
ROW_LIMIT = 100_000


def _items(col: Collection) -> dict[str, dict[str, Any]]:
    with col.ledger(readonly=True) as ledger:
        return {r["source_key"]: r for r in ledger.query(
            "SELECT source_key, state, reason, detail, title FROM items")}


def _images_asked(server: LoopbackServer) -> list[str]:
    return [h.path for h in server.hits if h.path.startswith("/img/")]


@pytest.fixture
def limited_ledger(monkeypatch: pytest.MonkeyPatch) -> None:
    """Every ledger the run opens refuses strings over ROW_LIMIT bytes."""
    real = Ledger._connect.__func__  # type: ignore[attr-defined]

    def connect(cls: type[Ledger], path: Path, **kwargs: Any) -> Ledger:
        ledger = real(cls, path, **kwargs)
        ledger.db.conn.setlimit(sqlite3.SQLITE_LIMIT_LENGTH, ROW_LIMIT)
        return ledger
    monkeypatch.setattr(Ledger, "_connect", classmethod(connect))


def test_a_row_the_ledger_refuses_fails_only_its_item(tmp_path: Path, limited_ledger: None,
                                                      monkeypatch: pytest.MonkeyPatch) -> None:
    """Twelve listed leaves in one group, the fourth with a title the ledger cannot store:
    that item is failed (ledger_error, SQLite's words in its detail) and its image never
    asked for; the eleven others are stored, each image asked once; a second run asks
    nothing again, and once the ledger takes the title the item is stored."""
    with LoopbackServer("127.0.0.1") as server:
        items = serve_leaves(server, 12)
        items[3]["title"] = "L" * (2 * ROW_LIMIT)
        server.route("/items", json_answer({"results": items}))
        col = init_collection(tmp_path / "c", contact="x@example.org")
        col.recipe_path.write_text(one_listing_recipe(server.url("/items")))

        first = gather(col)
        assert first.outcome == "finished", first.outcome
        found = _items(col)
        assert len(found) == 12
        bad = found["3"]
        assert (bad["state"], bad["reason"]) == ("failed", "ledger_error")
        assert "string or blob too big" in bad["detail"]
        assert {k: r["state"] for k, r in found.items() if k != "3"} == {
            str(n): "stored" for n in range(12) if n != 3}
        assert sorted(_images_asked(server)) == sorted(
            f"/img/{n}.png" for n in range(12) if n != 3)

        server.hits.clear()
        again = gather(col)  # the title is still too long: the item fails again, alone
        assert again.outcome == "finished", again.outcome
        assert _images_asked(server) == []
        assert (_items(col)["3"]["state"], _items(col)["3"]["reason"]) == ("failed",
                                                                         "ledger_error")

        monkeypatch.undo()  # a ledger that takes the title: the item is tried again
        last = gather(col)
        assert last.outcome == "finished", last.outcome
        assert _images_asked(server) == ["/img/3.png"]
    done = _items(col)
    assert done["3"]["state"] == "stored" and done["3"]["title"] == "L" * (2 * ROW_LIMIT)
    assert {r["state"] for r in done.values()} == {"stored"}

