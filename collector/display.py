"""Showing a run as it goes: a live table on a terminal, plain lines in a log, or JSON lines.

Only this module and ``cli.py`` import rich. The run reports events through
:class:`collector.run.record.Progress`; the live view also polls the gatherer for per-host numbers.
"""

from __future__ import annotations

import json
import sys
import threading
import time
from collections import Counter
from datetime import datetime
from typing import Any, TextIO

from rich.console import Console
from rich.live import Live
from rich.table import Table
from rich.text import Text

from collector.exports.summary import human_seconds
from collector.safe_text import one_line


class PlainProgress:
    """One line per event, for logs and pipes."""

    def __init__(self, stream: TextIO | None = None, *, quiet: bool = False) -> None:
        self.stream = stream or sys.stdout
        self.quiet = quiet
        self.counts: Counter[str] = Counter()
        self._lock = threading.Lock()

    def event(self, kind: str, **data: Any) -> None:
        """Print the event as one line (only stops and notes when quiet)."""
        with self._lock:
            if kind == "item":
                self.counts[data["state"]] += 1
            if self.quiet and kind not in ("stopping", "note"):
                return
            stamp = datetime.now().strftime("%H:%M:%S")
            if kind == "item":
                reason = f" ({data['reason']})" if data.get("reason") else ""
                text = f"item {data['item_id']}: {data['state']}{reason}"
            elif kind == "note":
                text = f"note from {data['source']}: {data['note']}: {data['message']}"
            elif kind == "stopping":
                text = f"stopping: {data['why']}; finishing the files in flight"
            else:
                text = f"{kind} " + " ".join(f"{k}={v}" for k, v in data.items())
            print(f"[{stamp}] {one_line(text)}", file=self.stream, flush=True)


class JsonProgress:
    """One JSON object per line, for machines (``--log-json``)."""

    def __init__(self, stream: TextIO | None = None) -> None:
        self.stream = stream or sys.stdout
        self._lock = threading.Lock()

    def event(self, kind: str, **data: Any) -> None:
        """Write the event as a JSON line."""
        with self._lock:
            line = json.dumps({"time": time.time(), "event": kind, **data}, default=str)
            print(line, file=self.stream, flush=True)


class LiveProgress:
    """A rich live table: per host done/queued, failed requests, next request; overall counts."""

    def __init__(self, console: Console | None = None) -> None:
        self.console = console or Console()
        self.counts: Counter[str] = Counter()
        self.notes: list[str] = []
        self.gatherer: Any = None
        self.started = time.monotonic()
        self._live: Live | None = None

    def attach(self, gatherer: Any) -> None:
        """Give the view the gatherer to poll for per-host numbers."""
        self.gatherer = gatherer

    def __enter__(self) -> LiveProgress:
        self._live = Live(get_renderable=self.render, console=self.console,
                          refresh_per_second=4, transient=False)
        self._live.__enter__()
        return self

    def __exit__(self, *exc: object) -> None:
        if self._live is not None:
            self._live.__exit__(None, None, None)

    def event(self, kind: str, **data: Any) -> None:
        """Count items and keep the last notes."""
        if kind == "item":
            self.counts[data["state"]] += 1
        elif kind == "note":
            self.notes = [*self.notes[-3:], one_line(f"{data['source']}: {data['message']}")]
        elif kind == "stopping":
            self.notes = [*self.notes[-3:], one_line(f"stopping: {data['why']}")]

    def render(self) -> Table:
        """The current table: one row per host, notes as the caption."""
        elapsed = time.monotonic() - self.started
        table = Table(expand=False)
        for col in ("host", "done", "queued", "failed", "rate / budget", "next request"):
            table.add_column(col)
        eta = 0.0
        g = self.gatherer
        if g is not None:
            budgets = getattr(g.fetcher, "budgets", None)
            for host, st in sorted(g.hosts.items()):
                rate = f"{st.done / elapsed * 60:.1f}/min" if elapsed > 0 else "-"
                budget, wait = "-", "-"
                if budgets is not None:
                    try:
                        interval = max(budgets.interval(host), 1e-9)
                        budget = f"{60 / interval:.1f}/min"
                        wait = "parked" if st.parked else human_seconds(budgets.wait_time(host))
                        eta = max(eta, st.queued * interval)
                    except Exception:  # the view must never break a run
                        pass
                table.add_row(Text(host), str(st.done), str(st.queued), str(st.errors),
                              f"{rate} / {budget}", wait)
        counts = ", ".join(f"{k} {v}" for k, v in sorted(self.counts.items())) or "starting"
        table.title = (f"collector gather - {human_seconds(elapsed)} - {counts} - "
                       f"queued images need about {human_seconds(eta)} more at these budgets")
        if self.notes:  # Text, not a markup string: "[red]" from a server stays literal
            table.caption = Text("\n".join(self.notes))
        return table
