"""Progress of a crawl, refreshed from the frontier's counts.

On a terminal a live table (rich); otherwise (a log file, a pipe, a service manager) one
line every few seconds on stderr. The last frame or line shows the final counts, the
same numbers as the summary the crawl prints.
"""

from __future__ import annotations

import asyncio
import contextlib
import sys
import time
from typing import Any, TextIO

from rich.console import Console
from rich.live import Live
from rich.table import Table

from frontier.daemon import wait_or_timeout

REFRESH_S = 0.5  # the live table
LINE_EVERY_S = 5.0  # lines when the output is not a terminal
STATES = ("admitted", "queued", "leased", "fetched", "failed", "excluded", "dead")


def progress_line(job: str, data: dict[str, Any], rate: float, *, final: bool = False) -> str:
    """``sluice: progress: job demo: 420 admitted, 300 queued, ...; 23.1 pages/s``; the
    last one says ``done`` instead of ``progress``."""
    counts = ", ".join(f"{data.get(k, 0)} {k}" for k in STATES)
    head = "done" if final else "progress"
    return f"sluice: {head}: job {job}: {counts}; {rate:.1f} pages/s"


class Progress:
    """An async context manager showing counts and pages/s while a crawl runs.

    Call :meth:`final` with the summary before leaving the context: the last frame then
    shows exactly those numbers.
    """

    def __init__(self, daemon: Any, *, quiet: bool = False, every_s: float = LINE_EVERY_S,
                 stream: TextIO | None = None) -> None:
        self.daemon = daemon
        self.quiet = quiet
        self.every_s = every_s
        self.stream = stream if stream is not None else sys.stderr
        self.console = Console(file=self.stream)
        self._task: asyncio.Task[None] | None = None
        self._live: Live | None = None
        self._closing = asyncio.Event()  # ends the loop even if a cancellation is absorbed
        self._started = time.monotonic()
        self._fetched_at_start: int | None = None
        self._final: dict[str, Any] | None = None

    @property
    def job(self) -> str:
        return str(self.daemon.job.settings.name)

    def rate(self, data: dict[str, Any]) -> float:
        """Pages fetched by this run per second (pages of an earlier run do not count)."""
        fetched = int(data.get("fetched", 0))
        if self._fetched_at_start is None:
            self._fetched_at_start = fetched
        elapsed = data.get("elapsed_s") or (time.monotonic() - self._started)
        return max(0, fetched - self._fetched_at_start) / max(1e-6, float(elapsed))

    def start_from(self, data: dict[str, Any]) -> None:
        """The counts before this run fetched anything (a resumed job has earlier pages)."""
        self._fetched_at_start = int(data.get("fetched", 0))

    def _table(self, data: dict[str, Any]) -> Table:
        t = Table(title=f"sluice · job {self.job}", show_header=False)
        for key in STATES:
            t.add_row(key, str(data.get(key, 0)))
        t.add_row("pages/s", f"{self.rate(data):.1f}")
        return t

    def _line(self, data: dict[str, Any], *, final: bool = False) -> None:
        print(progress_line(self.job, data, self.rate(data), final=final), file=self.stream,
              flush=True)

    async def _table_loop(self, live: Live) -> None:
        while not self._closing.is_set():
            with contextlib.suppress(Exception):
                live.update(self._table(await self.daemon.stats_once()))
            await wait_or_timeout(self._closing, REFRESH_S)

    async def _line_loop(self) -> None:
        while not await wait_or_timeout(self._closing, self.every_s):
            with contextlib.suppress(Exception):
                data = await self.daemon.stats_once()
                if not self._closing.is_set():
                    self._line(data)

    def final(self, summary: dict[str, Any]) -> None:
        """The counts the crawl ended with: the last frame shows them."""
        self._final = summary

    async def __aenter__(self) -> Progress:
        if self.quiet:
            return self
        if self.console.is_terminal:
            self._live = Live(self._table({}), console=self.console, refresh_per_second=4)
            self._live.__enter__()
            self._task = asyncio.create_task(self._table_loop(self._live))
        else:
            self._task = asyncio.create_task(self._line_loop())
        return self

    async def __aexit__(self, *exc: object) -> None:
        if self._task is not None:
            self._closing.set()
            self._task.cancel()
            with contextlib.suppress(asyncio.CancelledError):
                await self._task
        if self._live is not None:
            if self._final is not None:
                self._live.update(self._table(self._final))
            self._live.__exit__(None, None, None)
        elif self._final is not None and not self.quiet:
            self._line(self._final, final=True)
