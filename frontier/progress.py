"""Live progress of a crawl on the terminal (rich), refreshed from the frontier's counts."""

from __future__ import annotations

import asyncio
import contextlib
import time
from typing import Any

from rich.console import Console
from rich.live import Live
from rich.table import Table

from frontier.daemon import wait_or_timeout

REFRESH_S = 0.5


class Progress:
    """An async context manager showing counts and pages/s while a crawl runs."""

    def __init__(self, daemon: Any, *, quiet: bool = False) -> None:
        self.daemon = daemon
        self.quiet = quiet
        self.console = Console(stderr=True)
        self._task: asyncio.Task[None] | None = None
        self._closing = asyncio.Event()  # ends the loop even if a cancellation is absorbed
        self._started = time.monotonic()

    def _table(self, data: dict[str, Any]) -> Table:
        t = Table(title=f"sluice · job {self.daemon.job.settings.name}", show_header=False)
        elapsed = max(1e-6, time.monotonic() - self._started)
        for key in ("admitted", "queued", "leased", "fetched", "failed", "excluded", "dead"):
            t.add_row(key, str(data.get(key, 0)))
        t.add_row("pages/s", f"{data.get('fetched', 0) / elapsed:.1f}")
        return t

    async def _loop(self, live: Live) -> None:
        while not self._closing.is_set():
            with contextlib.suppress(Exception):
                live.update(self._table(await self.daemon.stats_once()))
            await wait_or_timeout(self._closing, REFRESH_S)

    async def __aenter__(self) -> Progress:
        if not self.quiet and self.console.is_terminal:
            self._live = Live(self._table({}), console=self.console, refresh_per_second=4)
            self._live.__enter__()
            self._task = asyncio.create_task(self._loop(self._live))
        return self

    async def __aexit__(self, *exc: object) -> None:
        if self._task is not None:
            self._closing.set()
            self._task.cancel()
            with contextlib.suppress(asyncio.CancelledError):
                await self._task
            self._live.__exit__(None, None, None)
