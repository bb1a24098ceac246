"""How ledger rows are written and read: JSON for the structured columns, the time format.

Kept apart from collector.storage.ledger (which imports and re-exports these) so that the
ledger module stays about its connection, its writes and its locking.
"""

from __future__ import annotations

import json
from contextlib import suppress
from datetime import UTC, datetime
from typing import Any

JSON_COLUMNS = {"options", "config", "metadata", "crop_box", "exif", "rights", "flags",
                "effective_budget", "size_request", "colours"}
_JSON = json.JSONEncoder(sort_keys=True, default=str)  # json.dumps's, made once (not per call)


def utc_now() -> str:
    """The current time as an ISO 8601 UTC string with milliseconds (the ledger's time format)."""
    return datetime.now(UTC).isoformat(timespec="milliseconds").replace("+00:00", "Z")


def encode_row(row: dict[str, Any]) -> dict[str, Any]:
    """JSON-encode the structured columns and booleans of a row before writing it."""
    out: dict[str, Any] = {}
    for key, value in row.items():
        if key in JSON_COLUMNS and value is not None and not isinstance(value, str):
            value = _JSON.encode(value)  # keeps no state between calls
        elif isinstance(value, bool):
            value = int(value)
        out[key] = value
    return out


def decode_row(row: dict[str, Any] | None) -> dict[str, Any] | None:
    """Decode the JSON columns of a row read from the ledger."""
    if row is None:
        return None
    out = dict(row)
    for key in JSON_COLUMNS & out.keys():
        if isinstance(out[key], str):
            with suppress(ValueError):
                out[key] = json.loads(out[key])
    return out
