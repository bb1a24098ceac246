"""The ``collector`` command line: thin commands over the library.

Each command parses its options, calls one library function and formats the result. Only
:class:`~collector.errors.CollectorError` is caught: it is printed as ``Error: ...`` on stderr
and the command exits with the error's code (1, or 2 for recipe/usage problems). Anything else
is a bug and keeps its traceback.
"""

from __future__ import annotations

import json
import sys
from collections.abc import Callable
from contextlib import nullcontext
from pathlib import Path
from typing import TYPE_CHECKING, Any, TypeVar

import typer

from collector import __version__
from collector.cli_help import PlainTyper, user_errors
from collector.cli_upkeep import register_upkeep
from collector.safe_text import for_terminal, one_line

if TYPE_CHECKING:
    from collector.run.scheduling import RunResult

F = TypeVar("F", bound=Callable[..., Any])

app = PlainTyper(
    name="collector",
    help="Collect images politely from open archives and record where every file came from.",
    epilog="\b\nExample: collector init my-leaves --contact me@example.org\n"
           "         collector check my-leaves",
    no_args_is_help=True,
    add_completion=False,
    pretty_exceptions_enable=False,
    rich_markup_mode=None,  # click's plain help: no type tags, paragraphs re-flowed
    context_settings={"help_option_names": ["-h", "--help"]},
)


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
    from collector.storage.safe_paths import platform_problem
    if (problem := platform_problem()) is not None:
        typer.echo(f"Error: {problem}", err=True)
        raise typer.Exit(2)


@app.command()
def init(
    folder: Path = typer.Argument(..., help="The collection folder to create."),
    contact: str = typer.Option("", metavar="ADDR",
                                help="Your email or web page, for the User-Agent."),
    name: str = typer.Option(None, metavar="TEXT",
                             help="The collection's name (default: the folder name)."),
    existing_ok: bool = typer.Option(
        False, "--existing-ok",
        help="Add missing collection files to a non-empty folder; nothing is overwritten."),
) -> None:
    """Create a collection folder: recipe.toml, ledger.sqlite and files/.

    Example: collector init my-leaves --contact me@example.org
    """
    from collector.storage.collection import init_collection

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
    from collector.config.recipe import check_recipe
    from collector.config.recipe_env import source_prefix
    from collector.schema import toml_key, toml_value
    from collector.storage.collection import open_collection

    with user_errors():
        # Every problem in one round, unset ${NAME} variables included (a run needs them).
        recipe = check_recipe(open_collection(folder).recipe_path)
    settings = recipe.shown_settings()  # secrets written into the recipe are hidden
    if as_json:
        typer.echo(json.dumps(settings, indent=2, default=str))
        return
    say = typer.echo
    say(f"{recipe.path}: valid")
    say(f"  User-Agent: collector/{__version__} (+{recipe.contact})")
    say(f"  robots.txt product token: {recipe.product_token}")
    for section in ("budgets", "network", "licences", "images", "stop", "items", "reservations"):
        say(f"  [{section}]")
        for key, value in settings[section].items():
            say(f"    {toml_key(key)} = {toml_value(value)}")
    for host, override in recipe.host_budgets.items():
        say(f"  [budgets.hosts.{toml_key(host)}] " + ", ".join(
            f"{toml_key(k)} = {toml_value(v)}" for k, v in override.items()))
    if not recipe.sources:
        say("  sources: none yet; add [[sources]] tables before gathering")
    for i, source in enumerate(recipe.sources):
        say(f"  {source_prefix(i, source)}: kind = {toml_value(source['kind'])}")
    for i, rule in enumerate(recipe.pixel_rules, start=1):
        say(f"  pixel_rules[{i}]: " + ", ".join(
            f"{toml_key(k)} = {toml_value(v)}" for k, v in rule.items()))



@app.command()
def gather(
    folder: Path = typer.Argument(Path("."), help="The collection folder."),
    until: str = typer.Option(None, "--until", metavar="HH:MM",
                              help="Stop at this local time, e.g. 07:00."),
    duration: str = typer.Option(None, "--for", metavar="DURATION",
                                 help="Stop after this long, e.g. 8h or 90m."),
    max_items: int = typer.Option(None, "--max-items", metavar="N",
                                  help="Stop after storing this many new items (files "
                                       "already in flight are finished)."),
    dry_run: bool = typer.Option(False, "--dry-run",
                                 help="Request nothing; show sources, budgets and an estimate."),
    quiet: bool = typer.Option(False, "--quiet", help="Print only notes and the summary."),
    log_json: bool = typer.Option(False, "--log-json", help="Print events as JSON lines."),
    cluster: str = typer.Option(None, "--cluster", metavar="ADDRESS",
                                help="Fetch images on this Dask scheduler, e.g. "
                                     "tcp://10.0.0.5:8786 (needs the cluster extra: pip "
                                     "install 'polite-image-collector[cluster]')."),
    local_workers: int = typer.Option(None, "--local-workers", metavar="N",
                                      help="Fetch images on a local Dask cluster of N worker "
                                           "processes (needs the cluster extra)."),
    tls_ca_file: Path = typer.Option(None, "--tls-ca-file", metavar="PATH",
                                     help="With --cluster: the CA certificate of the "
                                          "scheduler's TLS."),
    tls_cert: Path = typer.Option(None, "--tls-cert", metavar="PATH",
                                  help="With --cluster: this machine's TLS certificate."),
    tls_key: Path = typer.Option(None, "--tls-key", metavar="PATH",
                                 help="With --cluster: the key of --tls-cert."),
) -> None:
    """Run the recipe: list sources, decide licences, fetch politely, check, store, record.

    Rerunning resumes: stored items are never requested again. Ctrl-C finishes the files in
    flight and exits 130. --until and --for are checked before anything starts, also with
    --dry-run.

    Example: collector gather my-leaves --until 07:00
    """
    from collector.config.stop_times import check_stop_options

    with user_errors():
        check_stop_options(until, duration, max_items)  # before anything starts, dry or not
        if dry_run:
            _gather_estimate(folder, until=until, duration=duration, max_items=max_items)
            return
        engine = _cluster_options(cluster, local_workers, (tls_ca_file, tls_cert, tls_key))
        result, lines = _gather_run(folder, until=until, duration=duration,
                                    max_items=max_items, quiet=quiet, log_json=log_json,
                                    engine=engine)
    _gather_report(folder, result, lines, log_json=log_json)


def _gather_estimate(folder: Path, *, until: str | None, duration: str | None,
                     max_items: int | None) -> None:
    """gather --dry-run: the sources, budgets, an estimate and when the run would stop;
    nothing is requested."""
    from datetime import datetime

    from collector.exports.summary import estimate, format_estimate
    from collector.run.scheduling import stop_rules
    from collector.storage.collection import open_collection

    collection = open_collection(folder)
    recipe = collection.recipe()
    now = datetime.now().astimezone()
    stop = stop_rules(recipe, until=until, duration=duration, max_items=max_items, now=now)
    with collection.ledger(readonly=True) as ledger:
        for line in format_estimate(recipe, estimate(recipe, ledger), deadline=stop.deadline,
                                    max_items=stop.max_items, now=now.timestamp()):
            typer.echo(one_line(line))


def _cluster_options(address: str | None, local_workers: int | None,
                     tls: tuple[Path | None, ...]) -> dict[str, Any] | None:
    """gather --cluster / --local-workers / --tls-*: checked before anything starts; None
    for a run on this machine alone (collector.run.cluster_setup.cluster_options)."""
    from collector.run.cluster_setup import cluster_options

    return cluster_options(address, local_workers, tls)


def _gather_run(folder: Path, *, until: str | None, duration: str | None,
                max_items: int | None, quiet: bool, log_json: bool,
                engine: dict[str, Any] | None = None) -> tuple[RunResult, list[str]]:
    """One gather run with the progress view; its result and the summary lines."""
    from collector.display import LiveProgress
    from collector.exports.summary import format_summary, summarise
    from collector.run.gather import prepared_run, run_prepared, unknown_files_message
    from collector.run.scheduling import stop_rules
    from collector.storage.collection import open_collection

    collection = open_collection(folder)

    def on_recovery(recovery: Any) -> None:
        if recovery.unknown_files:
            typer.echo("Note: " + unknown_files_message(collection, recovery.unknown_files),
                       err=True)

    with _cluster_client(engine) as client, \
            prepared_run(collection, on_recovery=on_recovery) as (recipe, ledger):
        stop = stop_rules(recipe, until=until, duration=duration, max_items=max_items)
        progress = _progress_for(quiet=quiet, log_json=log_json)
        options = {"until": until, "for": duration, "max_items": max_items,
                   **({"cluster": engine.get("address") or "local"} if engine else {})}
        with progress if isinstance(progress, LiveProgress) else nullcontext():
            if client is None:
                result = run_prepared(collection, recipe, ledger, stop=stop, progress=progress,
                                      options=options)
            else:
                from collector.run.cluster import run_on_cluster
                result = run_on_cluster(collection, recipe, ledger, client, stop=stop,
                                        progress=progress, options=options)
        return result, format_summary(summarise(ledger))


def _cluster_client(engine: dict[str, Any] | None) -> Any:
    """A Dask client for the options of :func:`_cluster_options`, or a context of None."""
    if engine is None:
        return nullcontext(None)
    from collector.run.cluster_setup import connect

    return connect(**engine)


def _gather_report(folder: Path, result: RunResult, lines: list[str], *,
                   log_json: bool) -> None:
    """The end of a gather: outcome, summary, backup, and the exit code."""
    if not log_json:
        typer.echo(one_line(f"Run #{result.run_id}: {result.outcome}"))
        for line in lines:
            typer.echo(one_line(line))
        if result.backup is not None:
            typer.echo(f"Ledger backup: {result.backup}")
    if result.backup_error:
        typer.echo(f"Warning: {result.backup_error}", err=True)
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
    from collector.exports.changelog import withdrawal_line
    from collector.exports.recipe_history import last_change_line
    from collector.exports.summary import format_summary, summarise, summary_as_dict
    from collector.storage.collection import open_collection

    with user_errors():
        collection = open_collection(folder)
        with collection.ledger(readonly=True) as ledger:
            summary = summarise(ledger)
            recipe_line = last_change_line(ledger)
            withdrawn_line = withdrawal_line(ledger)
    if as_json:
        typer.echo(json.dumps(summary_as_dict(summary), indent=2, default=str))
        return
    for line in format_summary(summary):
        typer.echo(one_line(line))
    for extra in (recipe_line, withdrawn_line):
        if extra:
            typer.echo(one_line(extra))


@app.command()
def datasheet(
    folder: Path = typer.Argument(Path("."), help="The collection folder."),
    out: Path = typer.Option(None, "--out", metavar="DIR",
                             help="Output folder (default: FOLDER/datasheet)."),
    answers: Path = typer.Option(None, "--answers", metavar="FILE",
                                 help="TOML file with the curator's answers (question ids)."),
    with_images: bool = typer.Option(False, "--with-images",
                                     help="Link the released files into OUT/images/."),
    exclude_flagged: bool = typer.Option(
        False, "--exclude-flagged",
        help="Leave out files flagged for personal data or licence conflicts."),
    overwrite: bool = typer.Option(False, "--overwrite",
                                   help="Replace this export's own files in a non-empty OUT."),
    answers_template: bool = typer.Option(
        False, "--answers-template",
        help="Print a commented answers file listing every question id, and exit."),
    only: list[str] = typer.Option(
        [], "--only", help="Release only files meeting NAME=VALUE (repeatable; NAME: source, "
                           "licence, creator, state, date=FROM..TO, stored=FROM..TO)."),
    sha256_file: Path = typer.Option(None, "--sha256-file",
                                     help="Release only the files listed (one sha256 a line)."),
    keep_whole_scans: bool = typer.Option(
        False, "--keep-whole-scans", help="Also release whole scanner beds whose crops are "
                                          "released."),
    keep_blank_scans: bool = typer.Option(False, "--keep-blank-scans",
                                          help="Also release blank scans."),
) -> None:
    """Write a datasheet (md + html), croissant.json, provenance.csv and attribution.csv.

    Example: collector datasheet my-leaves --answers answers.toml --with-images
    """
    from collector.exports.datasheet import export_datasheet
    from collector.exports.datasheet_questions import answers_template as template
    from collector.exports.release import EXCLUSION_REASONS, parse_selection

    if answers_template:
        typer.echo(template())
        return
    with user_errors():
        selection = parse_selection(only, sha256_file, keep_whole_scans=keep_whole_scans,
                                    keep_blank_scans=keep_blank_scans)
        result = export_datasheet(folder, out=out, answers_path=answers,
                                  with_images=with_images, exclude_flagged=exclude_flagged,
                                  overwrite=overwrite, selection=selection)
    c = result.counts
    typer.echo(f"Wrote {result.out}: {c.files} files described"
               + (f" ({c.linked} linked, {c.copied} copied into images/)" if with_images else "")
               + f"; left out {c.excluded_licence} by licence, {c.excluded_flagged} flagged"
               + "".join(f", {n} {EXCLUSION_REASONS.get(k, k)}" for k, n in c.excluded.items()))
    for problem in result.croissant_problems:
        typer.echo(one_line(f"croissant.json: {problem}"), err=True)


@app.command()
def trace(
    paths: list[Path] = typer.Argument(..., metavar="FILE",
                                       help="Image files or folders of images to trace."),
    folder: Path = typer.Option(None, "--in", envvar="COLLECTOR_COLLECTION", metavar="DIR",
                                help="The collection folder (default: $COLLECTOR_COLLECTION, "
                                     "else the current folder)."),
    as_csv: bool = typer.Option(False, "--csv", help="Print the table as CSV."),
    as_json: bool = typer.Option(False, "--json", help="Print full records as JSON."),
) -> None:
    """Say where files came from and under which licence, by content (not by name).

    Exit 0 when every file traced (exact or near), 1 when some did not, 2 on usage errors.

    Example: collector trace leaf.jpg --in my-leaves
             collector trace to-publish/ --in my-leaves --csv > check.csv
    """
    from collector.exports.trace import Tracer, collect_targets
    from collector.exports.trace_format import (
        CAUTION,
        format_record,
        format_summary,
        format_table,
        to_csv,
        to_json,
    )

    with user_errors():
        targets = collect_targets(paths)
        with Tracer.open(_trace_collection(folder)) as tracer:
            results = list(tracer.trace_all(targets))
            recipe_problem = tracer.recipe_problem
    if as_json:
        typer.echo(to_json(results))
    elif as_csv:
        text = to_csv(results)  # escaped for a terminal only: a pipe gets the exact CSV
        typer.echo(for_terminal(text) if sys.stdout.isatty() else text, nl=False)
        typer.echo(CAUTION, err=True)  # stderr keeps the CSV clean for other tools
    else:
        if recipe_problem:
            typer.echo("Note: the recipe did not load, so the near-match threshold is 8 and "
                       "the allowlist is unknown.", err=True)
        for result in results:
            if not result.listed:
                for line in format_record(result):
                    typer.echo(one_line(line))
        listed = [r for r in results if r.listed]
        if listed:
            for line in format_table(listed):
                typer.echo(one_line(line))
        for line in format_summary(results):
            typer.echo(one_line(line))
    raise typer.Exit(0 if all(r.kind in ("exact", "near") for r in results) else 1)


def _trace_collection(folder: Path | None) -> Path:
    """--in DIR (or $COLLECTOR_COLLECTION), else the current folder if it is a collection."""
    from collector.errors import CollectionError
    from collector.storage.collection import is_collection

    if folder is not None:
        return folder
    if not is_collection(Path(".")):
        raise CollectionError(
            "the current folder is not a collection folder, so there is nothing to trace "
            "against. Say which collection to look in: pass --in DIR (e.g. collector trace "
            "photo.jpg --in my-leaves) or set COLLECTOR_COLLECTION=DIR")
    return Path(".")


@app.command("rebuild-ledger")
def rebuild_ledger(
    folder: Path = typer.Argument(..., help="The collection folder."),
) -> None:
    """Register stored files the ledger cannot explain, as recovered (provenance unknown).

    An unusable ledger (empty, no schema, another collection's) is renamed to
    ledger.sqlite.unusable-<time>, never deleted, and a new one lists every stored file
    (sha256 re-checked). A later gather attaches each file to the item that lists it again.

    Example: collector rebuild-ledger my-leaves
    """
    from collector.storage.ledger_repair import rebuild_ledger as rebuild

    with user_errors():
        result = rebuild(folder)
    if result.set_aside is not None:
        typer.echo(f"Set the unusable ledger aside as {result.set_aside}")
    typer.echo(f"Registered {result.registered} stored files as recovered, provenance unknown"
               + (f" ({result.already_known} were already known)" if result.already_known
                  else ""))
    for path in result.damaged:
        typer.echo(f"Kept but not registered (bytes do not match the name): {path}", err=True)
    typer.echo(f"Next: collector gather {folder}  (attaches files to the items that list "
               "them again)")


@app.command("restore-ledger")
def restore_ledger(
    folder: Path = typer.Argument(..., help="The collection folder."),
    backup: Path = typer.Argument(None, metavar="BACKUP",
                                  help="A backup file (default: the newest in "
                                       "FOLDER/ledger-backups/)."),
) -> None:
    """Put a ledger backup back in place; the current ledger is set aside, not deleted.

    Stored files added after the backup are kept; a gather re-attaches them.

    Example: collector restore-ledger my-leaves
    """
    from collector.storage.ledger_repair import restore_ledger as restore

    with user_errors():
        result = restore(folder, backup)
    if result.set_aside is not None:
        typer.echo(f"Set the previous ledger aside as {result.set_aside}")
    typer.echo(f"Restored {result.backup}: {result.items} items, {result.files} stored files")
    if result.unknown_files:
        typer.echo(f"{result.unknown_files} stored files are newer than the backup (kept); "
                   f"collector gather {folder} attaches them when it lists their items again")


@app.command()
def demo(
    folder: Path = typer.Argument(Path("demo-collection"), help="Where to put the demo."),
    fresh: bool = typer.Option(False, "--fresh", help="Start over instead of resuming."),
    port: int = typer.Option(8642, "--port", metavar="N",
                             help="Port for the demo archive on loopback."),
    quiet: bool = typer.Option(False, "--quiet", help="Print only notes and the summary."),
) -> None:
    """Run the whole job on the embedded fictional archive: gather, trace, datasheet.

    The archive (the invented Fernhollow Field Society) is served on 127.0.0.1-127.0.0.4;
    nothing leaves this machine.

    Example: collector demo --fresh
    """
    from collector.demo import run_demo
    from collector.display import LiveProgress
    from collector.exports.summary import format_summary, summarise
    from collector.exports.trace import Tracer
    from collector.exports.trace_format import format_record

    progress = _progress_for(quiet=quiet, log_json=False)
    with user_errors():
        if isinstance(progress, LiveProgress):
            with progress:
                result = run_demo(folder, fresh=fresh, port=port, progress=progress)
        else:
            result = run_demo(folder, fresh=fresh, port=port, progress=progress)
        with result.collection.ledger(readonly=True) as ledger:
            lines = format_summary(summarise(ledger))
        traced: list[tuple[str, list[str]]] = []
        with Tracer.open(folder) as tracer:
            for label, path in (("a stored file", result.exact_file),
                                ("a resized copy made just now", result.near_copy)):
                if path is not None:
                    traced.append((f"{label}: {path}", format_record(tracer.trace_file(path))))
    say = typer.echo
    say("")
    say(("Resumed" if result.resumed else "Gathered") + f" the demo archive into {folder}: "
        f"run #{result.run.run_id} {result.run.outcome}")
    for line in lines:
        say(line)
    for title, record in traced:
        say("")
        say(f"$ collector trace  ({title})")
        for line in record:
            say("  " + line)
    say("")
    say("Where everything is:")
    say(f"  recipe     {result.collection.recipe_path}")
    say(f"  ledger     {result.collection.ledger_path}   (sqlite3 can read it)")
    say(f"  files      {result.collection.store.root}/")
    if result.datasheet_dir:
        say(f"  datasheet  {result.datasheet_dir / 'datasheet.html'}   (open it in a browser)")
    say("Next: collector status " + str(folder) + "  |  collector trace FILE --in " + str(folder)
        + "  |  collector demo (resumes)  |  collector demo --fresh")
    raise typer.Exit(result.run.exit_code)


@app.command()
def review(
    folder: Path = typer.Argument(Path("."), help="The collection folder."),
    out: Path = typer.Option(None, "--out", metavar="DIR",
                             help="Output folder (default: FOLDER/review)."),
    per_page: int = typer.Option(150, "--per-page", metavar="N",
                                 help="Thumbnails per page."),
) -> None:
    """Write a review sheet: review.html with the stored files as thumbnails, by source, by
    main colour and by near-duplicate cluster, set-aside files apart (thumbnails in thumbs/,
    made once and reused).

    Example: collector review my-leaves
    """
    from collector.exports.review import write_review

    with user_errors():
        result = write_review(folder, out=out, per_page=per_page)
    t = result.thumbs
    typer.echo(f"Wrote {result.sheet}: {result.shown} files shown, {result.set_aside} set "
               f"aside, {result.withdrawn} withdrawn left out; thumbnails {t.made} made, "
               f"{t.reused} reused, {t.removed} removed"
               + (f", {t.failed} could not be made" if t.failed else ""))


# The upkeep commands (withdraw, re-check, recipe history, notes) live in cli_upkeep.
register_upkeep(app)
