"""The collection folder: the content-addressed store, the SQLite ledger, recovery and repair."""
