"""Help screens that read plainly, for every command of the typer app (also ones added later).

click's plain formatter (typer's ``rich_markup_mode=None``) re-flows each paragraph, so no
sentence is broken where the source line ended; on top of it, :class:`PlainCommand` writes the
usage as typed on the command line (``collector gather [OPTIONS] [FOLDER]``), gives each
option's value a word (``--until HH:MM``) and flags none, leaves out the renderer's type tags
(``<path>``, ``<int range>``), and moves the docstring's closing "Example: ..." paragraph to the
very end of the screen.
"""

from __future__ import annotations

from collections.abc import Callable, Iterator
from contextlib import contextmanager
from typing import Any, TypeVar

import typer
from typer.core import TyperCommand

from collector.errors import CollectorError
from collector.safe_text import for_terminal

F = TypeVar("F", bound=Callable[..., Any])


def split_example(text: str | None) -> tuple[str | None, str | None]:
    """A command's docstring split into its body and its last paragraph when that is the
    example ("Example: ..."), which becomes the epilog: the last thing on the help screen."""
    if not text:
        return text, None
    body, sep, example = text.strip().rpartition("\n\nExample")
    if not sep or "\n\n" in example:
        return text, None
    lines = ["Example" + example.split("\n", 1)[0], *example.split("\n")[1:]]
    # "\b" keeps click from re-flowing the example lines: a command is not a sentence.
    return body, "\b\n" + "\n".join(line.rstrip() for line in lines)


_METAVARS = {"integer": "N", "float": "NUMBER", "path": "PATH"}


class PlainCommand(TyperCommand):
    """A command whose help screen reads plainly: the usage names arguments as written on the
    command line (``collector gather [OPTIONS] [FOLDER]``), arguments and options show a word
    for their value (``--until HH:MM``), flags show none, and the example comes last."""

    def __init__(self, *args: Any, help: str | None = None, epilog: str | None = None,
                 **kwargs: Any) -> None:
        body, example = split_example(help)
        super().__init__(*args, help=body, epilog=epilog or example, **kwargs)
        for param in self.params:  # a word for an option's value where none was given
            if param.param_type_name == "option" and param.metavar is None \
                    and not getattr(param, "is_flag", False):
                kind = getattr(getattr(param, "type", None), "name", "")
                param.metavar = _METAVARS.get(kind, "TEXT")

    def collect_usage_pieces(self, ctx: Any) -> list[str]:
        pieces = [self.options_metavar] if self.options_metavar else []
        for param in self.get_params(ctx):
            if param.param_type_name == "argument":
                name = _argument_name(param)
                pieces.append(name if param.required else f"[{name}]")
        return pieces

    def format_options(self, ctx: Any, formatter: Any) -> None:
        args, opts = [], []
        for param in self.get_params(ctx):
            if param.param_type_name == "argument":
                default = param.default
                extra = f"  [default: {default}]" if default not in (None, (), []) else ""
                args.append((_argument_name(param), (getattr(param, "help", "") or "") + extra))
            else:
                record = param.get_help_record(ctx)
                if record is not None:
                    opts.append(record)
        for title, rows in (("Arguments", args), ("Options", opts)):
            if rows:
                with formatter.section(title):
                    formatter.write_dl(rows)


def _argument_name(param: Any) -> str:
    name = str(param.metavar or param.name or "").upper()
    return name + "..." if param.nargs != 1 else name


class PlainTyper(typer.Typer):
    """The typer app whose every command (also ones added later) gets the plain help screen."""

    def command(self, name: str | None = None, *, cls: Any = None,
                **kwargs: Any) -> Callable[[F], F]:
        return super().command(name, cls=cls or PlainCommand, **kwargs)


@contextmanager
def user_errors() -> Iterator[None]:
    """Turn CollectorError into 'Error: ...' on stderr and the error's exit code."""
    try:
        yield
    except CollectorError as exc:
        typer.echo(for_terminal(f"Error: {exc}"), err=True)
        raise typer.Exit(exc.exit_code) from None
