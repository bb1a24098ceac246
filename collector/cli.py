"""The ``collector`` command line: thin commands over the library.

Each command parses its options, calls one library function and formats the result. Only
:class:`~collector.errors.CollectorError` is caught: it is printed as ``Error: ...`` on stderr
and the command exits with the error's code (1, or 2 for recipe/usage problems). Anything else
is a bug and keeps its traceback.
"""

from __future__ import annotations

import json
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

