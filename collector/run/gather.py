"""The overnight run behind ``collector gather``: :func:`prepared_run` (lock, recipe, ledger,
crash recovery), :func:`run_prepared` (one run inside it) and :func:`gather` (both, with the
real fetcher).

The run itself is split by concern: :mod:`collector.run.scheduling` (listing threads, host
queues and workers, stop rules, the run loop), :mod:`collector.run.ingest` (admission,
inspect, de-duplicate, store, record) and :mod:`collector.run.dedup` (which item is the
original, pure decisions).

Rerunning is resuming: items in a final state are not requested again; ``pending``, ``failed``
and ``deferred`` items are tried again, and licence/robots decisions are re-evaluated.
"""

from __future__ import annotations

import contextlib
from collections.abc import Callable, Iterator
from typing import Any

from collector.config.recipe import Recipe
from collector.config.recipe_env import env_problems
from collector.errors import RecipeError, RecipeProblem
from collector.run.record import Progress
from collector.run.scheduling import (
    Gatherer,
    HostDispatch,
    ImageFetcher,
    RunResult,
    StopRules,
)
from collector.storage.collection import Collection, Recovery, recover
from collector.storage.ledger import Ledger


def build_fetcher(recipe: Recipe, ledger: Ledger) -> ImageFetcher:
    """The one polite fetcher, configured from the recipe."""
    from collector.fetching.fetcher import Fetcher, FetchSettings

    return Fetcher(FetchSettings.from_recipe(recipe), ledger)


@contextlib.contextmanager
def prepared_run(collection: Collection, *,
                 on_recovery: Callable[[Recovery], None] | None = None,
                 command: str = "gather") -> Iterator[tuple[Recipe, Ledger]]:
    """Lock the folder, load the recipe, open the ledger and recover from any crash.
    Stored files the ledger cannot explain are kept, noted in the ledger and passed to
    ``on_recovery`` with the rest of the :class:`Recovery`. ``command`` names the holder of
    the lock to anyone refused it."""
    recipe = collection.recipe()
    if not recipe.sources:
        raise RecipeError([RecipeProblem(str(recipe.path), "sources",
                                         "no [[sources]] yet: add at least one source to "
                                         "gather from")])
    missing = env_problems(recipe)
    if missing:
        raise RecipeError(missing)
    with collection.gather_lock(command), collection.ledger() as ledger:
        recovery = recover(collection, ledger)
        if recovery.unknown_files:
            ledger.add_note("unknown_files", unknown_files_message(collection,
                                                                   recovery.unknown_files))
        if on_recovery is not None:
            on_recovery(recovery)
        # We hold the lock, so a run still marked "running" was killed (power loss, SIGKILL).
        ledger.mark_killed_runs()
        yield recipe, ledger


def unknown_files_message(collection: Collection, unknown: tuple[str, ...]) -> str:
    """The one line that reports stored files without a ledger row (kept, never deleted)."""
    return (f"{len(unknown)} stored files are unknown to the ledger (kept, not deleted); "
            f"'collector rebuild-ledger {collection.root}' registers them, or a gather "
            "attaches them when it lists their items again")


def gather(collection: Collection, *, stop: StopRules | None = None,
           progress: Progress | None = None, options: dict[str, Any] | None = None,
           fetcher_factory: Callable[[Recipe, Ledger], ImageFetcher | None] = build_fetcher,
           ) -> RunResult:
    """Run the collection's recipe: list, decide, fetch, check, store, record."""
    with prepared_run(collection) as (recipe, ledger):
        return run_prepared(collection, recipe, ledger, stop=stop, progress=progress,
                            options=options, fetcher_factory=fetcher_factory)


def run_prepared(collection: Collection, recipe: Recipe, ledger: Ledger, *,
                 stop: StopRules | None = None, progress: Progress | None = None,
                 options: dict[str, Any] | None = None,
                 fetcher_factory: Callable[[Recipe, Ledger], ImageFetcher | None] = build_fetcher,
                 dispatch: HostDispatch | None = None) -> RunResult:
    """One run inside :func:`prepared_run`: the fetcher is built for it and closed after.
    With ``dispatch`` (a cluster, collector.run.cluster) images are fetched there, and the
    fetcher lists pages through ``dispatch.gated`` (taking turns with the cluster's tasks)."""
    fetcher = fetcher_factory(recipe, ledger)
    gated = getattr(dispatch, "gated", None)
    listing = gated(fetcher) if gated is not None and fetcher is not None else fetcher
    try:
        gatherer = Gatherer(collection, recipe, ledger, listing, stop=stop or StopRules(),
                            progress=progress, dispatch=dispatch)
        return gatherer.run(options)
    finally:
        close = getattr(fetcher, "close", None)
        if close:
            close()
