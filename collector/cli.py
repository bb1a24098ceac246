"""The ``collector`` command line: thin commands over the library.

Each command parses its options, calls one library function and formats the result. Only
:class:`~collector.errors.CollectorError` is caught: it is printed as ``Error: ...`` on stderr
and the command exits with the error's code (1, or 2 for recipe/usage problems). Anything else
is a bug and keeps its traceback.
"""

from __future__ import annotations

import json
import sys
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import Any, TypeVar

import typer

from collector import __version__
from collector.errors import CollectorError

F = TypeVar("F", bound=Callable[..., Any])

app = typer.Typer(
    name="collector",
    help=(
        "Collect images politely from open archives and record where every file came from.\n\n"
        "Example: collector init my-leaves --contact me@example.org && "
        "collector check my-leaves"
    ),
    no_args_is_help=True,
    add_completion=False,
    pretty_exceptions_enable=False,
)


@contextmanager
def user_errors() -> Iterator[None]:
    """Turn CollectorError into 'Error: ...' on stderr and the error's exit code."""
    try:
        yield
    except CollectorError as exc:
        typer.echo(f"Error: {exc}", err=True)
        raise typer.Exit(exc.exit_code) from None


def _version(value: bool) -> None:
    if value:
        typer.echo(f"collector {__version__}")
        raise typer.Exit()


@app.callback()
def main(
    version: bool = typer.Option(False, "--version", callback=_version, is_eager=True,
                                 help="Print the version and exit."),
) -> None:
    """Collect images politely from open archives and record where every file came from."""


@app.command()
def init(
    folder: Path = typer.Argument(..., help="The collection folder to create."),
    contact: str = typer.Option("", help="Your email or web page, for the User-Agent."),
    name: str = typer.Option(None, help="The collection's name (default: the folder name)."),
    existing_ok: bool = typer.Option(
        False, "--existing-ok",
        help="Add missing collection files to a non-empty folder; nothing is overwritten."),
) -> None:
    """Create a collection folder: recipe.toml, ledger.sqlite and files/.

    Example: collector init my-leaves --contact me@example.org
    """
    from collector.collection import init_collection

    with user_errors():
        collection = init_collection(folder, contact=contact, name=name, existing_ok=existing_ok)
    typer.echo(f"Created collection {collection.root}")
    typer.echo(f"  recipe: {collection.recipe_path}   (edit it: contact and [[sources]])")
    typer.echo(f"  ledger: {collection.ledger_path}")
    typer.echo(f"  files:  {collection.store.root}/")
    typer.echo(f"Next: collector check {folder}")


@app.command()
def check(
    folder: Path = typer.Argument(Path("."), help="The collection folder."),
    as_json: bool = typer.Option(False, "--json", help="Print the settings as JSON."),
) -> None:
    """Validate the recipe and print the settings a run would use.

    Example: collector check my-leaves
    """
    from collector.collection import open_collection

    with user_errors():
        recipe = open_collection(folder).recipe()
    settings = recipe.as_dict()
    if as_json:
        typer.echo(json.dumps(settings, indent=2, default=str))
        return
    typer.echo(f"{recipe.path}: valid")
    typer.echo(f"  User-Agent: collector/{__version__} (+{recipe.contact})")
    typer.echo(f"  robots.txt product token: {recipe.product_token}")
    for section in ("budgets", "network", "licences", "images", "stop"):
        typer.echo(f"  [{section}]")
        for key, value in settings[section].items():
            typer.echo(f"    {key} = {value!r}")
    for host, override in recipe.host_budgets.items():
        typer.echo(f"  [budgets.hosts.{host!r}] " + ", ".join(
            f"{k} = {v!r}" for k, v in override.items()))
    if not recipe.sources:
        typer.echo("  sources: none yet; add [[sources]] tables before gathering")
    for source in recipe.sources:
        typer.echo(f"  source {source['name']!r} ({source['kind']})")



@app.command()
def gather(
    folder: Path = typer.Argument(Path("."), help="The collection folder."),
    until: str = typer.Option(None, "--until", help="Stop at this local time, e.g. 07:00."),
    duration: str = typer.Option(None, "--for", help="Stop after this long, e.g. 8h or 90m."),
    max_items: int = typer.Option(None, "--max-items", min=0,
                                  help="Stop after storing this many new items."),
    dry_run: bool = typer.Option(False, "--dry-run",
                                 help="Request nothing; show sources, budgets and an estimate."),
    quiet: bool = typer.Option(False, "--quiet", help="Print only notes and the summary."),
    log_json: bool = typer.Option(False, "--log-json", help="Print events as JSON lines."),
) -> None:
    """Run the recipe: list sources, decide licences, fetch politely, check, store, record.

    Rerunning resumes: stored items are never requested again. Ctrl-C finishes the files in
    flight and exits 130. Example: collector gather my-leaves --until 07:00
    """
    from collector.collection import open_collection
    from collector.run import Gatherer, build_fetcher, prepared_run, stop_rules
    from collector.summary import estimate, format_estimate, format_summary, summarise

    with user_errors():
        collection = open_collection(folder)
        if dry_run:
            recipe = collection.recipe()
            with collection.ledger(readonly=True) as ledger:
                for line in format_estimate(recipe, estimate(recipe, ledger)):
                    typer.echo(line)
            return
        with prepared_run(collection) as (recipe, ledger):
            stop = stop_rules(recipe, until=until, duration=duration, max_items=max_items)
            progress = _progress_for(quiet=quiet, log_json=log_json)
            fetcher = build_fetcher(recipe, ledger)
            try:
                gatherer = Gatherer(collection, recipe, ledger, fetcher, stop=stop,
                                    progress=progress)
                options = {"until": until, "for": duration, "max_items": max_items}
                if hasattr(progress, "attach"):
                    progress.attach(gatherer)
                    with progress:
                        result = gatherer.run(options)
                else:
                    result = gatherer.run(options)
            finally:
                fetcher.close()
            lines = format_summary(summarise(ledger))
    if not log_json:
        typer.echo(f"Run #{result.run_id}: {result.outcome}")
        for line in lines:
            typer.echo(line)
    if result.outcome == "interrupted":
        typer.echo(f"Interrupted. Resume with: collector gather {folder}", err=True)
    raise typer.Exit(result.exit_code)


def _progress_for(*, quiet: bool, log_json: bool) -> Any:
    from collector.display import JsonProgress, LiveProgress, PlainProgress

    if log_json:
        return JsonProgress()
    if quiet or not sys.stdout.isatty():
        return PlainProgress(quiet=quiet)
    return LiveProgress()


@app.command()
def status(
    folder: Path = typer.Argument(Path("."), help="The collection folder."),
    as_json: bool = typer.Option(False, "--json", help="Print the summary as JSON."),
) -> None:
    """Summarise a collection from its ledger; works while a run is going.

    Example: collector status my-leaves
    """
    from dataclasses import asdict

    from collector.collection import open_collection
    from collector.summary import format_summary, summarise

    with user_errors():
        collection = open_collection(folder)
        with collection.ledger(readonly=True) as ledger:
            summary = summarise(ledger)
    if as_json:
        data = asdict(summary)
        data["reasons"] = {f"{s}/{r}": n for (s, r), n in summary.reasons.items()}
        typer.echo(json.dumps(data, indent=2, default=str))
        return
    for line in format_summary(summary):
        typer.echo(line)
