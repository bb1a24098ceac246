"""Connecting a run to a Dask cluster (the ``cluster`` extra): gather's cluster options
checked before anything starts, the client on an existing scheduler or on a local cluster
(loopback only), and the checks every worker must pass (the same versions, Dask's profiler
off: :mod:`collector.run.cluster_worker`). Dask is imported only inside these functions, so
without the extra the single-machine path never needs it and the options say how to install
it (:data:`INSTALL_HINT`)."""

from __future__ import annotations

import contextlib
from collections.abc import Iterator
from pathlib import Path
from typing import Any

from collector import __version__
from collector.errors import ClusterError
from collector.run.cluster_task import worker_facts

INSTALL_HINT = ("install the cluster extra first: pip install 'polite-image-collector[cluster]'"
                " (it adds Dask distributed; every machine of the cluster needs the same "
                "versions)")
LOCAL_THREADS = 32  # threads per local worker process: tasks mostly wait for their host
# A local cluster listens on loopback only, in-process ones too (TCP on 127.0.0.1, not Dask's
# in-process transport, whose HTTP servers would listen on every address), and its
# scheduler's HTTP server on a free port (Dask's default: 8787).
LOOPBACK_HTTP = "127.0.0.1:0"
WORKERS_TIMEOUT = 60.0  # s to wait for the first worker of an existing scheduler


def require_distributed() -> None:
    """Raise ClusterError (exit 2) with the install command when Dask is not installed."""
    try:
        import distributed  # noqa: F401
    except ImportError:
        raise ClusterError(f"--cluster and --local-workers need Dask distributed: "
                           f"{INSTALL_HINT}") from None


def cluster_options(address: str | None, local_workers: int | None,
                    tls: tuple[Any, ...]) -> dict[str, Any] | None:
    """The keyword arguments of :func:`connect` for gather's options, checked before anything
    starts (ClusterError, exit 2); None: the run stays on this machine."""
    given_tls = [str(p) for p in tls if p is not None]
    if address is None and local_workers is None:
        if given_tls:
            raise ClusterError("--tls-ca-file, --tls-cert and --tls-key go with --cluster "
                               "ADDRESS")
        return None
    if address is not None and local_workers is not None:
        raise ClusterError("give --cluster ADDRESS or --local-workers N, not both")
    require_distributed()
    if local_workers is not None and local_workers < 1:
        raise ClusterError(f"--local-workers {local_workers}: give at least 1 worker")
    if local_workers is not None:
        if given_tls:
            raise ClusterError("--tls-* options go with --cluster ADDRESS; a local cluster "
                               "does not leave this machine")
        return {"local_workers": int(local_workers)}
    if given_tls and len(given_tls) != 3:
        raise ClusterError("TLS needs all three: --tls-ca-file, --tls-cert and --tls-key")
    for path in given_tls:
        if not Path(path).is_file():
            raise ClusterError(f"{path}: no such file (a --tls-* option)")
    return {"address": address, "tls": tuple(given_tls) if given_tls else None}


@contextlib.contextmanager
def connect(address: str | None = None, *, local_workers: int = 0, processes: bool = True,
            threads: int = LOCAL_THREADS, tls: tuple[str, str, str] | None = None,
            ) -> Iterator[Any]:
    """A Dask client: on the scheduler at ``address``, or on a local cluster of
    ``local_workers`` workers (processes unless ``processes`` is False). ``tls`` is
    (CA file, certificate, key) for a scheduler that requires TLS. Every worker runs
    without Dask's profiler (collector.run.cluster_worker says why)."""
    require_distributed()
    import dask
    from distributed import Client, LocalCluster
    from distributed.security import Security

    if local_workers:
        with dask.config.set({"distributed.worker.profile.enabled": False}), \
                LocalCluster(n_workers=local_workers, threads_per_worker=threads,
                             processes=processes, dashboard_address=LOOPBACK_HTTP,
                             protocol="tcp://", host="127.0.0.1") as cluster, \
                Client(cluster) as client:
            check_workers(client, address=None)
            yield client
        return
    security = (Security(tls_ca_file=tls[0], tls_client_cert=tls[1], tls_client_key=tls[2],
                         require_encryption=True) if tls else None)
    try:
        client = Client(address, timeout=10, security=security)
    except (OSError, TimeoutError, ValueError) as exc:
        raise ClusterError(f"could not reach the Dask scheduler at {address}: {exc}; start "
                           f"it with 'dask scheduler' (see README, 'When one machine is not "
                           f"enough')") from None
    with client:
        check_workers(client, address=address)
        yield client


def check_workers(client: Any, *, address: str | None) -> None:
    """The profiler goes off on every worker, now and later (cluster_worker.NoProfiler);
    every worker must run the same collector and Dask versions as the coordinator."""
    import distributed

    from collector.run.cluster_worker import NoProfiler, profiler_off

    client.register_plugin(NoProfiler())
    try:
        client.wait_for_workers(1, timeout=WORKERS_TIMEOUT)
    except TimeoutError:
        raise ClusterError(f"no Dask worker joined {address} within {WORKERS_TIMEOUT:g} s; "
                           f"start one with 'dask worker {address} --nthreads 16'") from None
    mine = {"collector": __version__, "distributed": str(distributed.__version__)}
    for worker, facts in client.run(worker_facts).items():
        if facts != mine:
            raise ClusterError(f"worker {worker} runs {facts}, this machine {mine}: install the "
                               "same versions on every machine of the cluster")
    for worker, off in client.run(profiler_off).items():
        if not off:  # pragma: no cover - the plugin above turns it off
            raise ClusterError(f"worker {worker} still runs Dask's profiler")
