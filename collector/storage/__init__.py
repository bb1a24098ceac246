"""The collection folder: the content-addressed store, the SQLite ledger, recovery and repair.

sqlite-utils imports pandas and numpy when they are installed, only to map their value types
to column types when it creates a table from Python values (sqlite_utils/db.py, "If pandas is
available, add more types" and the numpy block after it). collector never hands it pandas or
numpy values (its tables are created from plain Python types in ``migrations.py``), and those
two imports cost about half a second on every command in a development environment (the test
extra brings pandas in with mlcroissant) and 0.1 s where only numpy is installed. So
sqlite-utils is imported here, before any module of this package, with both hidden (a ``None``
entry in ``sys.modules`` makes ``import pandas`` raise ImportError; Python language reference,
"The module cache"); the entries are removed straight after, so anyone else can still import
them, and numpy is loaded later only by the commands that compute with it.
"""

from __future__ import annotations

import sys

_HIDDEN = ("pandas", "numpy")


def _import_sqlite_utils_alone() -> None:
    if "sqlite_utils" in sys.modules:
        return
    hidden = [name for name in _HIDDEN if name not in sys.modules]
    for name in hidden:
        sys.modules[name] = None  # type: ignore[assignment]
    try:
        import sqlite_utils  # noqa: F401
    finally:
        for name in hidden:
            del sys.modules[name]


_import_sqlite_utils_alone()
