"""Test support: one loopback server (``demo_site.loopback``), one fake fetcher, ledger probes."""
