"""Allow ``python -m collector``."""

from collector.cli import app

app(prog_name="collector")
