"""Read-only probes of a ledger that a separate gather process is writing (test helpers)."""

from __future__ import annotations

import sqlite3
from pathlib import Path


def files_count(ledger_path: Path) -> int:
    """Rows in the files table, read as a bystander with plain sqlite3 (0 before it exists)."""
    conn = sqlite3.connect(ledger_path, timeout=30)
    try:
        return conn.execute("SELECT count(*) FROM files").fetchone()[0]
    except sqlite3.OperationalError:
        return 0
    finally:
        conn.close()
