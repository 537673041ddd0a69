"""The revisit state of a job's fetched pages in Redis, and its schedule.

Each politeness key's pages keep their state in a HASH of its partition
(``PartitionKeys.revisit_state``), and each partition a schedule (``revisits``: 'host
url' -> when due). ``frontier/scripts/revisit.lua`` changes both, one partition a call:
``record`` after a fetch (in the same pipeline as the lease's completion),
``release`` when pages come due (they go back to their hosts' queues), ``drop`` when a
revisit ended otherwise than fetched, ``sooner`` when a sitemap's ``<lastmod>`` says a
page changed after its last fetch.
"""

from __future__ import annotations

from collections.abc import Iterable, Sequence
from dataclasses import dataclass
from typing import Any

from frontier.keys import PartitionKeys
from frontier.redis_boundary import redis_boundary
from frontier.revisit import RevisitState, short_digest
from frontier.scripts import ScriptCall, run_many, script_source
from frontier.store import FrontierStore

RELEASE_BATCH = 500  # pages per partition and release (or sooner) call
SAMPLE = 256  # pages per partition sampled for the estimated freshness


@dataclass(frozen=True, slots=True)
class Observation:
    """One fetch of a page, as the revisit script records it."""

    host: str
    url: str
    score: int
    not_modified: bool  # a 304 answer to a conditional GET
    digest: str | None = None  # payload digest of a full response
    etag: str | None = None
    last_modified: int | None = None


@dataclass(frozen=True, slots=True)
class RevisitFigures:
    """What ``sluice status`` shows about revisits."""

    tracked: int  # pages with revisit state
    due: int  # pages whose time has come and that are not fetched again yet
    fresh: int | None  # estimated pages unchanged since their last fetch
    freshness: float | None  # the estimated freshness of the collection (0..1)
    released: int  # pages sent back to their queues so far

    def as_dict(self) -> dict[str, Any]:
        return {"tracked": self.tracked, "due": self.due, "fresh": self.fresh,
                "freshness": None if self.freshness is None else round(self.freshness, 4),
                "released": self.released}


class RevisitStore:
    """Revisit state and schedule of one job (on the frontier's Redis)."""

    def __init__(self, store: FrontierStore) -> None:
        self.store = store
        self.redis = store.redis
        self.keys = store.keys
        self.settings = store.settings.revisit
        self.script = store.redis.register_script(script_source("revisit"))

    def _head(self, pk: PartitionKeys, op: str, now: int, n: int) -> tuple[list[str], list[Any]]:
        s = self.settings
        keys = [pk.counts, pk.revisits, pk.due, pk.ready, pk.prio, pk.touched]
        args: list[Any] = [op, now, repr(s.min_interval_s), repr(s.max_interval_s),
                           repr(s.host_fetches_per_day), self.store.settings.store.hot_capacity, n]
        return keys, args

    def _item_keys(self, pk: PartitionKeys, host: str) -> tuple[str, str, str, str]:
        return pk.host(host), pk.revisit_state(host), pk.hot(host), pk.cold(host)

    # -- the calls ----------------------------------------------------------------------------

    def record_calls(self, seen: Sequence[Observation], now: int | None = None) -> list[ScriptCall]:
        """The record calls (one per partition) for these fetches, to run in the pipeline
        of their completions."""
        t = self.store._now(now)
        by_part: dict[int, list[Observation]] = {}
        for o in seen:
            by_part.setdefault(self.keys.part_for(o.host).index, []).append(o)
        calls = []
        for p, items in by_part.items():
            pk = self.keys.part(p)
            keys, args = self._head(pk, "record", t, len(items))
            for o in items:
                keys += self._item_keys(pk, o.host)
                args += (o.host, o.url, o.score, "304" if o.not_modified else "200",
                         short_digest(o.digest), o.etag or "",
                         "" if o.last_modified is None else o.last_modified)
            calls.append((self.script, keys, args))
        return calls

    async def record(self, seen: Sequence[Observation], now: int | None = None
                     ) -> list[tuple[int, int]]:
        """Record fetches on their own; (changed: 1, 0 or -1 for a first visit, interval
        s) per observation, in order."""
        calls = self.record_calls(seen, now)
        async with redis_boundary("revisit record"):
            results = await run_many(self.redis, calls)
        order: dict[int, list[int]] = {}
        for i, o in enumerate(seen):
            order.setdefault(self.keys.part_for(o.host).index, []).append(i)
        out: list[tuple[int, int]] = [(0, 0)] * len(seen)
        for idx, res in zip(order.values(), results):
            for i, (changed, interval) in zip(idx, res):
                out[i] = (int(changed), int(interval))
        return out

    async def drop(self, pages: Iterable[tuple[str, str]], now: int | None = None) -> int:
        """Stop tracking pages (host, url) whose revisit ended otherwise than fetched."""
        t = self.store._now(now)
        by_part: dict[int, list[tuple[str, str]]] = {}
        for host, url in pages:
            by_part.setdefault(self.keys.part_for(host).index, []).append((host, url))
        calls = []
        for p, items in by_part.items():
            pk = self.keys.part(p)
            keys, args = self._head(pk, "drop", t, len(items))
            for host, url in items:
                keys += self._item_keys(pk, host)
                args += (host, url)
            calls.append((self.script, keys, args))
        async with redis_boundary("revisit drop"):
            return sum(int(r) for r in await run_many(self.redis, calls))

    async def sooner(self, listed: Iterable[tuple[str, str, int]],
                     now: int | None = None) -> int:
        """Make tracked pages (host, url, lastmod epoch s) whose lastmod is after their
        last fetch due now, or at their last fetch + ``min_interval_s`` if that is later;
        how many were moved sooner. Untracked pages and pages already back in their
        queues are left alone."""
        t = self.store._now(now)
        by_part: dict[int, list[tuple[str, str, int]]] = {}
        for host, url, lastmod in listed:
            by_part.setdefault(self.keys.part_for(host).index, []).append((host, url, lastmod))
        calls = []
        for p, items in by_part.items():
            pk = self.keys.part(p)
            for start in range(0, len(items), RELEASE_BATCH):  # short script calls
                chunk = items[start:start + RELEASE_BATCH]
                keys, args = self._head(pk, "sooner", t, len(chunk))
                for host, url, lastmod in chunk:
                    keys += self._item_keys(pk, host)
                    args += (host, url, lastmod)
                calls.append((self.script, keys, args))
        if not calls:
            return 0
        async with redis_boundary("revisit sooner"):
            return sum(int(r) for r in await run_many(self.redis, calls))

    async def release_due(self, now: int | None = None) -> int:
        """Send every page whose time has come back to its host's queue; how many went."""
        t = self.store._now(now)
        total = 0
        async with redis_boundary("revisit release"):
            for pk in self.keys.parts:
                while True:
                    members = await self.redis.zrangebyscore(pk.revisits, "-inf", t, 0,
                                                             RELEASE_BATCH)
                    if not members:
                        break
                    keys, args = self._head(pk, "release", t, len(members))
                    for raw in members:
                        host, url = raw.decode("utf-8", "surrogateescape").split(" ", 1)
                        keys += self._item_keys(pk, host)
                        args += (host, url)
                    total += int(await self.script(keys, args))
                    if len(members) < RELEASE_BATCH:
                        break
        return total

    # -- reads -----------------------------------------------------------------------------

    async def states(self, pages: Sequence[tuple[str, str]]) -> list[RevisitState | None]:
        """The stored state of each (host, url), None for a page not tracked; one round
        trip."""
        if not pages:
            return []
        async with redis_boundary("revisit state"):
            async with self.redis.pipeline(transaction=False) as pipe:
                for host, url in pages:
                    pipe.hget(self.keys.part_for(host).revisit_state(host), url)
                raw = await pipe.execute()
        return [None if r is None else RevisitState.decode(r) for r in raw]

    async def figures(self, now: int | None = None, sample: int = SAMPLE) -> RevisitFigures:
        """Pages tracked, due and (estimated) fresh. Freshness is the mean, over up to
        ``sample`` random scheduled pages a partition, of ``e^(-rate * age)`` by each
        page's estimated change rate (pages seen once have no rate and are left out)."""
        t = self.store._now(now)
        tracked = pending = released = 0
        due = 0
        probabilities: list[float] = []
        async with redis_boundary("revisit figures"):
            for pk in self.keys.parts:
                row = await self.redis.hmget(pk.counts, "rv_tracked", "rv_pending", "rv_released")
                tracked += int(row[0] or 0)
                pending += max(0, int(row[1] or 0))
                released += int(row[2] or 0)
                due += int(await self.redis.zcount(pk.revisits, "-inf", t))
                members = await self.redis.zrandmember(pk.revisits, sample) or []
                pairs = [m.decode("utf-8", "surrogateescape").split(" ", 1) for m in members]
                if not pairs:
                    continue
                async with self.redis.pipeline(transaction=False) as pipe:
                    for host, url in pairs:
                        pipe.hget(pk.revisit_state(host), url)
                    for raw in await pipe.execute():
                        if raw is not None:
                            p = RevisitState.decode(raw).fresh_probability(t / 1000)
                            if p is not None:
                                probabilities.append(p)
        freshness = sum(probabilities) / len(probabilities) if probabilities else None
        fresh = None if freshness is None else round(freshness * tracked)
        return RevisitFigures(tracked, due + pending, fresh, freshness, released)

    async def memory_bytes(self) -> int:
        """Bytes Redis uses for the revisit state and schedules (MEMORY USAGE, exact)."""
        total = 0
        async with redis_boundary("revisit memory"):
            for pk in self.keys.parts:
                total += int(await self.redis.memory_usage(pk.revisits, samples=0) or 0)
                hosts = await self.redis.smembers(pk.hosts)
                for h in hosts:
                    host = h.decode() if isinstance(h, bytes) else h
                    total += int(await self.redis.memory_usage(pk.revisit_state(host),
                                                               samples=0) or 0)
        return total



async def read_revisits(store: FrontierStore) -> dict[str, Any] | None:
    """The revisit figures of a job for ``sluice status``, the status page and the
    metrics; None when the job does not revisit."""
    if not store.settings.revisit.enabled:
        return None
    return (await RevisitStore(store).figures()).as_dict()
