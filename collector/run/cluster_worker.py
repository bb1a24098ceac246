"""What every Dask worker of a cluster run needs before its first task (imported only when
Dask distributed is installed: :func:`collector.run.cluster.connect` registers it).

The worker's statistical profiler is turned off. It calls ``sys._current_frames()`` every
10 ms from the worker's event loop, and on CPython 3.11 that call can deadlock the whole
process against the garbage collector (a lock-ordering deadlock of the runtime's thread-list
lock and the GIL: CPython issues gh-106883 and gh-116969, Dask distributed issue #8616; Dask
already skips its event-loop profiler on 3.11 for this reason, distributed/core.py). Measured
here on 3.11.7: one in-process cluster gather of the demo archive in four froze for good,
every thread waiting for the GIL, SIGTERM unanswered. A plugin reaches every worker, those
that join or are restarted later included; ``dask worker`` started by hand gets the same
through ``DASK_DISTRIBUTED__WORKER__PROFILE__ENABLED=False`` (README).
"""

from __future__ import annotations

from typing import Any

from distributed import WorkerPlugin

PROFILER_CALLBACKS = ("profile", "profile-cycle")  # distributed.worker.Worker.__init__


class NoProfiler(WorkerPlugin):
    """Stops and removes the worker's profiler callbacks (see the module doc)."""

    name = "collector-no-profiler"

    def setup(self, worker: Any) -> None:
        for name in PROFILER_CALLBACKS:
            callback = worker.periodic_callbacks.pop(name, None)
            if callback is not None:
                callback.stop()


def profiler_off(dask_worker: Any) -> bool:
    """True when the worker runs no profiler callback (``client.run`` checks every worker)."""
    return not any(name in dask_worker.periodic_callbacks for name in PROFILER_CALLBACKS)
