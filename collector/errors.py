"""The one error tree of collector.

Every error a user can meet derives from :class:`CollectorError`; its ``str()`` is the message
shown after ``Error:`` and its ``exit_code`` is what the command line exits with. Any other
exception escaping to the CLI is a bug and keeps its traceback.

::

    CollectorError                   base (exit 1)
    ├── RecipeError                  recipe.toml has problems (exit 2); .problems lists them all
    ├── CollectionError              folder missing, not a collection, not empty, locked (exit 2)
    ├── LedgerError                  the SQLite ledger could not be read or written
    │   └── LedgerUnusable           empty, missing, schema-less, foreign or store-less (exit 2)
    ├── StoreError                   a file could not be stored (disk full: .errno == ENOSPC)
    │   └── PathRefused              a link (or a stranger) where collector keeps its own file
    │                                or folder; also a CollectionError (exit 2)
    ├── SourceError                  a source could not be read (bad JSON, empty selector)
    ├── SourceKindError              a source kind is unknown, clashes, or its package is broken
    ├── ImageRejected                an image failed the ingest checks (.reason: ledger reason)
    ├── InternalError                a bug in collector stopped a run (.where, traceback logged)
    ├── ClusterError                 a Dask cluster cannot be used (not installed, unreachable,
    │                                no workers, other versions) (exit 2)
    └── FetchError                   a request failed; .url is already redacted
        ├── UnsafeURL                not http/https, or an address the recipe does not allow
        ├── RobotsDenied             refused by robots.txt (.rule names the matching rule)
        ├── HostParked               the host asked us to wait too long, or keeps failing
        ├── TooLarge                 Content-Length or decoded bytes over the cap
        └── DownloadTimeout          the overall download deadline passed
"""

from __future__ import annotations

from dataclasses import dataclass


class CollectorError(Exception):
    """Base of every error a user can act on."""

    exit_code: int = 1


@dataclass(frozen=True)
class RecipeProblem:
    """One problem in a recipe: which file, which key path, what is expected."""

    file: str
    key_path: str
    message: str

    def __str__(self) -> str:
        where = f"{self.file}: {self.key_path}" if self.key_path else self.file
        return f"{where}: {self.message}"


class RecipeError(CollectorError):
    """The recipe has one or more problems; all of them are listed at once."""

    exit_code = 2
    what = "the recipe"  # a file of the same kind (the datasheet's answers) says its own name

    def __init__(self, problems: list[RecipeProblem]) -> None:
        self.problems = list(problems)
        count = len(self.problems)
        head = f"{self.what} has {count} problem{'s' if count != 1 else ''}:"
        super().__init__("\n".join([head, *(f"  - {p}" for p in self.problems)]))


class CollectionError(CollectorError):
    """The collection folder is missing, is not a collection, is not empty, or is locked."""

    exit_code = 2


class LedgerError(CollectorError):
    """The SQLite ledger could not be read or written."""


class LedgerUnusable(LedgerError):
    """The ledger cannot be trusted to describe the store beside it (empty, no schema, not
    SQLite, another collection's, or the store is gone). Nothing was changed; the message
    names the ways out (restore a backup, rebuild from the store)."""

    exit_code = 2


class StoreError(CollectorError):
    """A file could not be written to the store; ``errno`` is kept (ENOSPC = disk full)."""

    def __init__(self, message: str, errno: int | None = None) -> None:
        super().__init__(message)
        self.errno = errno


class PathRefused(CollectionError, StoreError):
    """A symbolic link (or a folder where a file belongs, or the reverse) sits where collector
    keeps its own file or folder inside a collection: nothing is written through it. Exit 2
    like every CollectionError; also a StoreError, so a run that meets one stops."""

    def __init__(self, message: str) -> None:
        super().__init__(message)


class SourceError(CollectorError):
    """A source could not be read: the answer was malformed or the recipe does not fit it."""

    def __init__(self, source: str, url: str | None, reason: str) -> None:
        self.source, self.url, self.reason = source, url, reason
        where = f" at {url}" if url else ""
        super().__init__(f"source {source!r}{where}: {reason}")


class SourceKindError(CollectorError):
    """A source kind cannot be used: unknown, defined twice, or its package fails to load."""

    exit_code = 2


class ImageRejected(CollectorError):
    """An image failed the ingest checks; ``reason`` is the ledger reason (e.g. broken_image)."""

    def __init__(self, reason: str, detail: str) -> None:
        self.reason, self.detail = reason, detail
        super().__init__(f"{reason}: {detail}")


class InternalError(CollectorError):
    """A bug in collector (not the archive's fault) stopped a run; ``where`` names the
    thread or step, and the traceback is in the collection's error log."""

    def __init__(self, where: str, exc: BaseException, log_path: str) -> None:
        self.where, self.log_path = where, log_path
        super().__init__(f"internal error in {where} ({type(exc).__name__}: {exc}); the "
                         f"traceback is in {log_path} - please report it. Nothing stored is "
                         "lost: run gather again to resume")


class ClusterError(CollectorError):
    """A run on a Dask cluster cannot start: the extra is not installed, the scheduler cannot
    be reached, no worker joined, or the workers run other versions."""

    exit_code = 2


class FetchError(CollectorError):
    """A request failed. ``url`` is already redacted; ``reason`` is the ledger reason."""

    def __init__(self, url: str, reason: str, status: int | None = None, detail: str = "") -> None:
        self.url, self.reason, self.status, self.detail = url, reason, status, detail
        text = f"{reason} for {url}"
        if status is not None:
            text += f" (HTTP {status})"
        if detail:
            text += f": {detail}"
        super().__init__(text)

    def item_detail(self) -> str:
        """What the ledger's item detail says: what went wrong, then the URL; the reason
        code stands beside it in its own column, so it is not repeated here."""
        said = [f"HTTP {self.status}"] if self.status is not None else []
        said += [self.detail] if self.detail else []
        return f"{'; '.join(said) or self.reason.replace('_', ' ')}: {self.url}"


class UnsafeURL(FetchError):
    """The URL is not http/https, or resolves to an address the recipe does not allow."""


class RobotsDenied(FetchError):
    """robots.txt refuses this URL; ``rule`` is the matching rule or "unreachable"."""

    def __init__(self, url: str, rule: str, reason: str = "robots_disallowed") -> None:
        self.rule = rule
        super().__init__(url, reason, detail=f"robots.txt rule {rule!r}")

    def item_detail(self) -> str:
        if self.rule == "unreachable":
            return ("the host's robots.txt could not be read, so nothing is fetched there "
                    f"until it can be (the next run asks again): {self.url}")
        return f"robots.txt disallows it ({self.rule}): {self.url}"


class HostParked(FetchError):
    """The host asked us to wait longer than the cap, or keeps failing; ``until``: epoch s."""

    def __init__(self, url: str, host: str, until: float, why: str) -> None:
        self.host, self.until = host, until
        super().__init__(url, "host_parked", detail=f"{host} parked: {why}")


class TooLarge(FetchError):
    """The body is larger than the configured cap (``limit`` bytes)."""

    def __init__(self, url: str, limit: int, size: str = "") -> None:
        self.limit, self.size_text = limit, size  # size: what was seen, e.g. "Content-Length 5"
        super().__init__(url, "too_large", detail=(f"{size}, " if size else "")
                         + f"over the {limit:,}-byte cap")


class DownloadTimeout(FetchError):
    """The overall download deadline passed before the body was complete."""

    def __init__(self, url: str, deadline: float) -> None:
        self.deadline = deadline
        super().__init__(url, "timeout", detail=f"not complete within {deadline:g} s")
