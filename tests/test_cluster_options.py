"""gather's cluster options are checked before anything starts (collector.run.cluster):
a clear error with exit 2 for each wrong combination, and the install command when Dask is
missing. Common practice, no source: usage errors exit 2."""

from __future__ import annotations

import builtins
import hashlib
import os
import subprocess
import sys
from pathlib import Path
from typing import Any

import pytest
from support.cluster import run_in_process
from support.collections import grid_picture, one_listing_recipe, serve_leaves
from support.server import LoopbackServer, json_answer

from collector.errors import ClusterError
from collector.run.cluster_setup import cluster_options
from collector.storage.collection import Collection, init_collection


def test_no_cluster_option_keeps_the_run_on_this_machine() -> None:
    """Without --cluster or --local-workers there is no engine at all."""
    assert cluster_options(None, None, (None, None, None)) is None


def test_both_engines_at_once_are_refused() -> None:
    """--cluster and --local-workers exclude each other."""
    with pytest.raises(ClusterError, match="not both") as info:
        cluster_options("tcp://127.0.0.1:8786", 2, (None, None, None))
    assert info.value.exit_code == 2


def test_tls_needs_all_three_files_and_a_scheduler(tmp_path) -> None:
    """--tls-* go with --cluster, all three together."""
    ca = tmp_path / "ca.pem"
    ca.write_text("x")
    with pytest.raises(ClusterError, match="go with --cluster"):
        cluster_options(None, None, (ca, None, None))
    with pytest.raises(ClusterError, match="all three"):
        cluster_options("tls://127.0.0.1:8786", None, (ca, None, None))


def test_without_the_extra_the_error_says_how_to_install_it(monkeypatch) -> None:
    """--local-workers without Dask installed: exit 2 and the extra's install command."""
    real_import = builtins.__import__

    def no_dask(name: str, *args: Any, **kwargs: Any) -> Any:
        if name == "distributed" or name.startswith("distributed."):
            raise ImportError(name)
        return real_import(name, *args, **kwargs)

    monkeypatch.setattr(builtins, "__import__", no_dask)
    with pytest.raises(ClusterError) as info:
        cluster_options(None, 2, (None, None, None))
    assert info.value.exit_code == 2
    assert "pip install 'polite-image-collector[cluster]'" in str(info.value)


HIDE_DASK = ("import sys; sys.modules['distributed'] = None; sys.modules['dask'] = None; "
             "from collector.cli import app; app(sys.argv[1:], prog_name='collector')")


def _collector_without_dask(*args: str) -> subprocess.CompletedProcess[str]:
    """The command line in a fresh process where Dask cannot be imported (a None entry in
    sys.modules makes every import of it fail, as when the extra is not installed)."""
    return subprocess.run([sys.executable, "-c", HIDE_DASK, *args], capture_output=True,
                          text=True, timeout=120,
                          env={**os.environ, "PYTHONPATH": str(Path(__file__).parents[1])})


def test_without_dask_a_gather_runs_on_this_machine_as_before(tmp_path) -> None:
    """Dask not importable: a plain gather stores both images of a loopback archive (exit 0);
    --local-workers stops at once with exit 2 and the install command, requesting nothing."""
    with LoopbackServer("127.0.0.1") as server:
        server.route("/items", json_answer({"results": serve_leaves(server, 2)}))
        folder = init_collection(tmp_path / "c", contact="x@example.org").root
        recipe = one_listing_recipe(server.url("/items"), min_interval=0.1)
        (folder / "recipe.toml").write_text(recipe)
        refused = _collector_without_dask("gather", str(folder), "--local-workers", "2")
        asked_before = len(server.hits)
        plain = _collector_without_dask("gather", str(folder), "--quiet")
    assert refused.returncode == 2, refused.stderr
    assert "pip install 'polite-image-collector[cluster]'" in refused.stderr + refused.stdout
    assert asked_before == 0  # the refusal came before any request
    assert plain.returncode == 0, plain.stderr
    with Collection(folder).ledger(readonly=True) as ledger:
        rows = ledger.query("SELECT state, count(*) AS n FROM items GROUP BY state")
    assert {r["state"]: r["n"] for r in rows} == {"stored": 2}




def test_files_sent_back_as_bytes_are_stored_as_served(tmp_path: Path) -> None:
    """Without the shared folder (force_bytes) a worker returns each image's bytes: the
    coordinator writes them into the store, and the stored files are the served bytes
    (their SHA-256, FIPS 180-4, as Python's hashlib computes it)."""
    with LoopbackServer("127.0.0.1") as server:
        items = serve_leaves(server, 3)
        server.route("/items", json_answer({"results": items}))
        col = init_collection(tmp_path / "c", contact="x@example.org")
        col.recipe_path.write_text(one_listing_recipe(server.url("/items")))
        batches: list[Any] = []
        result = run_in_process(col, force_bytes=True, on_batch=batches.append)
    assert result.outcome == "finished"
    assert batches and not any(b.shared for b in batches)
    served = {hashlib.sha256(grid_picture(n)).hexdigest() for n in range(3)}
    with col.ledger(readonly=True) as ledger:
        stored = {r["file_sha256"] for r in ledger.query("SELECT file_sha256 FROM items")}
    assert stored == served
    assert all(hashlib.sha256(p.read_bytes()).hexdigest() in served
               for p in col.root.joinpath("files").rglob("*.png"))
