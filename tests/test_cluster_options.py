"""gather's cluster options are checked before anything starts (collector.run.cluster):
a clear error with exit 2 for each wrong combination, and the install command when Dask is
missing. Common practice, no source: usage errors exit 2."""

from __future__ import annotations

import builtins
from typing import Any

import pytest

from collector.errors import ClusterError
from collector.run.cluster import cluster_options


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
