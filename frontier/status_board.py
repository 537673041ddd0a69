"""What the status page shows for one job: counts, pages/s, budget, workers, hosts, errors,
robots.txt outcomes.

The daemon's stats loop hands the board the frontier's counts every few seconds; the
board keeps them in a ring of ``RATE_SAMPLES`` samples (time, pages fetched, reasons), so
pages per second and recent errors are differences over that ring and cost no extra
state in Redis. The host table is read at most every ``HOSTS_EVERY_S`` (it reads up to a
few thousand host records); workers and robots.txt outcomes are read on each snapshot.
"""

from __future__ import annotations

import time
from collections import deque
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

from frontier.budget import PageBudget
from frontier.host_table import HostTable, read_hosts
from frontier.job import Job
from frontier.metrics import FrontierMetrics
from frontier.mirrors import MIRROR_REASON, read_mirrors
from frontier.revisit_store import read_revisits
from frontier.worker_report import read_robots, read_workers

RATE_SAMPLES = 180  # six minutes of samples at the daemon's 2 s
RATE_WINDOW_S = 60.0  # pages/s is the mean over this long
ERRORS_WINDOW_S = 300.0  # "recent" errors: those of the last five minutes
HOSTS_EVERY_S = 5.0
TOP_REASONS = 15
ROBOTS_FAILURES_SHOWN = 10
ERROR_OUTCOMES = ("failed", "dead")


@dataclass(frozen=True, slots=True)
class Sample:
    at: float  # monotonic seconds
    fetched: int
    reasons: dict[str, int]


class StatusBoard:
    """The status page's figures for one job."""

    def __init__(self, job: Job, budget: PageBudget, metrics: FrontierMetrics | None = None, *,
                 clock: Callable[[], float] = time.monotonic,
                 wall: Callable[[], float] = time.time,
                 hosts_every_s: float = HOSTS_EVERY_S) -> None:
        self.job = job
        self.budget = budget
        self.metrics = metrics
        self.clock = clock
        self.wall = wall
        self.hosts_every_s = hosts_every_s
        self.samples: deque[Sample] = deque(maxlen=RATE_SAMPLES)
        self._hosts = HostTable()
        self._hosts_at: float | None = None
        if metrics is not None:
            metrics.update_budget(job.settings.budget.max_pages)

    # -- samples ---------------------------------------------------------------------------

    def record(self, fetched: int, reasons: dict[str, int]) -> None:
        """One more sample of the frontier's counts: pages fetched, URLs by reason."""
        self.samples.append(Sample(self.clock(), fetched, dict(reasons)))

    def _since(self, window_s: float) -> Sample | None:
        """The oldest sample no older than ``window_s``."""
        start = self.clock() - window_s
        return next((s for s in self.samples if s.at >= start), None)

    def pages_per_s(self, window_s: float = RATE_WINDOW_S) -> float | None:
        """Mean pages fetched per second over the last ``window_s`` (None: too few samples)."""
        first = self._since(window_s)
        last = self.samples[-1] if self.samples else None
        if first is None or last is None or last.at <= first.at:
            return None
        return (last.fetched - first.fetched) / (last.at - first.at)

    def series(self) -> list[dict[str, float]]:
        """Pages per second between consecutive samples, oldest first; ``ago_s`` is how
        long before now the interval ended."""
        now = self.clock()
        out = []
        points = list(self.samples)
        for a, b in zip(points, points[1:]):
            if b.at > a.at:
                out.append({"ago_s": round(now - b.at, 3),
                            "pages_per_s": round((b.fetched - a.fetched) / (b.at - a.at), 3)})
        return out

    def errors(self, reasons: dict[str, int], top: int = TOP_REASONS) -> list[dict[str, Any]]:
        """Failed and dead URLs by reason, most frequent first, with how many are recent."""
        then = self._since(ERRORS_WINDOW_S)
        before = then.reasons if then is not None else {}
        rows = []
        for key, total in reasons.items():
            outcome, _, reason = key.partition(":")
            if outcome in ERROR_OUTCOMES:
                rows.append({"outcome": outcome, "reason": reason, "total": total,
                             "recent": total - before.get(key, 0) if then is not None else None})
        rows.sort(key=lambda r: (-r["total"], r["outcome"], r["reason"]))
        return rows[:top]

    # -- reads -----------------------------------------------------------------------------

    async def hosts(self) -> HostTable:
        """The host table, read again when older than ``hosts_every_s``."""
        now = self.clock()
        if self._hosts_at is None or now - self._hosts_at >= self.hosts_every_s:
            self._hosts = await read_hosts(self.job.store)
            self._hosts_at = now
        return self._hosts

    async def refresh(self, fetched: int, reasons: dict[str, int]) -> None:
        """The stats loop's part: record a sample and bring the board's metrics up to date."""
        self.record(fetched, reasons)
        if self.metrics is None:
            return
        # the controls only: the metrics need no other host records (the whole table
        # would be up to 5,000 HMGETs a step, in the crawl's own process); the page
        # reads the whole table when it is asked for
        table = await read_hosts(self.job.store, limit=0)
        workers = await read_workers(self.job.redis, self.job.store.keys)
        self.metrics.update_board(len(workers), table.known, table.control_counts)
        mirrors = await read_mirrors(self.job.store, shown=0)
        self.metrics.update_mirrors(mirrors["count"], reasons.get(f"excluded:{MIRROR_REASON}", 0))
        revisits = await read_revisits(self.job.store)
        if revisits is not None:
            self.metrics.update_revisits(revisits)

    async def snapshot(self) -> dict[str, Any]:
        """Everything the status page shows, as JSON-ready values (text unescaped: the
        page escapes it)."""
        store = self.job.store
        counts = await store.counts()
        now = self.wall()
        data: dict[str, Any] = {"job": self.job.settings.name, "generated_at": now}
        data.update(counts.as_dict())
        data["balanced"] = counts.balanced
        data["accounted"] = counts.accounted
        max_pages = self.job.settings.budget.max_pages
        data["budget"] = {
            "max_pages": max_pages, "fetched": counts.fetched, "leased": counts.leased,
            "reserved": await self.budget.used(),
            "fraction": min(1.0, counts.fetched / max_pages) if max_pages else None}
        data["rate"] = {"window_s": RATE_WINDOW_S, "pages_per_s": self.pages_per_s(),
                        "series": self.series()}
        workers = await read_workers(self.job.redis, store.keys)
        for w in workers:
            w["seen_ago_s"] = max(0.0, now - float(w.get("seen", now)))
        data["workers"] = workers
        table = await self.hosts()
        data["hosts"] = table.as_dict()
        data["hosts"]["read_ago_s"] = (self.clock() - self._hosts_at
                                       if self._hosts_at is not None else None)
        data["errors"] = self.errors(counts.reasons)
        data["mirrors"] = await read_mirrors(store)
        data["revisits"] = await read_revisits(store)  # pages due, fresh; None: no revisits
        robots = await read_robots(self.job.redis, store.keys, ROBOTS_FAILURES_SHOWN)
        data["robots"] = robots
        return data
