"""How ledger rows are written and read: JSON for the structured columns, the time format.

Kept apart from collector.storage.ledger (which imports and re-exports these) so that the
ledger module stays about its connection, its writes and its locking.
"""

from __future__ import annotations

import json
import math
import time
from contextlib import suppress
from datetime import UTC, datetime
from typing import Any

JSON_COLUMNS = {"options", "config", "metadata", "crop_box", "exif", "rights", "flags",
                "effective_budget", "size_request", "colours"}
_JSON = json.JSONEncoder(sort_keys=True, default=str)  # json.dumps's, made once (not per call)


_SECOND: tuple[float, str] = (-1.0, "")  # the second iso_time wrote last, and its text


def iso_time(epoch: float) -> str:
    """``epoch`` in the ledger's time format: what ``datetime.fromtimestamp(epoch, UTC)
    .isoformat(timespec="milliseconds")`` gives, with Z for +00:00 (its microseconds rounded
    half to even, then cut to milliseconds); the date and time of a second are formatted
    once, not twice a request."""
    global _SECOND
    if not 0 <= epoch < 253402300800:  # before 1970 or after 9999: the general way
        return (datetime.fromtimestamp(epoch, UTC).isoformat(timespec="milliseconds")
                .replace("+00:00", "Z"))
    fraction, whole = math.modf(epoch)
    micro = round(fraction * 1e6)
    if micro >= 1_000_000:
        whole, micro = whole + 1, micro - 1_000_000
    second, text = _SECOND
    if second != whole:
        text = time.strftime("%Y-%m-%dT%H:%M:%S", time.gmtime(whole))
        _SECOND = (whole, text)
    return f"{text}.{micro // 1000:03d}Z"


def epoch_of(text: str | None) -> float | None:
    """A time of the ledger (:func:`iso_time`'s format, or any ISO 8601 time with an offset)
    as epoch seconds; None when there is none or it cannot be read."""
    if not text:
        return None
    try:
        return datetime.fromisoformat(text.replace("Z", "+00:00")).timestamp()
    except ValueError:
        return None


def utc_now() -> str:
    """The current time as an ISO 8601 UTC string with milliseconds (the ledger's time format)."""
    return iso_time(time.time())


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
