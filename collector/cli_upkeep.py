"""The upkeep commands of the command line: withdraw (and undo), the withdrawals, source notes,
recipe history, the re-check, measuring stored files again and applying the pixel rules again.
Thin, like every command: each parses its options and calls one library function
(collector.storage.withdrawals, collector.run.recheck, ...)."""

from __future__ import annotations

from pathlib import Path

import typer

from collector.cli_help import user_errors
from collector.safe_text import for_terminal, one_line


def withdraw(
    folder: Path = typer.Argument(..., help="The collection folder."),
    what: str = typer.Argument(..., help="An image file, a sha256 prefix (8+ hex digits), "
                                         "item:ID or key:SOURCE:KEY."),
    reason: str = typer.Option(..., "--reason", help="creator-request, licence-error, "
                                                     "personal-data or other."),
    asked_by: str = typer.Option(None, "--asked-by", help="Who asked for it."),
    asked_on: str = typer.Option(None, "--asked-on", help="When they asked (YYYY-MM-DD)."),
    note: str = typer.Option(None, "--note", help="A free-text note kept with it."),
    delete_bytes: bool = typer.Option(False, "--delete-bytes",
                                      help="Also delete the stored file (the record stays)."),
) -> None:
    """Take a file or item out of every release from now on; gather never fetches it again.

    Example: collector withdraw my-leaves item:42 --reason creator-request --asked-by "R. Moss"
    """
    from collector.storage import withdrawals as w
    from collector.storage.collection import open_collection

    with user_errors():
        collection = open_collection(folder)
        with collection.gather_lock("withdraw"), collection.ledger() as ledger:
            done = w.withdraw(collection, ledger, what, reason=reason, asked_by=asked_by,
                              asked_on=asked_on, note=note, delete_bytes=delete_bytes)
    typer.echo(one_line(f"Withdrawal #{done.id} of {done.target}: {w.describe(done)}"))
    typer.echo(f"Undo with: collector undo-withdrawal {folder} {done.id}")


def undo_withdrawal(
    folder: Path = typer.Argument(..., help="The collection folder."),
    number: int = typer.Argument(..., help="The withdrawal's number (collector withdrawals)."),
    by: str = typer.Option(None, "--by", help="Who decided to undo it."),
    note: str = typer.Option(None, "--note", help="Why it is undone."),
) -> None:
    """Put a withdrawn file or item back (recorded too); deleted bytes are fetched again.

    Example: collector undo-withdrawal my-leaves 3 --note "asked by mistake"
    """
    from collector.storage.collection import open_collection
    from collector.storage.withdrawals import describe, undo

    with user_errors():
        collection = open_collection(folder)
        with collection.gather_lock("undo-withdrawal"), collection.ledger() as ledger:
            done = undo(ledger, number, undone_by=by, note=note)
    typer.echo(one_line(f"Withdrawal #{done.id} of {done.target}: {describe(done)}"))
    if done.bytes_deleted:
        typer.echo(f"Its bytes were deleted; collector gather {folder} fetches them again")


def withdrawals(
    folder: Path = typer.Argument(Path("."), help="The collection folder."),
) -> None:
    """List every withdrawal, undone ones too.

    Example: collector withdrawals my-leaves
    """
    from collector.storage.collection import open_collection
    from collector.storage.withdrawals import listing

    with user_errors():
        collection = open_collection(folder)
        with collection.ledger(readonly=True) as ledger:
            lines = listing(ledger)
    for line in lines or ["No withdrawals."]:
        typer.echo(one_line(line))


def notes(
    folder: Path = typer.Argument(Path("."), help="The collection folder."),
    kind: list[str] = typer.Option([], "--kind", help="Only notes of this kind (repeatable)."),
    source: list[str] = typer.Option([], "--source", help="Only this source (repeatable)."),
) -> None:
    """List what the sources reported while listing (blank scans, touching items, ...).

    Example: collector notes my-leaves --kind blank_scan --source scans
    """
    from collector.exports.notes import list_notes, note_lines
    from collector.storage.collection import open_collection

    with user_errors():
        collection = open_collection(folder)
        with collection.ledger(readonly=True) as ledger:
            rows = list_notes(ledger, kinds=tuple(kind), sources=tuple(source))
    for line in note_lines(rows):
        typer.echo(one_line(line))
    typer.echo(f"{len(rows)} note(s)")


def recipe_diff(
    folder: Path = typer.Argument(..., help="The collection folder."),
    first: int = typer.Argument(..., help="A run number."),
    second: int = typer.Argument(..., help="A later (or earlier) run number."),
) -> None:
    """Show how the recipe of one run differs from the recipe of another.

    Example: collector recipe-diff my-leaves 1 4
    """
    from collector.exports.recipe_history import recipe_diff as diff
    from collector.storage.collection import open_collection

    with user_errors():
        collection = open_collection(folder)
        with collection.ledger(readonly=True) as ledger:
            lines = diff(ledger, first, second)
    for line in lines or [f"Runs #{first} and #{second} used the same recipe."]:
        typer.echo(for_terminal(line))


def recheck(
    folder: Path = typer.Argument(Path("."), help="The collection folder."),
    until: str = typer.Option(None, "--until", metavar="HH:MM",
                              help="Stop at this local time, e.g. 07:00."),
    duration: str = typer.Option(None, "--for", metavar="DURATION",
                                 help="Stop after this long, e.g. 2h."),
    show_all: bool = typer.Option(False, "--all", help="List unchanged items too."),
) -> None:
    """Look again, politely, at what was gathered: licences, fields and image bytes.

    Unchanged images cost a 304 (conditional requests with the stored ETag/Last-Modified);
    nothing stored is overwritten. Rerunning resumes an unfinished re-check.

    Example: collector recheck my-leaves --for 2h
    """
    from collector.run import recheck as rc
    from collector.run.scheduling import stop_rules
    from collector.storage.collection import open_collection

    with user_errors():
        collection = open_collection(folder)
        stop = stop_rules(collection.recipe(), until=until, duration=duration, max_items=0)
        result = rc.recheck(collection, stop=stop, options={"until": until, "for": duration})
    for line in rc.report_lines(result, show_all=show_all):
        typer.echo(one_line(line))
    raise typer.Exit(130 if result.outcome == "interrupted" else 0)


def remeasure(
    folder: Path = typer.Argument(Path("."), help="The collection folder."),
    everything: bool = typer.Option(False, "--all",
                                    help="Measure every stored file, not only stale ones."),
    dry_run: bool = typer.Option(False, "--dry-run", help="Only count what is due."),
) -> None:
    """Measure the stored files again, offline: hashes, transparency, size, colour facts.

    Brings the facts of files gathered by an older collector up to date from the files in the
    store, then applies the recipe's pixel rules to them as apply-rules does; never requests
    anything. Safe to interrupt: rerun to continue.

    Example: collector remeasure my-leaves --dry-run
    """
    from collector.run import remeasure as rm
    from collector.storage.collection import open_collection

    def progress(result: rm.RemeasureResult) -> None:  # a line per batch on big collections
        if result.files > rm.BATCH:
            typer.echo(f"{result.looked:,} of {result.files:,} files looked at, "
                       f"{result.measured:,} measured", err=True)

    with user_errors():
        result = rm.remeasure(open_collection(folder), everything=everything, dry_run=dry_run,
                              progress=progress)
    for line in rm.report_lines(result):
        typer.echo(one_line(line))
    raise typer.Exit(130 if result.outcome == "interrupted" else 1 if result.problems else 0)


def apply_rules(
    folder: Path = typer.Argument(Path("."), help="The collection folder."),
    dry_run: bool = typer.Option(False, "--dry-run",
                                 help="Show what would move; change nothing."),
) -> None:
    """Apply the recipe's pixel rules again to every stored file, offline.

    Files that now fail a rule are set aside (kept, left out of releases), files that pass
    again are brought back; each change is recorded. Nothing is requested or decoded: the
    rules judge the colour facts the ledger keeps.

    Example: collector apply-rules my-leaves --dry-run
    """
    from collector.run import set_aside
    from collector.storage.collection import open_collection

    with user_errors():
        report = set_aside.apply_rules(open_collection(folder), dry_run=dry_run)
    for line in set_aside.report_lines(report):
        typer.echo(one_line(line))


def register_upkeep(app: typer.Typer) -> None:
    """Add the upkeep commands to the command line."""
    app.command()(withdraw)
    app.command("undo-withdrawal")(undo_withdrawal)
    app.command()(withdrawals)
    app.command()(notes)
    app.command("recipe-diff")(recipe_diff)
    app.command()(recheck)
    app.command()(remeasure)
    app.command("apply-rules")(apply_rules)
