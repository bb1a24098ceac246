"""collector: a polite, rate-limited image collection client with a provenance ledger."""

__version__ = "0.1.0"
