"""The provenance ledger: one SQLite file per collection, written through sqlite-utils.

The ledger is the memory of a collection: every run, source, candidate item, HTTP request, stored
file and host policy is a row. It is opened in WAL mode so that ``collector status`` and
``collector trace`` can read while ``gather`` writes. Schema changes are numbered migrations
(collector.storage.migrations), applied here; ``schema_version`` records which ones were applied.

Only :meth:`Ledger.create` (``collector init``, ``collector rebuild-ledger``) writes a schema
into a file. :meth:`Ledger.open` refuses a file without one (0 bytes, no ``schema_version``
table, not SQLite) with :class:`~collector.errors.LedgerUnusable`: a lost ledger silently
re-created beside a full store would make every stored file look like crash debris.

All methods are thread-safe (one connection, one lock): the gather's threads share it.
"""

from __future__ import annotations

import logging
import sqlite3
import threading
import uuid
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import Any

import sqlite_utils

from collector.errors import LedgerError, LedgerUnusable
from collector.storage import fetch_batch
from collector.storage.migrations import MIGRATIONS
from collector.storage.row_codec import decode_row, encode_row, utc_now
from collector.storage.safe_paths import refuse_ledger_links

SCHEMA_VERSION = max(MIGRATIONS)  # the newest migration; a file records what it has
_SET_FACT = ("INSERT INTO ledger_facts (name, value) VALUES (?, ?) "
             "ON CONFLICT(name) DO UPDATE SET value = excluded.value")


def ways_out(folder: Path) -> str:
    """The two commands that mend an unusable ledger of the collection at ``folder``."""
    return (f"Nothing was changed. Restore the newest ledger backup with 'collector "
            f"restore-ledger {folder}', or register the stored files again (provenance "
            f"unknown) with 'collector rebuild-ledger {folder}'; both set the current "
            "ledger file aside instead of deleting it.")


class Ledger:
    """One collection's ledger file. Create with :meth:`create`, open with :meth:`open`."""

    def __init__(self, path: Path, conn: sqlite3.Connection) -> None:
        self.path = path
        self._conn = conn
        self.db = sqlite_utils.Database(conn)
        self._lock = threading.RLock()
        self._column_cache: dict[str, frozenset[str]] = {}
        self._depth = 0  # transaction() nesting: only the outermost block commits
        self._batch = fetch_batch.FetchBatch(self._batch_due)  # fetches rows not yet committed
        self._closed = False
        self._lost_until: str | None = None  # see last_contact

    # -- opening -----------------------------------------------------------------------------
    @classmethod
    def create(cls, path: Path, *, collection_id: str | None = None) -> Ledger:
        """Create a new ledger file at ``path`` with the current schema (the only way a
        schema is written into a file); ``collection_id`` keeps a folder's identity."""
        if path.exists():
            raise LedgerError(f"{path} already exists; open it instead of creating it")
        ledger = cls._connect(path, create=True)
        ledger.set_fact("collection_id", collection_id or str(uuid.uuid4()))
        return ledger

    @classmethod
    def open(cls, path: Path, *, readonly: bool = False) -> Ledger:
        """Open an existing ledger, applying any pending migrations (unless read-only).
        A file that is empty, is not SQLite or has no ``schema_version`` table is refused
        with LedgerUnusable (exit 2): it is never given a fresh schema here."""
        if not path.is_file():
            raise LedgerError(
                f"no ledger at {path}; is this a collection folder? Create one with "
                "'collector init DIR'")
        if path.stat().st_size == 0:
            raise LedgerUnusable(f"the ledger {path} is empty (0 bytes): the record of "
                                 f"where the stored files came from is lost. "
                                 + ways_out(path.parent))
        return cls._connect(path, readonly=readonly)

    @classmethod
    def _connect(cls, path: Path, *, readonly: bool = False, create: bool = False) -> Ledger:
        refuse_ledger_links(path)  # SQLite follows links (also its -wal/-shm): refused
        try:
            if readonly:
                conn = sqlite3.connect(f"file:{path}?mode=ro", uri=True,
                                       check_same_thread=False, timeout=30)
            else:
                conn = sqlite3.connect(path, check_same_thread=False, timeout=30)
            if not create:
                # Before any PRAGMA that writes: a file without our schema stays untouched.
                tables = {r[0] for r in conn.execute(
                    "SELECT name FROM sqlite_master WHERE type = 'table'")}
                if "schema_version" not in tables:
                    conn.close()
                    raise LedgerUnusable(
                        f"the ledger {path} holds no collector schema (no schema_version "
                        f"table{'; it is empty' if not tables else ''}): it is not this "
                        "collection's ledger or it was re-created. " + ways_out(path.parent))
            if not readonly:
                conn.execute("PRAGMA journal_mode=WAL")
                # NORMAL in WAL mode: every commit survives a killed process; after a power
                # loss the last commits may be lost but the file stays consistent, and
                # collection.recover() removes store files named by a store intent.
                conn.execute("PRAGMA synchronous=NORMAL")
            conn.execute("PRAGMA foreign_keys=ON")
            ledger = cls(path, conn)
            if not create and ledger.schema_version() == 0:
                conn.close()
                raise LedgerUnusable(f"the ledger {path} has an empty schema_version table: "
                                     "no schema was ever completed in it. "
                                     + ways_out(path.parent))
            if not readonly:
                ledger.migrate()
                ledger._lost_until = fetch_batch.lost_until(ledger.fact(fetch_batch.BATCH_FACT))
            return ledger
        except sqlite3.DatabaseError as exc:
            if "not a database" in str(exc) or "malformed" in str(exc):
                raise LedgerUnusable(f"cannot open the ledger {path}: it is not a readable "
                                     f"SQLite file ({exc}). " + ways_out(path.parent)) from exc
            raise LedgerError(f"cannot open the ledger {path}: {exc}") from exc

    def close(self) -> None:
        """Commit the request rows in memory and close (SQLite checkpoints the WAL)."""
        with self._lock:
            if self._closed:
                return
            try:
                with self._translate("write the last request rows"):
                    self._flush_fetches()
                    if self._batch.marked:  # every row is in: the next run need not wait
                        with self._conn:
                            self._conn.execute("DELETE FROM ledger_facts WHERE name = ?",
                                               (fetch_batch.BATCH_FACT,))
            finally:
                self._closed = True
                self._batch.stop()
                self._conn.close()

    def __enter__(self) -> Ledger:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    # -- schema ------------------------------------------------------------------------------
    def schema_version(self) -> int:
        """The highest migration applied (0 for an empty file)."""
        if "schema_version" not in self.db.table_names():
            return 0
        return int(self.scalar("SELECT max(version) FROM schema_version") or 0)

    def migrate(self) -> int:
        """Apply every migration newer than the file's version; returns the new version."""
        with self._lock, self._translate("migrate"):
            current = self.schema_version()
            if current > SCHEMA_VERSION:
                raise LedgerError(
                    f"{self.path} has schema version {current}, newer than this collector "
                    f"understands ({SCHEMA_VERSION}); upgrade collector")
            for version in range(current + 1, SCHEMA_VERSION + 1):
                with self._conn:
                    if "schema_version" not in self.db.table_names():
                        self.db.table("schema_version").create(
                            {"version": int, "applied_at": str}, pk="version")
                    MIGRATIONS[version](self.db)
                    self.db.table("schema_version").insert(
                        {"version": version, "applied_at": utc_now()})
            return SCHEMA_VERSION

    @contextmanager
    def _translate(self, what: str) -> Iterator[None]:
        """Translate sqlite3 errors into LedgerError once, at this edge."""
        try:
            yield
        except sqlite3.Error as exc:
            raise LedgerError(f"ledger {self.path}: {what} failed: {exc}") from exc

    @contextmanager
    def transaction(self) -> Iterator[Callable[[], bool]]:
        """Group several writes into one atomic transaction (nested blocks join the
        outermost one: only it commits, or rolls everything back). Yields whether it is still
        open: SQLite ends one by itself after a few errors (a full disk, an I/O error)."""
        with self._lock, self._translate("transaction"), self._write():
            yield lambda: self._conn.in_transaction

    @contextmanager
    def _write(self) -> Iterator[None]:
        # sqlite3's "with conn" commits at the end of every block, so a write helper called
        # inside transaction() would commit half of it; only the outermost block commits.
        with self._lock:
            if self._depth:
                self._depth += 1
                try:
                    yield
                finally:
                    self._depth -= 1
                return
            self._flush_fetches()  # on their own: a failing block rolls back only itself
            self._depth = 1
            try:
                with self._conn:
                    yield
            finally:
                self._depth = 0

    # -- generic helpers ---------------------------------------------------------------------
    def query(self, sql: str, params: tuple[Any, ...] | dict[str, Any] = ()) -> list[dict]:
        """Run a read query and return rows as dicts."""
        with self._lock, self._translate("query"):
            self._flush_fetches()  # a question of this process sees every row it made
            cur = self._conn.execute(sql, params)
            names = [d[0] for d in cur.description or ()]
            return [dict(zip(names, row, strict=True)) for row in cur.fetchall()]

    def scalar(self, sql: str, params: tuple[Any, ...] | dict[str, Any] = ()) -> Any:
        """Run a query that returns one value."""
        with self._lock, self._translate("query"):
            self._flush_fetches()
            rows = self._conn.execute(sql, params).fetchall()  # all: leave no statement open
            return rows[0][0] if rows else None

    # -- reads for collector.storage.queries ---------------------------------------------------
    def rows(self, sql: str, params: tuple[Any, ...] | dict[str, Any] = ()
             ) -> list[tuple[Any, ...]]:
        """Run a read query and return plain tuples (cheaper than a dict per row)."""
        with self._lock, self._translate("query"):
            self._flush_fetches()
            return self._conn.execute(sql, params).fetchall()

    def stream(self, sql: str, params: tuple[Any, ...] | dict[str, Any] = (), *,
               batch: int = 1000) -> Iterator[tuple[Any, ...]]:
        """Run a read query and yield its rows a batch at a time (memory stays flat); an
        error while reading is translated like every other."""
        with self._translate("query"):
            with self._lock:
                self._flush_fetches()
                cur = self._conn.execute(sql, params)
            try:
                while True:
                    with self._lock:
                        chunk = cur.fetchmany(batch)
                    if not chunk:
                        return
                    yield from chunk
            finally:
                cur.close()

    def sql_function(self, name: str, func: Callable[[Any], Any]) -> None:
        """Make a deterministic one-argument Python function callable from SQL as ``name``."""
        with self._lock, self._translate(f"register {name}()"):
            self._conn.create_function(name, 1, func, deterministic=True)

    # -- crash recovery and repair (collector.storage.collection, ledger_repair) ---------------
    def forget_missing_file(self, sha256: str) -> int:
        """A stored file is gone: its items go back to pending and its files row is removed.
        Returns how many items were reset (call inside :meth:`transaction`)."""
        with self._lock, self._translate("forget a missing file"), self._write():
            reset = self._conn.execute(
                "UPDATE items SET state = 'pending', reason = NULL, file_sha256 = NULL "
                "WHERE file_sha256 = ?", (sha256,)).rowcount
            self._conn.execute("DELETE FROM files WHERE sha256 = ?", (sha256,))
            return int(reset)

    def drop_all_store_intents(self) -> None:
        """Every store change an intent names has been settled by crash recovery."""
        with self._lock, self._translate("write to store_intents"), self._write():
            self._conn.execute("DELETE FROM store_intents")

    @staticmethod
    def copy_file(source: Path, target: Path) -> None:
        """Copy the ledger file ``source`` (opened read-only) into a new file ``target`` with
        SQLite's online backup API. A source that is not a readable SQLite file raises
        LedgerUnusable."""
        try:
            src = sqlite3.connect(f"file:{source}?mode=ro", uri=True)
            try:
                dest = sqlite3.connect(target)
                try:
                    src.backup(dest)
                finally:
                    dest.close()
            finally:
                src.close()
        except sqlite3.DatabaseError as exc:
            raise LedgerUnusable(f"{source} cannot be read as a ledger ({exc})") from exc

    def columns(self, table: str) -> frozenset[str]:
        """The column names of ``table`` (a read of an older schema asks first)."""
        return self._columns(table)

    def has_table(self, table: str) -> bool:
        """Whether the ledger has ``table`` (absent before its migration ran)."""
        return table in self._tables()

    def _columns(self, table: str) -> frozenset[str]:
        cols = self._column_cache.get(table)  # a dict read needs no lock
        if cols is None:  # a PRAGMA read under the lock: one racing a write of the table
            with self._lock:  # fails with "database table is locked" (shared connection)
                cols = frozenset(c.name for c in self.db[table].columns)
                self._column_cache[table] = cols
        return cols

    def _checked(self, table: str, row: dict[str, Any]) -> dict[str, Any]:
        unknown = row.keys() - self._columns(table)
        if unknown:
            raise LedgerError(f"ledger table {table} has no column(s) {sorted(unknown)}")
        return encode_row(row)

    # Hot paths use plain SQL: sqlite-utils inspects the table on every call, which cost
    # ~25 statements per stored file in the ingest benchmark.
    def _insert(self, table: str, row: dict[str, Any], *, ignore: bool = False,
                replace: bool = False) -> int:
        data = self._checked(table, row)
        names, marks = ", ".join(data), ", ".join("?" for _ in data)
        verb = "INSERT OR IGNORE" if ignore else "INSERT OR REPLACE" if replace else "INSERT"
        with self._lock, self._translate(f"write to {table}"), self._write():
            cur = self._conn.execute(f"{verb} INTO {table} ({names}) VALUES ({marks})",
                                     list(data.values()))
            return int(cur.lastrowid or 0)

    def _update(self, table: str, pk: Any, fields: dict[str, Any]) -> None:
        data = self._checked(table, fields)
        if not data:
            return
        sets = ", ".join(f"{name} = ?" for name in data)
        key = "sha256" if table == "files" else "host" if table == "hosts" else "id"
        with self._lock, self._translate(f"update {table}"), self._write():
            self._conn.execute(f"UPDATE {table} SET {sets} WHERE {key} = ?",
                               [*data.values(), pk])

    # -- runs --------------------------------------------------------------------------------
    def start_run(self, recipe_sha256: str, options: dict[str, Any], tool_version: str) -> int:
        """Record the start of a run and return its id."""
        return self._insert("runs", {"started_at": utc_now(), "recipe_sha256": recipe_sha256,
                                     "options": options, "tool_version": tool_version,
                                     "outcome": "running"})

    def end_run(self, run_id: int, outcome: str) -> None:
        """Record how a run ended (finished, stopped, interrupted, failed: ...)."""
        self._update("runs", run_id, {"ended_at": utc_now(), "outcome": outcome})

    # -- sources -----------------------------------------------------------------------------
    def source_id(self, name: str, kind: str, config: dict[str, Any],
                  former_names: tuple[str, ...] = ()) -> int:
        """The id of the named source, created or updated with its current config. A source
        renamed in the recipe (``former_names``) keeps its row, so its items stay its own."""
        with self._lock, self._translate("write to sources"), self._conn:
            rows = self.db.execute("SELECT id FROM sources WHERE name = ?", [name]).fetchall()
            for former in former_names:
                if rows:
                    break
                rows = self.db.execute("SELECT id FROM sources WHERE name = ?",
                                       [former]).fetchall()
            row = rows[0] if rows else None
            encoded = encode_row({"name": name, "kind": kind, "config": config})
            if row:
                self.db.table("sources").update(row[0], encoded)
                return int(row[0])
            return int(self.db.table("sources").insert(encoded).last_pk or 0)

    # -- items -------------------------------------------------------------------------------
    def item(self, item_id: int) -> dict[str, Any] | None:
        """One item row, JSON decoded."""
        rows = self.query("SELECT * FROM items WHERE id = ?", (item_id,))
        return decode_row(rows[0]) if rows else None

    def item_by_key(self, source_id: int, source_key: str) -> dict[str, Any] | None:
        """The item a source already listed under ``source_key``, or None."""
        rows = self.query("SELECT * FROM items WHERE source_id = ? AND source_key = ?",
                          (source_id, source_key))
        return decode_row(rows[0]) if rows else None

    def add_item(self, source_id: int, source_key: str, fields: dict[str, Any]) -> int:
        """Insert a new candidate item (state ``pending`` unless given) and return its id."""
        now = utc_now()
        row = {"source_id": source_id, "source_key": source_key, "state": "pending",
               "created_at": now, "updated_at": now, **fields}
        return self._insert("items", row)

    def update_item(self, item_id: int, **fields: Any) -> None:
        """Change an item's columns (state, reason, file_sha256, ...)."""
        self._update("items", item_id, {**fields, "updated_at": utc_now()})

    # -- fetches -----------------------------------------------------------------------------
    def record_fetch(self, **fields: Any) -> None:
        """Record one HTTP request attempt (``url`` already redacted); committed in batches,
        see collector.storage.fetch_batch."""
        data = self._checked("fetches", fields)
        with self._lock, self._translate("write to fetches"):
            if self._depth:  # inside transaction(): that block commits it
                self._insert_fetches([data])
                return
            now = fetch_batch.now()
            keep = self._batch.keeps(now)
            self._batch.rows.append(data)  # kept there until a commit takes it
            if keep:
                return
            with self._conn:  # this row opens a batch: committed at once, the waiting ones too
                self._insert_fetches(self._batch.rows)
                self._conn.execute(_SET_FACT, (fetch_batch.BATCH_FACT, utc_now()))
            self._batch.rows = []
            self._batch.opened(now)

    def _insert_fetches(self, rows: list[dict[str, Any]]) -> None:
        for data in rows:
            self._conn.execute(f"INSERT INTO fetches ({', '.join(data)}) VALUES "
                               f"({', '.join('?' * len(data))})", list(data.values()))

    def _flush_fetches(self) -> None:
        """Commit the fetches rows waiting in memory (the caller holds the lock)."""
        if self._batch.rows:
            with self._conn:
                self._insert_fetches(self._batch.rows)
            self._batch.rows = []

    def _batch_due(self) -> None:
        """The end of a batch (its thread): commit the rows in memory (an error is reported
        by the next write, read or close, which try again)."""
        with self._lock:
            if self._closed:
                return
            try:
                self._flush_fetches()
            except sqlite3.Error as exc:
                logging.getLogger(__name__).warning("ledger %s: request rows not written yet: "
                                                    "%s", self.path, exc)
            self._batch.ended(fetch_batch.now())

    # -- files -------------------------------------------------------------------------------
    def file(self, sha256: str) -> dict[str, Any] | None:
        """The stored file with this sha256, JSON decoded, or None."""
        rows = self.query("SELECT * FROM files WHERE sha256 = ?", (sha256,))
        return decode_row(rows[0]) if rows else None

    def add_file(self, row: dict[str, Any]) -> None:
        """Record a stored file (ignored if the sha256 is already known)."""
        self._insert("files", {"stored_at": utc_now(), **row}, ignore=True)

    def update_file(self, sha256: str, fields: dict[str, Any]) -> None:
        """Change a stored file's columns (a recovered file attached to its item)."""
        self._update("files", sha256, fields)

    def known_sha256s(self) -> set[str]:
        """Every sha256 the ledger has a files row for whose bytes should be in the store
        (a file withdrawn with its bytes deleted on purpose is not expected there)."""
        if "removed_at" not in self._columns("files"):  # before migration 4 (read-only)
            return {r["sha256"] for r in self.query("SELECT sha256 FROM files")}
        return {r["sha256"] for r in self.query(
            "SELECT sha256 FROM files WHERE removed_at IS NULL")}

    # -- upkeep: withdrawals, recipe texts, re-check observations (schema 7) -----------------
    def add_row(self, table: str, row: dict[str, Any]) -> int:
        """Append a row to withdrawals, observations, rule_changes or recipes (a known recipe
        is kept), or keep a page (kept_pages: a page kept before under the URL is replaced)."""
        if table not in ("withdrawals", "observations", "recipes", "kept_pages", "rule_changes"):
            raise LedgerError(f"add_row does not write to {table}")
        return self._insert(table, row, ignore=table == "recipes",
                            replace=table == "kept_pages")

    def undo_withdrawal(self, withdrawal_id: int, fields: dict[str, Any]) -> None:
        """Record that a withdrawal was undone (``undone_at``, ``undone_by``, ``undo_note``)."""
        self._update("withdrawals", withdrawal_id, fields)

    def mark_file_removed(self, sha256: str, when: str | None) -> None:
        """The stored bytes of ``sha256`` were deleted on purpose (``when``), or, with None,
        the row no longer claims that (call inside :meth:`transaction`)."""
        self._update("files", sha256, {"removed_at": when})

    # -- hosts -------------------------------------------------------------------------------
    def get_host(self, host: str) -> dict[str, Any] | None:
        """The persisted robots.txt and budget facts of a host, or None."""
        rows = self.query("SELECT * FROM hosts WHERE host = ?", (host,))
        return decode_row(rows[0]) if rows else None

    def last_contact(self, host: str) -> str | None:
        """When the latest request to ``host`` ended (ISO 8601 UTC), in any run, or None; or
        the end of the request rows a killed process may not have written, if later
        (collector.storage.fetch_batch: every host may have been contacted until then)."""
        last = self.scalar("SELECT max(ended_at) FROM fetches WHERE host = ?", (host,))
        return max(last or "", self._lost_until or "") or None

    def put_host(self, host: str, **fields: Any) -> None:
        """Insert or update a host's row."""
        data = self._checked("hosts", {"host": host, **fields})
        names = ", ".join(data)
        marks = ", ".join("?" for _ in data)
        sets = ", ".join(f"{n} = excluded.{n}" for n in data if n != "host") or "host = host"
        with self._lock, self._translate("write to hosts"), self._write():
            self._conn.execute(f"INSERT INTO hosts ({names}) VALUES ({marks}) "
                               f"ON CONFLICT(host) DO UPDATE SET {sets}", list(data.values()))

    # -- identity and store intents ------------------------------------------------------------
    def fact(self, name: str) -> str | None:
        """A value of ``ledger_facts`` (None when unset or in a version 1 ledger)."""
        if "ledger_facts" not in self._tables():
            return None
        return self.scalar("SELECT value FROM ledger_facts WHERE name = ?", (name,))

    def set_fact(self, name: str, value: str) -> None:
        """Set a value of ``ledger_facts``."""
        with self._lock, self._translate("write to ledger_facts"), self._write():
            self._conn.execute(_SET_FACT, (name, value))

    def collection_id(self) -> str | None:
        """The id of the collection this ledger belongs to (None: a version 1 ledger)."""
        return self.fact("collection_id")

    def add_store_intent(self, sha256: str, item_id: int | None) -> None:
        """Record, committed, that ``sha256`` is about to enter or leave the store."""
        with self._lock, self._translate("write to store_intents"), self._write():
            self._conn.execute("INSERT OR REPLACE INTO store_intents (sha256, item_id, "
                               "started_at) VALUES (?, ?, ?)", (sha256, item_id, utc_now()))

    def drop_store_intent(self, sha256: str) -> None:
        """The store change named by an intent is complete (or was undone)."""
        with self._lock, self._translate("write to store_intents"), self._write():
            self._conn.execute("DELETE FROM store_intents WHERE sha256 = ?", (sha256,))

    def store_intents(self) -> set[str]:
        """The sha256 of every store change that was started and not completed."""
        if "store_intents" not in self._tables():
            return set()
        return {r["sha256"] for r in self.query("SELECT sha256 FROM store_intents")}

    def _tables(self) -> set[str]:
        return {r["name"] for r in self.query(
            "SELECT name FROM sqlite_master WHERE type = 'table'")}

    # -- backups -----------------------------------------------------------------------------
    def backup_to(self, target: Path) -> None:
        """Copy the whole ledger into ``target`` with SQLite's online backup API (a
        consistent copy while others read; https://www.sqlite.org/backup.html)."""
        refuse_ledger_links(target)
        with self._lock, self._translate(f"backup to {target}"):
            self._flush_fetches()
            dest = sqlite3.connect(target)
            try:
                self._conn.backup(dest)
                # One self-contained file: no -wal beside a copy that may be moved around.
                dest.execute("PRAGMA journal_mode=DELETE")
            finally:
                dest.close()

    # -- notes -------------------------------------------------------------------------------
    def add_note(self, kind: str, message: str, *, url: str | None = None,
                 run_id: int | None = None, source_id: int | None = None) -> int:
        """Record a source-level problem (a selector that matched nothing, bad JSON, ...)."""
        return self._insert("notes", {"kind": kind, "message": message, "url": url,
                                      "run_id": run_id, "source_id": source_id,
                                      "created_at": utc_now()})

    def record_signal(self, **fields: Any) -> int:
        """Record one reservation signal seen (collector.run.reservations)."""
        return self._insert("reservation_signals", {"seen_at": utc_now(), **fields})

    # -- what the run asks and changes -------------------------------------------------------
    # The multi-row changes of collector.run (ingest and prepared_run; its questions are in
    # collector.storage.queries); the run itself holds no SQL.
    def pass_file_to(self, sha256: str, old_id: int, new_id: int) -> None:
        """``new_id`` becomes the item the file ``sha256`` belongs to, and the original of
        every item that named ``old_id`` as its original (a take-over by listing order)."""
        with self._lock, self._translate("update files and items"), self._write():
            self._conn.execute("UPDATE files SET first_item_id = ? WHERE sha256 = ?",
                               [new_id, sha256])
            self._conn.execute("UPDATE items SET duplicate_of = ? WHERE duplicate_of = ?",
                               [new_id, old_id])

    def forget_file(self, sha256: str) -> None:
        """Remove the files row of ``sha256`` and every item's link to it (a near copy the
        recipe drops); the caller removes the stored file under a store intent."""
        with self._lock, self._translate("update files and items"), self._write():
            self._conn.execute("UPDATE items SET file_sha256 = NULL WHERE file_sha256 = ?",
                               [sha256])
            self._conn.execute("DELETE FROM files WHERE sha256 = ?", [sha256])

    def set_listing_state(self, source_id: int, value: str, config_sha256: str,
                          run_id: int) -> None:
        """Keep what this run's complete listing of the source remembered."""
        with self._lock, self._translate("write to listing_states"), self._write():
            self._conn.execute(
                "INSERT INTO listing_states (source_id, value, config_sha256, run_id, saved_at) "
                "VALUES (?, ?, ?, ?, ?) ON CONFLICT(source_id) DO UPDATE SET "
                "value = excluded.value, config_sha256 = excluded.config_sha256, "
                "run_id = excluded.run_id, saved_at = excluded.saved_at",
                (source_id, value, config_sha256, run_id, utc_now()))

    def mark_killed_runs(self) -> None:
        """Runs still marked ``running`` end as ``killed: did not end cleanly`` (called with
        the gather lock held: no run of this folder is going on)."""
        with self._lock, self._translate("update runs"), self._write():
            self._conn.execute("UPDATE runs SET outcome = 'killed: did not end cleanly' "
                               "WHERE outcome = 'running'")
