"""What a worker tells the operator through Redis: its heartbeat and its robots.txt outcomes.

Heartbeat: every ``HEARTBEAT_EVERY_S`` a worker writes a JSON record (id, machine,
pid, pages fetched, leases in flight, when it started and when it beat) under its own key,
set to expire after ``HEARTBEAT_TTL_S``, and puts its id in the job's worker index. The
daemon reads the index, keeps the records that have not expired and forgets the rest, so
a worker that died leaves the status page within the TTL. Liveness rests on the key's
expiry, decided by the Redis server's clock; the index's scores only order the workers.

robots.txt: each fetch is counted by the policy it stands for (RFC 9309 s.2.3.1), in
the worker's metrics and in a job-wide hash; the latest fetches that ended in
"disallow all" (a server error, 429 or an unreachable host) are kept in a capped list.

Reporting never stops a worker: a Redis error here is logged and dropped.
"""

from __future__ import annotations

import logging
import os
import secrets
import socket
import time
from collections.abc import Awaitable, Callable
from typing import Any

import orjson

from frontier.exceptions import StoreError, StoreUnavailable
from frontier.keys import Keys
from frontier.metrics import WorkerMetrics
from frontier.redis_boundary import redis_boundary
from frontier.robots import RobotsFetchResult
from frontier.robots_rules import STATE_DISALLOW_ALL, state_for_status
from frontier.store import FrontierStore

log = logging.getLogger(__name__)

HEARTBEAT_EVERY_S = 5.0
HEARTBEAT_TTL_S = 30.0  # a worker not heard of for this long is gone (six beats missed)
WORKERS_READ = 200  # heartbeats read per status refresh, most recent first
WORKERS_INDEXED = 1000  # ids kept in the index (the most recent); older ones are dropped
ROBOTS_FAILURES_KEPT = 50
REPORT_ERRORS = (StoreError, StoreUnavailable)

RobotsFetch = Callable[[str], Awaitable[RobotsFetchResult]]


def worker_id(machine: str, pid: int) -> str:
    """An id unique among the workers of a job: machine, process, and a random part
    (several workers may share a process)."""
    return f"{machine}/{pid}/{secrets.token_hex(3)}"


class WorkerReport:
    """One worker's heartbeat and robots.txt outcomes. Creating it labels the worker's
    metrics with the job's name."""

    def __init__(
        self,
        store: FrontierStore,
        metrics: WorkerMetrics,
        *,
        machine: str | None = None,
        every_s: float = HEARTBEAT_EVERY_S,
        ttl_s: float = HEARTBEAT_TTL_S,
        clock: Callable[[], float] = time.time,
        monotonic: Callable[[], float] = time.monotonic,
    ) -> None:
        self.redis = store.redis
        self.keys: Keys = store.keys
        self.metrics = metrics
        metrics.bind_job(store.settings.name)
        self.machine = machine if machine is not None else socket.gethostname()
        self.pid = os.getpid()
        self.id = worker_id(self.machine, self.pid)
        self.every_s = every_s
        self.ttl_ms = int(ttl_s * 1000)
        self.clock = clock
        self.monotonic = monotonic
        self.started = clock()
        self._next_beat = float("-inf")

    async def beat(self, pages: int, in_flight: int, *, force: bool = False) -> bool:
        """Write the heartbeat if one is due (or ``force``); True if it was written."""
        now = self.monotonic()
        if not force and now < self._next_beat:
            return False
        self._next_beat = now + self.every_s
        seen = self.clock()
        record = {"id": self.id, "machine": self.machine, "pid": self.pid, "pages": pages,
                  "in_flight": in_flight, "started": self.started, "seen": seen}
        try:
            async with redis_boundary("heartbeat"):
                pipe = self.redis.pipeline(transaction=False)
                pipe.set(self.keys.worker(self.id), orjson.dumps(record), px=self.ttl_ms)
                pipe.zadd(self.keys.workers, {self.id: int(seen * 1000)})
                await pipe.execute()
        except REPORT_ERRORS as exc:
            log.info("heartbeat not written: %s", exc)
            return False
        return True

    def robots_fetcher(self, fetch: RobotsFetch) -> RobotsFetch:
        """``fetch`` (a robots.txt GET), counting each outcome."""

        async def counted(url: str) -> RobotsFetchResult:
            result = await fetch(url)
            await self.record_robots(url, result)
            return result

        return counted

    async def record_robots(self, url: str, result: RobotsFetchResult) -> None:
        policy = state_for_status(result.status)
        self.metrics.count_robots(policy)
        try:
            async with redis_boundary("robots outcome"):
                pipe = self.redis.pipeline(transaction=False)
                pipe.hincrby(self.keys.robots_outcomes, policy, 1)
                if policy == STATE_DISALLOW_ALL:
                    entry = {"url": url, "status": result.status, "error": result.error,
                             "at": self.clock(), "worker": self.id}
                    pipe.lpush(self.keys.robots_failures, orjson.dumps(entry))
                    pipe.ltrim(self.keys.robots_failures, 0, ROBOTS_FAILURES_KEPT - 1)
                await pipe.execute()
        except REPORT_ERRORS as exc:
            log.info("robots outcome not recorded: %s", exc)


def _text(value: Any) -> str:
    return value.decode() if isinstance(value, bytes) else str(value)


def _record(raw: Any) -> dict[str, Any] | None:
    """A stored JSON object; None for a missing or unreadable one (it is skipped)."""
    if raw is None:
        return None
    try:
        record = orjson.loads(raw)
    except orjson.JSONDecodeError:
        return None
    return record if isinstance(record, dict) else None


async def read_workers(redis: Any, keys: Keys, limit: int = WORKERS_READ) -> list[dict[str, Any]]:
    """Heartbeats that have not expired, most recent first (at most ``limit``); ids whose
    record expired leave the index."""
    async with redis_boundary("workers"):
        await redis.zremrangebyrank(keys.workers, 0, -(WORKERS_INDEXED + 1))
        ids = [_text(i) for i in await redis.zrevrange(keys.workers, 0, limit - 1)]
        if not ids:
            return []
        pipe = redis.pipeline(transaction=False)
        for i in ids:
            pipe.get(keys.worker(i))
        raws = await pipe.execute()
        gone = [i for i, raw in zip(ids, raws) if raw is None]
        if gone:
            await redis.zrem(keys.workers, *gone)
    return [record for raw in raws if (record := _record(raw)) is not None]


async def read_robots(redis: Any, keys: Keys, limit: int = ROBOTS_FAILURES_KEPT) -> dict[str, Any]:
    """robots.txt fetches by policy, and the latest that ended in 'disallow all'."""
    async with redis_boundary("robots outcomes"):
        counts = await redis.hgetall(keys.robots_outcomes)
        failures = await redis.lrange(keys.robots_failures, 0, limit - 1)
    return {"policies": {_text(k): int(v) for k, v in counts.items()},
            "failures": [record for f in failures if (record := _record(f)) is not None]}
