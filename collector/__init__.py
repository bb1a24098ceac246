"""collector: a polite, rate-limited image collection client with a provenance ledger."""

__version__ = "0.1.0"
# The name to install it by ("collector" on the Python package index is another project).
DISTRIBUTION = "polite-image-collector"
