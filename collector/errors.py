"""Error tree (placeholder on the images branch; the lead's errors.py replaces it at merge).

CollectorError
└── ImageRejected(reason, detail)
"""

from __future__ import annotations


class CollectorError(Exception):
    """Base of every error collector raises on purpose."""

    exit_code: int = 1


class ImageRejected(CollectorError):
    """An image failed the ingest checks; reason is the ledger reason."""

    def __init__(self, reason: str, detail: str) -> None:
        super().__init__(f"image rejected ({reason}): {detail}")
        self.reason = reason
        self.detail = detail
